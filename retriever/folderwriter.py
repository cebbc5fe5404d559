"""Everything of an index folder but the article store: the key columns and in-links, the
postings with their weights and bounds, the vocabulary, and last the manifest.

Used by a whole build and an update (retriever/build.py) and by each shard of a sharded
build (retriever/shards.py), so every folder is written by the same code.
"""

from __future__ import annotations

import hashlib
import json
import time
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from . import bm25, bounds, columns, metacolumns, store
from .analyzer import Analyzer, AnalyzerConfig
from .corpus import split_title
from .counting import TermCounter
from .ingest import Keys
from .links import NameResolver, count_inlinks
from .postings import CorpusStats, FieldCounts, term_major, weight_dtype


@dataclass(frozen=True)
class KnownLinks:
    """In-links resolved over a whole corpus, for a shard of it: the shard's rows' in-link
    counts, its unresolved (id, link) pairs and the corpus's count of ambiguous aliases."""

    inlinks: np.ndarray
    unresolved: list[tuple[str, str]]
    ambiguous: int


def _write_keys(
    tmp: Path,
    keys: Keys,
    known: KnownLinks | None = None,
    metadata: Sequence[dict[str, Any]] | None = None,
) -> tuple[int, int, int]:
    """In-links and the key columns; returns (unresolved links, ambiguous aliases,
    qualified titles). `known`: in-links already resolved over the whole corpus;
    `metadata`: every article's metadata in row order (else read back from the store)."""
    if known is None:
        resolver = NameResolver(keys.ids, keys.titles, keys.aliases)
        inlinks, missing = count_inlinks(resolver, keys.links, len(keys))
        unresolved = [(keys.ids[row], name) for row, name in missing]
        ambiguous = len(resolver.ambiguous_aliases)
    else:
        inlinks, unresolved, ambiguous = known.inlinks, known.unresolved, known.ambiguous
    store.write_unresolved(tmp, unresolved)
    store.save_array(tmp, "inlinks", inlinks.astype(np.int32))
    store.save_array(tmp, "popularity", np.asarray(keys.popularity, dtype=np.float64))
    split = [split_title(title) for title in keys.titles]
    columns.write_strings(tmp, "ids", keys.ids, sort_index=True)
    columns.write_strings(tmp, "titles", keys.titles)
    columns.write_strings(tmp, "bases", (s[0] for s in split))
    columns.write_strings(tmp, "qualifiers", (s[1] for s in split))
    columns.write_strings(tmp, "aliases", (columns.JsonListColumn.encode(a) for a in keys.aliases))
    if metadata is None:
        # The store is in `tmp` already (every caller writes it first): its metadata.
        reader = store.StoreReader(tmp, len(keys))
        metadata = [a.metadata for a in reader.articles()]
    metacolumns.write_meta_columns(tmp, metadata)
    return len(unresolved), ambiguous, sum(1 for s in split if s[1])


def write_folder(
    tmp: Path,
    keys: Keys,
    counter: TermCounter,
    body_order: np.ndarray | None,
    analyzer: Analyzer,
    params: bm25.BM25Params,
    checksum: str,
    build: dict[str, Any],
    started: float,
    *,
    stats: CorpusStats | None = None,
    known: KnownLinks | None = None,
    shard: dict[str, Any] | None = None,
    metadata: Sequence[dict[str, Any]] | None = None,
) -> None:
    """Write everything but the article store into the temporary index folder `tmp`.

    For one shard of a bigger corpus (retriever/shards.py): `stats` (the corpus's vocabulary,
    document frequencies and lengths), `known` (its in-links) and `shard` (where the rows
    sit, for the manifest); the weights are then those the whole corpus's build gives.
    `metadata`: the articles' metadata in row order, when the caller has it (else the
    metadata columns are written from the store in `tmp`).
    """
    # The key columns and in-links are plain Python work; the postings are numpy and scipy
    # loops that release the GIL, so the two run side by side.
    with ThreadPoolExecutor(1, thread_name_prefix="hunchwise-keys") as pool:
        keys_job = pool.submit(_write_keys, tmp, keys, known, metadata)
        # `body_order[i]` is the counted row that becomes row i (updates count rows out of
        # order).
        vocab = stats.terms if stats is not None else None
        all_terms, (tf_body, tf_title), (fwd_indptr, fwd_terms) = term_major(
            counter, body_order, vocab
        )
        store.save_array(tmp, "body_fwd_indptr", fwd_indptr)
        store.save_array(tmp, "body_fwd_terms", fwd_terms)
        del fwd_indptr, fwd_terms
        body = FieldCounts(tf_body, params, stats.body if stats is not None else None)
        title = FieldCounts(tf_title, params, stats.title if stats is not None else None)
        del tf_body, tf_title
        dtype = weight_dtype(body.idf, title.idf)
        for prefix, fld in (("body", body), ("title", title)):
            weights = fld.weights(params, dtype)
            fld.save(tmp, prefix, weights)
            bounds.save(tmp, prefix, fld.tf.indptr, weights)
            del weights
        store.save_array(tmp, "title_len", title.doc_len.astype(np.int32))
        store.save_array(tmp, "doc_len", body.doc_len.astype(np.int32))
        body_postings, title_postings = int(body.tf.nnz), int(title.tf.nnz)
        avgdl = body.avgdl
        del body, title
        columns.write_vocab(tmp, all_terms)
        unresolved, ambiguous, qualified = keys_job.result()
    n_articles = len(keys)
    build_info = {
        **build,
        "unresolved_links": unresolved,
        "ambiguous_aliases": ambiguous,
        "seconds": round(time.perf_counter() - started, 3),
    }
    created = datetime.now(UTC).isoformat(timespec="seconds")
    version = index_version(checksum, params, analyzer.config)
    manifest = {
        "format": store.FORMAT_NAME,
        "format_version": store.FORMAT_VERSION,
        "index_version": version,
        "created_at": created,
        "corpus_checksum": checksum,
        "analyzer": analyzer.config.to_dict(),
        "bm25": params.to_dict(),
        "counts": {
            "articles": n_articles,
            "terms": len(all_terms),
            "body_postings": body_postings,
            "title_postings": title_postings,
            "avgdl": avgdl,
            "qualified_titles": qualified,
            "unresolved_links": unresolved,
        },
        "weights": np.dtype(dtype).name,
        "build": build_info,
    }
    if shard is not None:
        manifest["shard"] = shard
    build_info["bytes_on_disk"] = store.folder_size(tmp)
    # Written last: its presence marks a whole index.
    store.write_json(tmp / store.MANIFEST, manifest)


def index_version(checksum: str, params: bm25.BM25Params, analyzer: AnalyzerConfig) -> str:
    """Short identifier of an index's content and parameters (its manifest's index_version)."""
    stamp = [checksum, params.to_dict(), analyzer.to_dict()]
    return hashlib.sha256(json.dumps(stamp, sort_keys=True).encode()).hexdigest()[:12]
