"""Build an index folder from a corpus, and add or remove articles in one."""

from __future__ import annotations

import hashlib
import json
import time
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any, Protocol

import numpy as np
import scipy.sparse as sp
from tqdm.auto import tqdm

from . import bm25, store, vecgen
from . import vectors as vecs
from .analyzer import Analyzer, AnalyzerConfig
from .corpus import Article, CorpusError, ReadReport, file_checksum, read_articles
from .counting import count_articles, default_workers, no_gc
from .errors import IndexFormatError
from .folderwriter import write_folder
from .index import Index, load_index
from .ingest import Keys, ingest


def _resolve_settings(
    analyzer: Analyzer | AnalyzerConfig | Mapping[str, Any] | None,
    params: bm25.BM25Params | Mapping[str, Any] | None,
    options: dict[str, Any],
) -> tuple[Analyzer, bm25.BM25Params]:
    bm25_keys = set(bm25.BM25Params.__dataclass_fields__)
    bm25_opts = {k: options.pop(k) for k in list(options) if k in bm25_keys}
    an_keys = set(AnalyzerConfig.__dataclass_fields__)
    an_opts = {k: options.pop(k) for k in list(options) if k in an_keys}
    if options:
        raise TypeError(f"unknown build options: {sorted(options)}")
    if isinstance(analyzer, Analyzer):
        an = analyzer
    elif isinstance(analyzer, AnalyzerConfig):
        an = Analyzer(analyzer)
    else:
        an = Analyzer(AnalyzerConfig(**{**(dict(analyzer) if analyzer else {}), **an_opts}))
    if isinstance(params, bm25.BM25Params):
        p = params
    else:
        p = bm25.BM25Params(**{**(dict(params) if params else {}), **bm25_opts})
    return an, p


def build_index(
    corpus: str | Path | Iterable[Mapping[str, Any] | Article],
    out_dir: str | Path,
    *,
    analyzer: Analyzer | AnalyzerConfig | Mapping[str, Any] | None = None,
    params: bm25.BM25Params | Mapping[str, Any] | None = None,
    skip_bad: bool = False,
    progress: bool = False,
    report: ReadReport | None = None,
    workers: int | None = None,
    vectors: Any = True,
    **options: Any,
) -> Index:
    """Build an index folder from a corpus file or records; an old one is replaced only on success.

    Options may name any AnalyzerConfig field (stemmer, stopwords, ...) or BM25Params
    field (k1, b, epsilon, idf, title_weight). `workers` processes count terms (default:
    2 on multi-core machines for corpora over ~20k articles, else 1); the result is the same.
    `vectors`: True (default settings), False or 'off' (none), or a dict of
    vectors.VectorSettings fields: word vectors trained on the corpus for dense search.
    """
    started = time.perf_counter()
    an, p = _resolve_settings(analyzer, params, dict(options))
    vec_settings = vecs.resolve_settings(vectors)
    report = report if report is not None else ReadReport()
    if isinstance(corpus, str | Path):
        path = Path(corpus)
        checksum = file_checksum(path) if path.is_file() else ""
        source: Any = path
        # About 1 KiB per article in typical corpora.
        hint = path.stat().st_size // 1024 if path.is_file() else 0
    else:
        records = [a.to_record() if isinstance(a, Article) else dict(a) for a in corpus]
        blob = json.dumps(records, sort_keys=True, default=str).encode()
        checksum = hashlib.sha256(blob).hexdigest()
        source, hint = records, len(records)
    n_workers = default_workers(hint) if workers is None else max(1, int(workers))
    out = Path(out_dir)
    with (
        no_gc(),
        tqdm(desc="indexing", unit=" articles", disable=not progress, mininterval=0.5) as bar,
        store.atomic_folder(out) as tmp,
    ):
        with store.open_store(tmp) as fh:
            state = ingest(
                source, an, fh, workers=n_workers, skip_bad=skip_bad, report=report, bar=bar
            )
        if not state.keys:
            where = str(corpus) if isinstance(corpus, str | Path) else ""
            raise CorpusError("the corpus has no valid articles", file=where)
        store.save_array(tmp, store.STORE_OFFSETS, state.store_offsets())
        build = {
            "skipped_lines": report.skipped,
            "problems": report.problems[:5],
            "workers": n_workers,
        }
        if isinstance(corpus, str | Path):
            build["corpus"] = str(Path(corpus).resolve())  # for a printed rebuild command
        write_folder(
            tmp,
            state.keys,
            state.counter,
            None,
            an,
            p,
            checksum,
            build,
            started,
            metadata=state.metadata,
        )
        del state
        if vec_settings is not None:
            vecs.add_to_folder(tmp, an, vec_settings, progress=progress)
    return load_index(out)


def _existing_counts(index: Index, keep_rows: np.ndarray) -> tuple[sp.csr_matrix, list[str]]:
    """Doc-major term counts of some rows of an index (its body field), with the term names."""
    vocab = index.vocab.terms.tolist()
    n_postings = int(index.manifest["counts"]["body_postings"])
    body_tf = store.open_array(index.path, "body_tf", "int32", n_postings)
    tf = sp.csc_matrix(
        (np.asarray(body_tf), np.asarray(index.body.docs), np.asarray(index.body.indptr)),
        shape=(index.n_docs, index.n_terms),
    ).tocsr()
    return tf[keep_rows], vocab


class _Titled(Protocol):
    @property
    def id(self) -> str: ...
    @property
    def title(self) -> str: ...


def check_titles(
    owners: Iterable[tuple[str, str]], articles: Sequence[_Titled], *, remove: Iterable[str] = ()
) -> None:
    """Refuse a title that another article keeps: the name would no longer say which is meant.

    owners: (id, title) of the articles there now; articles: those being added or replaced
    (an id among them or in `remove` gives its title up). The CorpusError names the article
    by its position among `articles`, from 1, and the field.
    """
    changed = set(remove) | {a.id for a in articles}
    owner_of = {title: doc_id for doc_id, title in owners if doc_id not in changed}
    for i, a in enumerate(articles, start=1):
        owner = owner_of.get(a.title.strip())
        if owner is not None and owner != a.id:
            raise CorpusError(
                f"title {a.title.strip()!r} already belongs to article {owner!r}",
                line=i,
                field="title",
            )


def update_index(
    index_dir: str | Path,
    add: str | Path | Iterable[Mapping[str, Any] | Article] = (),
    remove: Sequence[str] = (),
    *,
    skip_bad: bool = False,
    progress: bool = False,
    report: ReadReport | None = None,
) -> Index:
    """Add, replace (same id) and remove articles; scores equal those of a fresh build.

    Kept articles keep their rows and counted terms (their text is not analyzed again);
    replaced ones keep their row, new ones go at the end, removed ones disappear.
    """
    started = time.perf_counter()
    old = load_index(index_dir)
    if "shard" in old.manifest:
        raise IndexFormatError(
            f"{index_dir}: this is one shard of a sharded index, weighted with the whole "
            "corpus's statistics; rebuild the whole index with --shards instead"
        )
    report = report if report is not None else ReadReport()
    missing = [d for d in remove if d not in old.ids]
    if missing:
        raise CorpusError(f"cannot remove unknown article ids: {missing[:10]}", field="id")
    new_articles = list(read_articles(add, skip_bad=skip_bad, report=report)) if add else []
    new_by_id = {a.id: a for a in new_articles}
    removed = set(remove) - set(new_by_id)
    existing = list(old._store.articles())
    changed = removed | set(new_by_id)
    check_titles(((a.id, a.title) for a in existing), new_articles, remove=remove)
    keep = [r for r, a in enumerate(existing) if a.id not in changed]
    counts, vocab = _existing_counts(old, np.asarray(keep, dtype=np.int64))
    old_ids = {a.id for a in existing}
    # Final order: old rows (replacements in place), then new articles.
    final: list[Article] = []
    source_pos: list[int] = []  # where each final row is among the counted rows
    kept_pos = {r: i for i, r in enumerate(keep)}
    recount: list[Article] = []
    for r, a in enumerate(existing):
        if a.id in removed:
            continue
        if a.id in new_by_id:
            final.append(new_by_id[a.id])
            source_pos.append(len(keep) + len(recount))
            recount.append(new_by_id[a.id])
        else:
            final.append(a)
            source_pos.append(kept_pos[r])
    for a in new_articles:
        if a.id not in old_ids:
            final.append(a)
            source_pos.append(len(keep) + len(recount))
            recount.append(a)
    if not final:
        raise CorpusError("removing these articles would leave the index empty", field="id")
    an = old.analyzer
    counter = count_articles([([a.text for a in recount], [])], an, 1)
    counter.add_counts("body", counts, vocab)
    counter.chunks["body"].insert(0, counter.chunks["body"].pop())
    # Titles are short: count them again for every row rather than reorder stored ones.
    titles = count_articles([([], [a.title for a in final])], an, 1)
    counter.merge_field(titles, "title")
    record = [
        old.manifest["corpus_checksum"],
        sorted(remove),
        [a.to_record() for a in new_articles],
    ]
    checksum = hashlib.sha256(json.dumps(record, sort_keys=True, default=str).encode()).hexdigest()
    build = {
        "skipped_lines": report.skipped,
        "problems": report.problems[:5],
        "updated_from": old.version,
        "added": sum(1 for a in new_articles if a.id not in old_ids),
        "replaced": sum(1 for a in new_articles if a.id in old_ids),
        "removed": len(removed),
    }
    params = old.params
    order = np.asarray(source_pos, dtype=np.int64)
    vec_entry = old.manifest.get("vectors")
    del old  # release the memory maps before the folder is swapped
    with store.atomic_folder(Path(index_dir)) as tmp:
        store.write_store(tmp, final)
        write_folder(tmp, Keys.of(final), counter, order, an, params, checksum, build, started)
        if vec_entry:
            # The stored word vectors and weights give every article its vector again
            # (no training; a kept article's vector comes out as before).
            settings = vecs.VectorSettings.from_dict(vec_entry["settings"])
            vecs.add_to_folder(tmp, an, settings, from_folder=Path(index_dir))
            # Refined vector generations too, so models trained with them keep serving.
            vecgen.carry_over(Path(index_dir), tmp)
    return load_index(index_dir)
