"""Build an index folder from a corpus, and add or remove articles in one."""

from __future__ import annotations

import hashlib
import json
import time
from collections.abc import Iterable, Iterator, Mapping, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse as sp
from tqdm.auto import tqdm

from . import bm25, store
from .analyzer import Analyzer, AnalyzerConfig
from .corpus import Article, CorpusError, ReadReport, file_checksum, read_articles, split_title
from .counting import CHUNK, TermCounter, count_articles, default_workers
from .index import Index, load_index
from .links import NameResolver, count_inlinks


def _field_arrays(tf: sp.csc_matrix, params: bm25.BM25Params) -> dict[str, np.ndarray]:
    """Postings (term-major), BM25 weights and per-term maximum weight of one field."""
    n_docs = tf.shape[0]
    tf.sort_indices()
    doc_len = np.asarray(tf.sum(axis=1)).ravel().astype(np.int64)
    avgdl = float(doc_len.sum()) / n_docs if n_docs else 0.0
    df = np.diff(tf.indptr)
    # The IDF (and the okapi floor's mean) is over the terms this field contains, as in
    # rank_bm25; the shared vocabulary also holds terms seen only in the other field.
    present = df > 0
    term_idf = np.zeros(df.size, dtype=np.float64)
    term_idf[present] = bm25.idf(df[present], n_docs, params)
    docs = tf.indices.astype(np.int32)
    weight = bm25.term_weights(
        tf.data, doc_len[docs], np.repeat(term_idf, df), avgdl, params.k1, params.b
    )
    return {
        "indptr": tf.indptr.astype(np.int64),
        "docs": docs,
        "tf": tf.data.astype(np.int32),
        "weight": weight,
        "doc_len": doc_len.astype(np.int32),
    }


def _term_major(
    counter: TermCounter, order: np.ndarray | None
) -> tuple[list[str], list[sp.csc_matrix]]:
    """Sorted vocabulary of the used terms and each field's (articles x terms) CSC counts."""
    body = counter.matrix("body", order)
    title = counter.matrix("title")
    used = (np.diff(body.tocsc().indptr) > 0) | (np.diff(title.tocsc().indptr) > 0)
    names = np.asarray(counter.terms, dtype=object)
    used_ids = np.flatnonzero(used)
    # Sorted and without unused terms: the same corpus always gives the same index.
    ranked = used_ids[np.argsort(names[used_ids].astype(str), kind="stable")]
    new_id = np.full(len(counter.terms), -1, dtype=np.int64)
    new_id[ranked] = np.arange(ranked.size)
    mats = []
    for m in (body, title):
        m = m.tocsr()
        mats.append(
            sp.csr_matrix(
                (m.data, new_id[m.indices], m.indptr), shape=(m.shape[0], ranked.size)
            ).tocsc()
        )
    return [str(t) for t in names[ranked]], mats


def _write(
    out: Path,
    articles: list[Article],
    counter: TermCounter,
    body_order: np.ndarray | None,
    analyzer: Analyzer,
    params: bm25.BM25Params,
    checksum: str,
    build: dict[str, Any],
    started: float,
) -> Index:
    # `body_order[i]` is the counted row that becomes row i (updates count rows out of order).
    all_terms, (tf_body, tf_title) = _term_major(counter, body_order)
    b = _field_arrays(tf_body, params)
    t = _field_arrays(tf_title, params)
    ids = [a.id for a in articles]
    titles = [a.title for a in articles]
    resolver = NameResolver(ids, titles, [a.aliases for a in articles])
    inlinks, unresolved = count_inlinks(resolver, [a.links for a in articles], len(articles))
    split = [split_title(title) for title in titles]
    with store.atomic_folder(out) as tmp:
        for prefix, arrays in (("body", b), ("title", t)):
            for name in ("indptr", "docs", "tf", "weight"):
                store.save_array(tmp, f"{prefix}_{name}", arrays[name])
        store.save_array(tmp, "title_len", t["doc_len"])
        store.save_array(tmp, "doc_len", b["doc_len"])
        store.save_array(tmp, "inlinks", inlinks)
        popularity = [np.nan if a.popularity is None else a.popularity for a in articles]
        store.save_array(tmp, "popularity", np.array(popularity, dtype=np.float64))
        store.write_json(tmp / store.VOCAB, all_terms)
        store.write_json(
            tmp / store.KEYS,
            {
                "ids": ids,
                "titles": titles,
                "bases": [s[0] for s in split],
                "qualifiers": [s[1] for s in split],
                "aliases": [list(a.aliases) for a in articles],
            },
        )
        store.write_store(tmp, articles)
        build_info = {
            **build,
            "unresolved_links": unresolved,
            "ambiguous_aliases": len(resolver.ambiguous_aliases),
            "seconds": round(time.perf_counter() - started, 3),
        }
        created = datetime.now(UTC).isoformat(timespec="seconds")
        stamp = [checksum, params.to_dict(), analyzer.config.to_dict()]
        version = hashlib.sha256(json.dumps(stamp, sort_keys=True).encode()).hexdigest()[:12]
        manifest = {
            "format": store.FORMAT_NAME,
            "format_version": store.FORMAT_VERSION,
            "index_version": version,
            "created_at": created,
            "corpus_checksum": checksum,
            "analyzer": analyzer.config.to_dict(),
            "bm25": params.to_dict(),
            "counts": {
                "articles": len(articles),
                "terms": len(all_terms),
                "body_postings": int(b["docs"].size),
                "title_postings": int(t["docs"].size),
                "avgdl": float(b["doc_len"].mean()) if len(articles) else 0.0,
                "qualified_titles": sum(1 for s in split if s[1]),
                "unresolved_links": unresolved,
            },
            "build": build_info,
        }
        build_info["bytes_on_disk"] = store.folder_size(tmp)
        # Written last: its presence marks a whole index.
        store.write_json(tmp / store.MANIFEST, manifest)
    return load_index(out)


def _chunks(
    articles: Iterable[Article], keep: list[Article]
) -> Iterator[tuple[list[str], list[str]]]:
    """(bodies, titles) in chunks, remembering every article in `keep`."""
    bodies: list[str] = []
    titles: list[str] = []
    for art in articles:
        keep.append(art)
        bodies.append(art.text)
        titles.append(art.title)
        if len(bodies) >= CHUNK:
            yield bodies, titles
            bodies, titles = [], []
    if bodies:
        yield bodies, titles


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
    **options: Any,
) -> Index:
    """Build an index folder from a corpus file or records; an old one is replaced only on success.

    Options may name any AnalyzerConfig field (stemmer, stopwords, ...) or BM25Params
    field (k1, b, epsilon, idf, title_weight). `workers` processes count terms (default:
    2 on multi-core machines for corpora over ~20k articles, else 1); the result is the same.
    """
    started = time.perf_counter()
    an, p = _resolve_settings(analyzer, params, dict(options))
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
    articles: list[Article] = []
    it = read_articles(source, skip_bad=skip_bad, report=report)
    bar = tqdm(it, desc="indexing", unit=" articles", disable=not progress, mininterval=0.5)
    n_workers = default_workers(hint) if workers is None else max(1, int(workers))
    counter = count_articles(_chunks(bar, articles), an, n_workers)
    if not articles:
        where = str(corpus) if isinstance(corpus, str | Path) else ""
        raise CorpusError("the corpus has no valid articles", file=where)
    build = {"skipped_lines": report.skipped, "problems": report.problems[:5], "workers": n_workers}
    return _write(Path(out_dir), articles, counter, None, an, p, checksum, build, started)


def _existing_counts(index: Index, keep_rows: np.ndarray) -> tuple[sp.csr_matrix, list[str]]:
    """Doc-major term counts of some rows of an index (its body field), with the term names."""
    vocab = json.loads((index.path / store.VOCAB).read_text(encoding="utf-8"))
    n_postings = int(index.manifest["counts"]["body_postings"])
    body_tf = store.open_array(index.path, "body_tf", "int32", n_postings)
    tf = sp.csc_matrix(
        (np.asarray(body_tf), np.asarray(index.body.docs), np.asarray(index.body.indptr)),
        shape=(index.n_docs, index.n_terms),
    ).tocsr()
    return tf[keep_rows], vocab


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
    report = report if report is not None else ReadReport()
    missing = [d for d in remove if d not in old._row_by_id]
    if missing:
        raise CorpusError(f"cannot remove unknown article ids: {missing[:10]}", field="id")
    new_articles = list(read_articles(add, skip_bad=skip_bad, report=report)) if add else []
    new_by_id = {a.id: a for a in new_articles}
    removed = set(remove) - set(new_by_id)
    existing = list(old._store.articles())
    changed = removed | set(new_by_id)
    title_owner = {a.title: a.id for a in existing if a.id not in changed}
    for a in new_articles:
        if title_owner.get(a.title, a.id) != a.id:
            owner = title_owner[a.title]
            raise CorpusError(
                f"title {a.title!r} already belongs to article {owner!r}", field="title"
            )
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
    del old  # release the memory maps before the folder is swapped
    return _write(Path(index_dir), final, counter, order, an, params, checksum, build, started)
