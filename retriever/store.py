"""The index folder on disk: manifest, memory-mapped arrays, article store, atomic swaps."""

from __future__ import annotations

import contextlib
import ctypes
import json
import mmap
import os
import shutil
import uuid
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Any

import numpy as np

from . import atomicfile
from .corpus import Article, CorpusError, validate_record
from .errors import IndexFormatError
from .npymap import map_npy

FORMAT_NAME = "hunchwise-index"
FORMAT_VERSION = 3
# A folder of shards (retriever/shards.py writes it, retriever/sharded.py reads it): its
# manifest lists ordinary index folders holding contiguous rows of one corpus.
SHARDS_FORMAT = "hunchwise-shards"
MANIFEST = "manifest.json"
STORE = "store.jsonl"
STORE_OFFSETS = "store_offsets"


def write_json(path: Path, data: Any) -> None:
    """Write JSON to `path` through a temporary file and a rename: no reader sees half a file."""
    # dumps, not dump: only the one-shot encoder runs in C.
    atomicfile.write_text(path, json.dumps(data, ensure_ascii=False, separators=(",", ":")))


def save_array(folder: Path, name: str, array: np.ndarray) -> None:
    """Save one array as `name.npy` with pickling disabled."""
    np.save(folder / f"{name}.npy", np.ascontiguousarray(array), allow_pickle=False)


def open_array(folder: Path, name: str, dtype: str, length: int | None = None) -> np.ndarray:
    """Memory-map `name.npy` read-only and check its dtype and length."""
    path = folder / f"{name}.npy"
    if not path.exists():
        raise IndexFormatError(
            f"{folder}: the array file {path.name} is missing; rebuild the index"
        )
    try:
        arr = map_npy(path)
    except (ValueError, OSError, EOFError) as exc:
        raise IndexFormatError(
            f"{folder}: the array file {path.name} is corrupt ({exc}); rebuild the index"
        ) from exc
    if (
        arr.dtype != np.dtype(dtype)
        or arr.ndim != 1
        or (length is not None and arr.shape[0] != length)
    ):
        raise IndexFormatError(
            f"{folder}: {path.name} holds {arr.dtype} of shape {arr.shape}, expected {dtype} of "
            f"length {length}; the index is damaged, rebuild it"
        )
    return np.asarray(arr)  # plain ndarray view of the map: slicing a memmap subclass is slow


@contextlib.contextmanager
def open_store(folder: Path) -> Iterator[Any]:
    """The article store file of a folder being written, opened for appending bytes."""
    with open(folder / STORE, "wb") as fh:
        yield fh
        fh.flush()
        os.fsync(fh.fileno())


def record_line(art: Article) -> bytes:
    """One article as a line of the store."""
    return json.dumps(art.to_record(), ensure_ascii=False, separators=(",", ":")).encode() + b"\n"


def write_store(folder: Path, articles: Iterable[Article]) -> int:
    """Write the article store (one JSON line each) and its byte offsets; returns the count."""
    offsets = [0]
    with open(folder / STORE, "wb") as fh:
        for art in articles:
            line = record_line(art)
            fh.write(line)
            offsets.append(offsets[-1] + len(line))
        fh.flush()
        os.fsync(fh.fileno())
    save_array(folder, STORE_OFFSETS, np.asarray(offsets, dtype=np.int64))
    return len(offsets) - 1


class StoreReader:
    """Random access to stored articles by row, through a read-only memory map."""

    def __init__(self, folder: Path, n_docs: int) -> None:
        self._offsets = open_array(folder, STORE_OFFSETS, "int64", n_docs + 1)
        path = folder / STORE
        if not path.exists():
            raise IndexFormatError(
                f"{folder}: the article store {STORE} is missing; rebuild the index"
            )
        size = path.stat().st_size
        if size != int(self._offsets[-1]):
            raise IndexFormatError(
                f"{folder}: {STORE} is {size} bytes, expected {int(self._offsets[-1])}; rebuild"
            )
        with open(path, "rb") as fh:
            self._map = mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ) if size else None

    def _raw(self, row: int) -> Any:
        if self._map is None:
            raise IndexFormatError("the article store is empty")
        start, end = int(self._offsets[row]), int(self._offsets[row + 1])
        return json.loads(self._map[start:end])

    def article(self, row: int) -> Article:
        """The stored article of one row (lines are kept as the corpus gave them and
        validated again on the way out, which costs microseconds and no build time)."""
        try:
            return validate_record(self._raw(row), file=STORE, line=row + 1)
        except CorpusError as exc:
            raise IndexFormatError(f"the article store is damaged: {exc}; rebuild") from exc

    def record(self, row: int) -> dict[str, Any]:
        """The stored record of one row, in the corpus file's shape with every field present."""
        return self.article(row).to_record()

    def articles(self) -> Iterator[Article]:
        """Every stored article in row order."""
        for row in range(len(self._offsets) - 1):
            yield self.article(row)


UNRESOLVED = "unresolved_links.jsonl"


def write_unresolved(folder: Path, links: Iterable[tuple[str, str]]) -> None:
    """The links that matched no article: one JSON line {"from": id, "link": text} each."""
    # json.dumps({"from": src, "link": name}, ensure_ascii=False) spelled out with the
    # encoder's own string function: the same text at a third of the cost.
    enc = json.encoder.encode_basestring
    lines = [f'{{"from": {enc(src)}, "link": {enc(name)}}}\n' for src, name in links]
    atomicfile.write_text(folder / UNRESOLVED, "".join(lines))


def read_unresolved(folder: Path) -> list[tuple[str, str]]:
    """The (article id, link text) pairs `write_unresolved` stored, in article order."""
    path = folder / UNRESOLVED
    if not path.exists():
        raise IndexFormatError(
            f"{folder}: this index was built before unresolved links were listed; "
            "rebuild it to see them"
        )
    out = []
    for line in path.read_text(encoding="utf-8").splitlines():
        rec = json.loads(line)
        out.append((str(rec["from"]), str(rec["link"])))
    return out


def read_manifest(folder: Path) -> dict[str, Any]:
    """Read and check the manifest of an index folder."""
    if folder.exists() and not folder.is_dir():
        raise IndexFormatError(
            f"{folder}: this is a file, not an index folder; give the folder that "
            "'hunchwise index build --out' wrote"
        )
    if not folder.is_dir():
        raise IndexFormatError(
            f"{folder}: no such index folder; build one with 'hunchwise index build'"
        )
    path = folder / MANIFEST
    if not path.exists():
        raise IndexFormatError(
            f"{folder}: not a hunchwise index (no {MANIFEST}); "
            "build one with 'hunchwise index build'"
        )
    try:
        manifest: dict[str, Any] = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise IndexFormatError(
            f"{path}: the manifest is not valid JSON; rebuild the index"
        ) from exc
    if isinstance(manifest, dict) and manifest.get("format") == SHARDS_FORMAT:
        raise IndexFormatError(
            f"{folder}: this folder holds an index built in {len(manifest.get('shards', []))} "
            "shards: search, index info, rank, features export, train, evaluate and serve --ray "
            "read it; this needs an index built without --shards"
        )
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT_NAME:
        raise IndexFormatError(f"{folder}: {MANIFEST} does not describe a hunchwise index")
    version = manifest.get("format_version")
    if version != FORMAT_VERSION:
        raise IndexFormatError(
            f"{folder}: index format version {version} is not supported by this hunchwise "
            f"(it reads version {FORMAT_VERSION}); rebuild the index with this version"
        )
    return manifest


def is_sharded(folder: Path) -> bool:
    """True when `folder` holds a sharded index (its manifest says so)."""
    try:
        data = json.loads((folder / MANIFEST).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(data, dict) and data.get("format") == SHARDS_FORMAT


_RENAME_EXCHANGE = 2


def _exchange(a: Path, b: Path) -> bool:
    """Atomically swap two paths with renameat2(RENAME_EXCHANGE); False where unsupported."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        renameat2 = libc.renameat2
    except (OSError, AttributeError):
        return False
    at_fdcwd = -100
    rc = renameat2(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), _RENAME_EXCHANGE)
    return rc == 0


@contextlib.contextmanager
def atomic_folder(target: Path) -> Iterator[Path]:
    """Yield a temporary sibling folder; on success it replaces `target` in one step.

    A crash before the swap leaves `target` exactly as it was (the temporary folder
    is left behind with a name starting with '.', and is cleaned up by the next write).
    """
    target = target.resolve()
    if target.exists() and not target.is_dir():
        raise IndexFormatError(
            f"{target} is a file, not a folder; an index is a folder: choose a new name "
            "or an existing index folder to replace"
        )
    target.parent.mkdir(parents=True, exist_ok=True)
    for stale in target.parent.glob(f".{target.name}.building-*"):
        shutil.rmtree(stale, ignore_errors=True)
    tmp = target.parent / f".{target.name}.building-{uuid.uuid4().hex[:8]}"
    tmp.mkdir()
    try:
        yield tmp
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    if target.exists():
        if not (target / MANIFEST).exists() and any(target.iterdir()):
            shutil.rmtree(tmp, ignore_errors=True)
            raise IndexFormatError(
                f"{target} exists and is not a hunchwise index; refusing to replace it"
            )
        if _exchange(tmp, target):
            shutil.rmtree(tmp, ignore_errors=True)  # tmp now holds the old index
            return
        old = target.parent / f".{target.name}.old-{uuid.uuid4().hex[:8]}"
        os.rename(target, old)
        os.rename(tmp, target)
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.rename(tmp, target)


def folder_size(folder: Path) -> int:
    """Bytes of the files in a folder and its subfolders (a sharded index's shards, an
    index's vector generations)."""
    return sum(p.stat().st_size for p in folder.rglob("*") if p.is_file())
