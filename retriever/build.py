"""Build an index folder from a corpus, and add or remove articles in one."""

from __future__ import annotations

import hashlib
import json
import time
from collections import defaultdict
from collections.abc import Iterable, Mapping, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse as sp
from tqdm.auto import tqdm

from . import bm25, store
from .analyzer import Analyzer, AnalyzerConfig
from .corpus import Article, CorpusError, ReadReport, file_checksum, read_articles, split_title
from .index import Index, load_index
from .links import NameResolver, count_inlinks

CHUNK = 20_000  # articles per sparse chunk while counting terms


class _TermCounter:
    """Counts terms per article into doc-major sparse chunks over one growing vocabulary."""

    def __init__(self) -> None:
        self.vocab: defaultdict[str, int] = defaultdict(lambda: len(self.vocab))
        self.chunks: list[sp.csr_matrix] = []
        self._rows: list[int] = []
        self._terms: list[int] = []
        self._n = 0

    def add(self, tokens: Sequence[str]) -> None:
        """Count the tokens of the next article."""
        get = self.vocab.__getitem__
        self._terms.extend(map(get, tokens))
        self._rows.extend([self._n] * len(tokens))
        self._n += 1
        if self._n >= CHUNK:
            self.flush()

    def add_counts(self, matrix: sp.csr_matrix, terms: Sequence[str]) -> None:
        """Append already-counted articles (rows of `matrix`, columns named by `terms`)."""
        self.flush()
        col_map = np.fromiter((self.vocab[t] for t in terms), np.int64, len(terms))
        m = matrix.tocoo()
        self.chunks.append(_csr(m.data, m.row, col_map[m.col], m.shape[0]))

    def flush(self) -> None:
        """Close the current chunk."""
        if self._n:
            rows = np.asarray(self._rows, dtype=np.int64)
            terms = np.asarray(self._terms, dtype=np.int64)
            self.chunks.append(_csr(np.ones(len(terms), np.int32), rows, terms, self._n))
        self._rows, self._terms, self._n = [], [], 0

    def finish(self, order: np.ndarray | None = None) -> tuple[list[str], sp.csc_matrix]:
        """Sorted vocabulary and the (articles x terms) count matrix in CSC form."""
        self.flush()
        n_terms = len(self.vocab)
        mats = [sp.csr_matrix((c.data, c.indices, c.indptr), shape=(c.shape[0], n_terms)) for c in self.chunks]
        tf = sp.vstack(mats, format="csr") if mats else sp.csr_matrix((0, n_terms), dtype=np.int32)
        if order is not None:
            tf = tf[order]
        # Sorted vocabulary, and only terms still used: the same corpus always gives the same index.
        terms = np.array(list(self.vocab.keys()), dtype=object)
        used = np.flatnonzero(np.diff(tf.tocsc().indptr) > 0)
        ranked = used[np.argsort(terms[used].astype(str), kind="stable")]
        return [str(t) for t in terms[ranked]], tf.tocsc()[:, ranked].tocsc()


def _csr(data: np.ndarray, rows: np.ndarray, cols: np.ndarray, n_rows: int) -> sp.csr_matrix:
    n_cols = int(cols.max()) + 1 if cols.size else 0
    m = sp.coo_matrix((np.asarray(data, np.int32), (rows, cols)), shape=(n_rows, n_cols)).tocsr()
    m.sum_duplicates()
    return m


def _field_arrays(tf: sp.csc_matrix, params: bm25.BM25Params) -> dict[str, np.ndarray]:
    """Postings (term-major) and BM25 weights of one field from its count matrix."""
    n_docs = tf.shape[0]
    tf.sort_indices()
    doc_len = np.asarray(tf.sum(axis=1)).ravel().astype(np.int64)
    avgdl = float(doc_len.sum()) / n_docs if n_docs else 0.0
    df = np.diff(tf.indptr)
    term_idf = bm25.idf(df, n_docs, params)
    per_posting_idf = np.repeat(term_idf, df)
    docs = tf.indices.astype(np.int32)
    weight = bm25.term_weights(tf.data, doc_len[docs], per_posting_idf, avgdl, params.k1, params.b)
    return {"indptr": tf.indptr.astype(np.int64), "docs": docs, "tf": tf.data.astype(np.int32),
            "weight": weight, "doc_len": doc_len.astype(np.int32)}


def _write(out: Path, articles: list[Article], body: _TermCounter, title: _TermCounter,
           body_order: np.ndarray | None, analyzer: Analyzer, params: bm25.BM25Params,
           checksum: str, build: dict[str, Any]) -> Index:
    started = time.perf_counter()
    # `body_order[i]` is the counted row that becomes row i (updates count rows out of order).
    terms, tf_body = body.finish(body_order)
    title_terms, tf_title = title.finish()
    # Both fields share one vocabulary so a query is mapped to term ids once.
    all_terms = sorted(set(terms) | set(title_terms))
    pos = {t: i for i, t in enumerate(all_terms)}

    def widen(tf: sp.csc_matrix, names: list[str]) -> sp.csc_matrix:
        cols = np.fromiter((pos[t] for t in names), np.int64, len(names))
        coo = tf.tocoo()
        return sp.csc_matrix((coo.data, (coo.row, cols[coo.col])), shape=(tf.shape[0], len(all_terms)))

    b = _field_arrays(widen(tf_body, terms), params)
    t = _field_arrays(widen(tf_title, title_terms), params)
    resolver = NameResolver([a.id for a in articles], [a.title for a in articles], [a.aliases for a in articles])
    inlinks, unresolved = count_inlinks(resolver, [a.links for a in articles], len(articles))
    build = {**build, "unresolved_links": unresolved, "seconds": round(time.perf_counter() - started
                                                                        + build.get("seconds", 0.0), 3)}
    with store.atomic_folder(out) as tmp:
        for prefix, arrays in (("body", b), ("title", t)):
            for name in ("indptr", "docs", "tf", "weight"):
                store.save_array(tmp, f"{prefix}_{name}", arrays[name])
        store.save_array(tmp, "title_len", t["doc_len"])
        store.save_array(tmp, "doc_len", b["doc_len"])
        store.save_array(tmp, "inlinks", inlinks)
        store.save_array(tmp, "popularity", np.array(
            [np.nan if a.popularity is None else a.popularity for a in articles], dtype=np.float64))
        store.write_json(tmp / store.VOCAB, all_terms)
        split = [split_title(a.title) for a in articles]
        store.write_json(tmp / store.KEYS, {
            "ids": [a.id for a in articles], "titles": [a.title for a in articles],
            "bases": [s[0] for s in split], "qualifiers": [s[1] for s in split],
            "aliases": [list(a.aliases) for a in articles]})
        store.write_store(tmp, articles)
        created = datetime.now(UTC).isoformat(timespec="seconds")
        version = hashlib.sha256(json.dumps([checksum, params.to_dict(), analyzer.config.to_dict()],
                                            sort_keys=True).encode()).hexdigest()[:12]
        manifest = {
            "format": store.FORMAT_NAME, "format_version": store.FORMAT_VERSION,
            "index_version": version, "created_at": created, "corpus_checksum": checksum,
            "analyzer": analyzer.config.to_dict(), "bm25": params.to_dict(),
            "counts": {"articles": len(articles), "terms": len(all_terms),
                       "body_postings": int(b["docs"].size), "title_postings": int(t["docs"].size),
                       "avgdl": float(b["doc_len"].mean()) if len(articles) else 0.0,
                       "qualified_titles": sum(1 for s in split if s[1])},
            "build": build,
        }
        manifest["build"]["bytes_on_disk"] = store.folder_size(tmp)
        store.write_json(tmp / store.MANIFEST, manifest)  # written last: its presence marks a whole index
    return load_index(out)


def _resolve_settings(analyzer: Analyzer | AnalyzerConfig | Mapping[str, Any] | None,
                      params: bm25.BM25Params | Mapping[str, Any] | None,
                      options: dict[str, Any]) -> tuple[Analyzer, bm25.BM25Params]:
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
    **options: Any,
) -> Index:
    """Build an index folder from a corpus file or records; the old folder is replaced only on success.

    Options may name any AnalyzerConfig field (stemmer, stopwords, ...) or BM25Params
    field (k1, b, epsilon, idf, title_weight).
    """
    started = time.perf_counter()
    an, p = _resolve_settings(analyzer, params, dict(options))
    report = report if report is not None else ReadReport()
    if isinstance(corpus, str | Path):
        checksum = file_checksum(corpus) if Path(corpus).exists() else ""
        source: Any = corpus
    else:
        records = [a.to_record() if isinstance(a, Article) else dict(a) for a in corpus]
        checksum = hashlib.sha256(json.dumps(records, sort_keys=True, default=str).encode()).hexdigest()
        source = records
    articles: list[Article] = []
    body, title = _TermCounter(), _TermCounter()
    it = read_articles(source, skip_bad=skip_bad, report=report)
    for art in tqdm(it, desc="indexing", unit=" articles", disable=not progress, mininterval=0.5):
        articles.append(art)
        body.add(an.tokens(art.text))
        title.add(an.tokens(art.title))
    if not articles:
        raise CorpusError("the corpus has no valid articles", file=str(corpus) if isinstance(corpus, str | Path) else "")
    build = {"skipped_lines": report.skipped, "problems": report.problems[:5],
             "seconds": time.perf_counter() - started}
    return _write(Path(out_dir), articles, body, title, None, an, p, checksum, build)


def _existing_counts(index: Index, keep_rows: np.ndarray) -> tuple[sp.csr_matrix, list[str]]:
    """Doc-major term counts of some rows of an index (its body field), with the term names."""
    vocab = json.loads((index.path / store.VOCAB).read_text(encoding="utf-8"))
    n_postings = int(index.manifest["counts"]["body_postings"])
    body_tf = store.open_array(index.path, "body_tf", "int32", n_postings)
    tf = sp.csc_matrix((np.asarray(body_tf), np.asarray(index.body.docs), np.asarray(index.body.indptr)),
                       shape=(index.n_docs, index.n_terms)).tocsr()
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

    Existing articles keep their rows and counted terms (no re-analysis of their text);
    replaced ones keep their row, new ones go at the end, removed ones disappear.
    """
    started = time.perf_counter()
    old = load_index(index_dir)
    report = report if report is not None else ReadReport()
    missing = [d for d in remove if d not in old._row_by_id]
    if missing:
        raise CorpusError(f"cannot remove unknown article ids: {missing[:10]}")
    new_articles = list(read_articles(add, skip_bad=skip_bad, report=report)) if add else []
    new_by_id = {a.id: a for a in new_articles}
    removed = set(remove) - set(new_by_id)
    existing = list(old._store.articles())
    title_owner = {a.title: a.id for a in existing if a.id not in removed and a.id not in new_by_id}
    for a in new_articles:
        if title_owner.get(a.title, a.id) != a.id:
            raise CorpusError(f"title {a.title!r} already belongs to article {title_owner[a.title]!r}", field="title")
    keep = [r for r, a in enumerate(existing) if a.id not in removed and a.id not in new_by_id]
    body, title = _TermCounter(), _TermCounter()
    counts, vocab = _existing_counts(old, np.asarray(keep, dtype=np.int64))
    body.add_counts(counts, vocab)
    an = old.analyzer
    # Final order: old rows (replacements in place) then new articles.
    final: list[Article] = []
    source_pos: list[int] = []  # position of each final row in the order counts were added
    kept_pos = {r: i for i, r in enumerate(keep)}
    appended = 0
    for r, a in enumerate(existing):
        if a.id in removed:
            continue
        if a.id in new_by_id:
            final.append(new_by_id[a.id])
            source_pos.append(len(keep) + appended)
            body.add(an.tokens(new_by_id[a.id].text))
            appended += 1
        else:
            final.append(a)
            source_pos.append(kept_pos[r])
    old_ids = {a.id for a in existing}
    for a in tqdm(new_articles, desc="adding", unit=" articles", disable=not progress):
        if a.id not in old_ids:
            final.append(a)
            source_pos.append(len(keep) + appended)
            body.add(an.tokens(a.text))
            appended += 1
    for a in final:
        title.add(an.tokens(a.title))
    order = np.asarray(source_pos, dtype=np.int64)
    if not final:
        raise CorpusError("removing these articles would leave the index empty")
    checksum = hashlib.sha256(json.dumps(
        [old.manifest["corpus_checksum"], sorted(remove), [a.to_record() for a in new_articles]],
        sort_keys=True, default=str).encode()).hexdigest()
    build = {"skipped_lines": report.skipped, "problems": report.problems[:5], "updated_from": old.version,
             "added": sum(1 for a in new_articles if a.id not in old_ids),
             "replaced": sum(1 for a in new_articles if a.id in old_ids), "removed": len(removed),
             "seconds": time.perf_counter() - started}
    params = old.params
    del old  # release the memory maps before the folder is swapped
    return _write(Path(index_dir), final, body, title, order, an, params, checksum, build)
