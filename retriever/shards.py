"""Build one index as several shards, on a Ray cluster or in this process, equal to one build.

Pass 1 counts contiguous ranges of the corpus's items (lines or rows), one per shard, as a
Ray Data job on a cluster (the ranges a dataset, counted by map_batches workers) and in order
here without one (retriever/shardcount.py): each field's document frequencies, token totals
and article count, plus the names links resolve to (ids, titles, aliases) and the links. The
driver reduces them to the corpus's sorted vocabulary, document frequencies, lengths and
in-links, the figures a single build computes, and writes the statistics with a SHA-256
checksum. Pass 2 writes every shard as an ordinary index folder with the builder's own code
(`build.write_folder`), given those statistics, so each posting weight equals the single
build's bit for bit; a top manifest lists the shards (retriever/sharded.py reads it and
merges searches).

Ray is optional, imported only by retriever/cluster.py and only when asked for: without it
the same functions run one after the other in this process. On a cluster of several machines the
output folder must be on storage every node sees (the tasks write the shards there).
Word vectors (pass 3) are trained once in the driver over every shard's stored articles,
then each shard task writes its articles' vectors (retriever/shardvectors.py). For an
uncompressed JSON-lines corpus the driver finds every item's byte offset up front, so each
task reads only its own byte range; other formats are read from the start and skipped.
"""

from __future__ import annotations

import hashlib
import json
import time
from collections.abc import Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from . import bm25, columns, sharded, shardvectors, store
from . import vectors as vecs
from .analyzer import Analyzer, AnalyzerConfig
from .cluster import Runner
from .corpus import CorpusError, ReadReport, file_checksum
from .counting import no_gc
from .errors import IndexFormatError
from .folderwriter import KnownLinks, index_version, write_folder
from .ingest import ingest
from .postings import CorpusStats, FieldStats
from .rawitems import count_items, item_offsets
from .shardcount import (
    ShardCounts,
    _NoBar,
    _windows,
    count_ranges,
    join_keys,
    reduce_stats,
    resolve_links,
    split_items,
)

STATS_FOLDER = "corpus_stats"


def _stats_digest(stats: CorpusStats) -> str:
    h = hashlib.sha256()
    h.update(json.dumps([stats.body.n_docs, stats.body.total_len, stats.title.total_len]).encode())
    h.update("\n".join(stats.terms).encode("utf-8"))
    for df in (stats.body.df, stats.title.df):
        h.update(np.ascontiguousarray(df, dtype="<i8").tobytes())
    return h.hexdigest()


def _ids_digest(ids: Sequence[str]) -> str:
    return hashlib.sha256("\n".join(ids).encode("utf-8")).hexdigest()


def shard_entry(
    number: int, part: ShardCounts, first_row: int, stats_sha256: str
) -> dict[str, Any]:
    """What pass 2 needs to know of a shard, and its shard manifest records."""
    return {
        "number": number,
        "first_row": first_row,
        "articles": len(part.keys),
        "items": [part.start, part.stop],
        "stats_sha256": stats_sha256,
        "ids_sha256": _ids_digest(part.keys.ids),
    }


def write_stats(folder: Path, stats: CorpusStats) -> str:
    """Write the corpus statistics into `folder`; returns their SHA-256."""
    folder.mkdir(parents=True, exist_ok=True)
    columns.write_vocab(folder, stats.terms)
    store.save_array(folder, "body_df", stats.body.df.astype(np.int64))
    store.save_array(folder, "title_df", stats.title.df.astype(np.int64))
    digest = _stats_digest(stats)
    info = {
        "articles": stats.body.n_docs,
        "terms": len(stats.terms),
        "body_length": stats.body.total_len,
        "title_length": stats.title.total_len,
        "sha256": digest,
    }
    store.write_json(folder / "stats.json", info)
    return digest


def read_stats(folder: Path, sha256: str) -> CorpusStats:
    """The statistics `write_stats` wrote, refused unless their checksum is `sha256`."""
    try:
        info = json.loads((folder / "stats.json").read_text(encoding="utf-8"))
        n_terms, n = int(info["terms"]), int(info["articles"])
        terms = columns.Vocab(folder, n_terms).terms.tolist()
        body = np.array(store.open_array(folder, "body_df", "int64", n_terms))
        title = np.array(store.open_array(folder, "title_df", "int64", n_terms))
        stats = CorpusStats(
            terms,
            FieldStats(body, n, int(info["body_length"])),
            FieldStats(title, n, int(info["title_length"])),
        )
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise IndexFormatError(f"{folder}: the corpus statistics are unreadable ({exc})") from exc
    if _stats_digest(stats) != sha256:
        raise IndexFormatError(f"{folder}: the corpus statistics do not match their checksum")
    return stats


def write_shard(
    corpus: str,
    span: tuple[int, int],
    settings: dict[str, Any],
    stats_dir: str,
    known: KnownLinks,
    shard: dict[str, Any],
    folder: str,
    window: tuple[int, int, int] | None = None,
) -> int:
    """Pass 2: write items span[0]..span[1] as an index folder weighted with the corpus's
    statistics (checked against their checksum); returns its article count."""
    started = time.perf_counter()
    stats = read_stats(Path(stats_dir), shard["stats_sha256"])
    an = Analyzer(AnalyzerConfig.from_dict(settings["analyzer"]))
    params = bm25.BM25Params(**settings["bm25"])
    out = Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    report = ReadReport()
    with no_gc():
        with store.open_store(out) as fh:
            state = ingest(
                corpus,
                an,
                fh,
                workers=1,
                skip_bad=settings["skip_bad"],
                report=report,
                bar=_NoBar(),
                items=span,
                window=window,
            )
        if _ids_digest(state.keys.ids) != shard["ids_sha256"]:
            raise CorpusError(
                "the corpus changed while it was being indexed; build again", file=corpus
            )
        store.save_array(out, store.STORE_OFFSETS, state.store_offsets())
        build = {"skipped_lines": report.skipped, "problems": report.problems[:5], "workers": 1}
        write_folder(
            out,
            state.keys,
            state.counter,
            None,
            an,
            params,
            settings["checksum"],
            build,
            started,
            stats=stats,
            known=known,
            shard=shard,
            metadata=state.metadata,
        )
    return len(state.keys)


def build_sharded(
    corpus: str | Path,
    out_dir: str | Path,
    *,
    shards: int | None = None,
    spans: Sequence[tuple[int, int]] | None = None,
    ray_address: str | None = None,
    analyzer: AnalyzerConfig | None = None,
    params: bm25.BM25Params | None = None,
    skip_bad: bool = False,
    vectors: Any = True,
    progress: bool = False,
) -> Path:
    """Build `corpus` (a file) into `out_dir` as shards whose searches equal one index's.

    shards: how many near-equal contiguous ranges of items; or `spans`, the (start, stop)
    item ranges themselves (contiguous, from 0 to the end). ray_address: None (this
    process), 'local' (start Ray here unless it runs already) or a cluster's address.
    vectors: as `build_index`'s: word vectors trained once over the whole corpus (in this
    process), article vectors written by each shard (retriever/shardvectors.py).
    Returns the folder, which `load_index(out_dir, sharded=True)` opens.
    """
    vec_settings = vecs.resolve_settings(vectors)
    started = time.perf_counter()
    path = Path(corpus).resolve()
    if not path.is_file():
        raise CorpusError("no such corpus file", file=str(corpus))
    offsets = item_offsets(path)
    n_items = count_items(path) if offsets is None else offsets[0].size - 1
    if spans is None:
        spans = split_items(n_items, shards if shards is not None else 1)
    else:
        ends = [s for span in spans for s in span]
        if (
            not spans
            or ends[0] != 0
            or ends[-1] != n_items
            or ends != sorted(ends)
            or any(ends[i] != ends[i + 1] for i in range(1, len(ends) - 1, 2))
        ):
            raise ValueError(f"spans must cover items 0..{n_items} contiguously: {list(spans)}")
    an = analyzer if analyzer is not None else AnalyzerConfig()
    p = params if params is not None else bm25.BM25Params()
    checksum = file_checksum(path)
    runner = Runner(ray_address)
    try:
        with store.atomic_folder(Path(out_dir)) as tmp:
            windows = _windows(offsets, spans)
            counted, pass1 = count_ranges(runner, str(path), spans, windows, an.to_dict(), skip_bad)
            parts = [pt for pt in counted if len(pt.keys)]
            if not parts:
                raise CorpusError("the corpus has no valid articles", file=str(corpus))
            keys = join_keys(str(path), parts)
            stats = reduce_stats(parts)
            links = resolve_links(keys, parts)
            digest = write_stats(tmp / STATS_FOLDER, stats)
            settings = {
                "analyzer": an.to_dict(),
                "bm25": p.to_dict(),
                "skip_bad": skip_bad,
                "checksum": checksum,
            }
            entries, writes, first = [], [], 0
            window_of = {tuple(s): w for s, w in zip(spans, windows, strict=True)}
            for i, (part, known) in enumerate(zip(parts, links, strict=True)):
                name = f"shard-{i:03d}"
                shard = shard_entry(i, part, first, digest)
                writes.append(
                    (
                        str(path),
                        (part.start, part.stop),
                        settings,
                        str(tmp / STATS_FOLDER),
                        known,
                        shard,
                        str(tmp / name),
                        window_of[(part.start, part.stop)],
                    )
                )
                entries.append({"folder": name, "first_row": first, "articles": len(part.keys)})
                first += len(part.keys)
            runner.map(write_shard, writes)
            words = None
            if vec_settings is not None:
                folders = [(tmp / f"shard-{i:03d}", len(pt.keys)) for i, pt in enumerate(parts)]
                words = shardvectors.train_over_shards(
                    tmp, folders, Analyzer(an), vec_settings, stats, progress
                )
                words_dir = str(tmp / shardvectors.WORDS_FOLDER)
                runner.map(
                    shardvectors.write_shard_vectors,
                    [(str(folder), words_dir, words) for folder, _ in folders],
                )
            sharded.write_manifest(
                tmp,
                {
                    "index_version": index_version(checksum + f"/shards={len(parts)}", p, an),
                    "created_at": datetime.now(UTC).isoformat(timespec="seconds"),
                    "corpus_checksum": checksum,
                    "analyzer": an.to_dict(),
                    "bm25": p.to_dict(),
                    "articles": first,
                    "shards": entries,
                    "stats": {"folder": STATS_FOLDER, "sha256": digest},
                    "vectors": words,
                    "build": {
                        "corpus": str(path),
                        "skipped_lines": sum(pt.skipped for pt in parts),
                        "ray": ray_address or "",
                        "pass1": pass1,
                        "read": "byte ranges" if offsets is not None else "items from the start",
                        "seconds": round(time.perf_counter() - started, 3),
                    },
                },
            )
    finally:
        runner.close()
    return Path(out_dir)
