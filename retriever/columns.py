"""Memory-mapped string columns and the term vocabulary of an index folder.

Ids, titles and terms are stored as one UTF-8 blob per column plus an offsets array, so
opening an index parses nothing: a million-article index opens in milliseconds and worker
processes share the pages. Written by hand because numpy has no variable-length string
array that memory-maps; each piece is a few lines over numpy.
"""

from __future__ import annotations

import bisect
import itertools
import json
import mmap
from collections.abc import Iterable, Iterator, Sequence
from pathlib import Path
from typing import overload

import numpy as np

from .errors import IndexFormatError
from .npymap import map_npy

# Terms up to this many UTF-8 bytes live in a fixed-width sorted array searched in C; longer
# ones (rare: URLs, chemical names) in a small dict. 32 covers ordinary words with room.
MAX_KEY_BYTES = 32
_CACHE_LIMIT = 200_000  # remembered token lookups per open index (~20 MB at most)


def _paths(folder: Path, name: str) -> tuple[Path, Path]:
    return folder / f"{name}.bin", folder / f"{name}_offsets.npy"


def write_strings(
    folder: Path, name: str, values: Iterable[str], *, sort_index: bool = False
) -> int:
    """Write a string column (`name.bin` + `name_offsets.npy`); returns how many strings.

    With `sort_index`, also writes `name_order.npy` (rows in sorted order of their values)
    so that `StringColumn.find` is a binary search.
    """
    strings = list(values)
    data, lens = encode_strings(strings)
    offsets = np.zeros(len(strings) + 1, dtype=np.int64)
    np.cumsum(lens, out=offsets[1:])
    blob, offs = _paths(folder, name)
    with open(blob, "wb") as fh:
        fh.write(data)
    np.save(offs, offsets, allow_pickle=False)
    if sort_index:
        # Code point order is UTF-8 byte order, so the strings sort as their bytes would.
        order = sorted(range(len(strings)), key=strings.__getitem__)
        np.save(folder / f"{name}_order.npy", np.asarray(order, dtype=np.int64), allow_pickle=False)
    return len(strings)


def encode_strings(strings: Sequence[str]) -> tuple[bytes, np.ndarray]:
    """The UTF-8 bytes of `strings` back to back, and each one's length in bytes (int64).

    All-ASCII lists (most ids, titles and terms) are encoded in one piece: a character is
    then one byte, so the lengths are the strings' own.
    """
    data = "".join(strings).encode("utf-8")
    lens = np.fromiter(map(len, strings), np.int64, len(strings))
    if len(data) != int(lens.sum()):  # some character took more than one byte
        encoded = [s.encode("utf-8") for s in strings]
        data = b"".join(encoded)
        lens = np.fromiter(map(len, encoded), np.int64, len(encoded))
    return data, lens


class StringColumn(Sequence[str]):
    """Read-only strings by row from a memory-mapped blob (list-like: index, slice, iterate)."""

    def __init__(self, folder: Path, name: str, length: int) -> None:
        from . import store  # store imports this module

        blob, _ = _paths(folder, name)
        self._offsets = store.open_array(folder, f"{name}_offsets", "int64", length + 1)
        if not blob.exists():
            raise IndexFormatError(f"{folder}: {blob.name} is missing; rebuild the index")
        size = blob.stat().st_size
        if size != int(self._offsets[-1]):
            raise IndexFormatError(
                f"{folder}: {blob.name} is {size} bytes, expected {int(self._offsets[-1])}; "
                "the index is damaged, rebuild it"
            )
        self._bytes: mmap.mmap | bytes = b""
        if size:
            with open(blob, "rb") as fh:
                self._bytes = mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ)
        self._len = length
        order_path = folder / f"{name}_order.npy"
        self._order = (
            store.open_array(folder, f"{name}_order", "int64", length)
            if order_path.exists()
            else None
        )

    def __len__(self) -> int:
        return self._len

    def _at(self, row: int) -> str:
        start, end = self._offsets[row : row + 2].tolist()
        return self._bytes[start:end].decode("utf-8")

    @overload
    def __getitem__(self, row: int) -> str: ...
    @overload
    def __getitem__(self, row: slice) -> list[str]: ...
    def __getitem__(self, row: int | slice) -> str | list[str]:
        if isinstance(row, slice):
            return [self._at(r) for r in range(*row.indices(self._len))]
        r = int(row)
        if r < 0:
            r += self._len
        if not 0 <= r < self._len:
            raise IndexError(f"row {row} out of range for {self._len} strings")
        return self._at(r)

    def __iter__(self) -> Iterator[str]:
        data = self._bytes[:]
        offs = self._offsets.tolist()
        for start, end in itertools.pairwise(offs):
            yield data[start:end].decode("utf-8")

    def take(self, rows: np.ndarray) -> list[str]:
        """The strings of several rows at once (one offsets gather instead of one per row)."""
        rows = np.asarray(rows, dtype=np.int64)
        if rows.size and (int(rows.min()) < 0 or int(rows.max()) >= self._len):
            raise IndexError(f"rows out of range for {self._len} strings")
        data = self._bytes
        starts = self._offsets[rows].tolist()
        ends = self._offsets[rows + 1].tolist()
        return [data[a:b].decode("utf-8") for a, b in zip(starts, ends, strict=True)]

    def tolist(self) -> list[str]:
        """Every string, decoded."""
        return list(self)

    def find(self, value: str) -> int | None:
        """Row holding `value` (binary search; needs the sorted order written at build)."""
        if self._order is None:
            for r, v in enumerate(self):
                if v == value:
                    return r
            return None
        order = self._order
        key = value.encode("utf-8")

        def at(i: int) -> bytes:
            start, end = self._offsets[order[i] : order[i] + 2].tolist()
            return self._bytes[start:end]

        pos = bisect.bisect_left(range(self._len), key, key=at)
        if pos < self._len and at(pos) == key:
            return int(order[pos])
        return None

    def __contains__(self, value: object) -> bool:
        return isinstance(value, str) and self.find(value) is not None


class JsonListColumn(Sequence[list[str]]):
    """A column of string lists (aliases), one JSON array per row; '' stands for []."""

    def __init__(self, strings: StringColumn) -> None:
        self._strings = strings

    def __len__(self) -> int:
        return len(self._strings)

    @staticmethod
    def encode(values: Sequence[str]) -> str:
        """Row form of one list."""
        return json.dumps(list(values), ensure_ascii=False) if values else ""

    @staticmethod
    def _decode(text: str) -> list[str]:
        return json.loads(text) if text else []

    @overload
    def __getitem__(self, row: int) -> list[str]: ...
    @overload
    def __getitem__(self, row: slice) -> list[list[str]]: ...
    def __getitem__(self, row: int | slice) -> list[str] | list[list[str]]:
        if isinstance(row, slice):
            return [self._decode(t) for t in self._strings[row]]
        return self._decode(self._strings[row])

    def __iter__(self) -> Iterator[list[str]]:
        for text in self._strings:
            yield self._decode(text)

    def take(self, rows: np.ndarray) -> list[list[str]]:
        """The lists of several rows at once (see StringColumn.take)."""
        return [self._decode(t) for t in self._strings.take(rows)]


def write_vocab(folder: Path, terms: Sequence[str]) -> None:
    """Write the vocabulary: term names by id, plus the lookup arrays `Vocab` searches.

    `terms` must be sorted (code point order, which is also UTF-8 byte order), so the
    fixed-width keys come out sorted without another sort.
    """
    write_strings(folder, "terms", terms)
    encoded = [t.encode("utf-8") for t in terms]
    short = [i for i, e in enumerate(encoded) if len(e) <= MAX_KEY_BYTES]
    width = max((len(encoded[i]) for i in short), default=1)
    keys = np.array([encoded[i] for i in short], dtype=f"S{width}")
    if keys.size > 1 and not bool(np.all(keys[1:] > keys[:-1])):
        raise ValueError("write_vocab needs distinct terms in sorted order")
    np.save(folder / "vocab_keys.npy", keys, allow_pickle=False)
    np.save(folder / "vocab_ids.npy", np.asarray(short, dtype=np.int32), allow_pickle=False)
    long_terms = {terms[i]: i for i, e in enumerate(encoded) if len(e) > MAX_KEY_BYTES}
    (folder / "vocab_long.json").write_text(json.dumps(long_terms, ensure_ascii=False), "utf-8")


class Vocab:
    """Term -> id lookup without building a Python dict of the whole vocabulary."""

    def __init__(self, folder: Path, n_terms: int) -> None:
        from . import store

        self.terms = StringColumn(folder, "terms", n_terms)
        keys_path = folder / "vocab_keys.npy"
        if not keys_path.exists():
            raise IndexFormatError(f"{folder}: vocab_keys.npy is missing; rebuild the index")
        try:
            self._keys = map_npy(keys_path)
        except (ValueError, OSError, EOFError) as exc:
            raise IndexFormatError(f"{folder}: vocab_keys.npy is corrupt ({exc}); rebuild") from exc
        if self._keys.dtype.kind != "S" or self._keys.ndim != 1:
            raise IndexFormatError(f"{folder}: vocab_keys.npy has the wrong type; rebuild")
        self._keys = np.asarray(self._keys)
        self._ids = store.open_array(folder, "vocab_ids", "int32", self._keys.shape[0])
        try:
            self._long: dict[str, int] = json.loads((folder / "vocab_long.json").read_text("utf-8"))
        except (OSError, ValueError) as exc:
            raise IndexFormatError(f"{folder}: vocab_long.json is unreadable; rebuild") from exc
        if self._keys.shape[0] + len(self._long) != n_terms:
            raise IndexFormatError(
                f"{folder}: the vocabulary holds {self._keys.shape[0] + len(self._long)} terms, "
                f"the manifest says {n_terms}; rebuild the index"
            )
        self._width = self._keys.dtype.itemsize
        self._cache: dict[str, int] = {}

    def __len__(self) -> int:
        return len(self.terms)

    def lookup(self, tokens: Sequence[str]) -> np.ndarray:
        """Term id of each token, -1 where unknown. int64, shape (len(tokens),).

        Recently seen tokens come from a bounded dict; the rest from one vectorized binary
        search over the sorted keys (clue words repeat a lot, so most lookups are hits).
        """
        cache = self._cache
        found = [cache.get(t, -2) for t in tokens]
        if -2 in found:
            missing = [t for t, f in zip(tokens, found, strict=True) if f == -2]
            if len(cache) + len(missing) > _CACHE_LIMIT:
                cache.clear()
            for tok, tid in zip(missing, self._search(missing).tolist(), strict=True):
                cache[tok] = tid
            found = [cache[t] for t in tokens]
        return np.asarray(found, dtype=np.int64)

    def _search(self, tokens: Sequence[str]) -> np.ndarray:
        enc = [t.encode("utf-8") for t in tokens]
        out = np.full(len(enc), -1, dtype=np.int64)
        n_keys, width = self._keys.size, self._width
        if n_keys and enc:
            q = np.array(enc, dtype=self._keys.dtype)  # longer tokens get cut: checked below
            pos = np.searchsorted(self._keys, q)
            np.minimum(pos, n_keys - 1, out=pos)
            lengths = np.fromiter(map(len, enc), np.int64, len(enc))
            hit = (self._keys[pos] == q) & (lengths <= width)
            out[hit] = self._ids[pos[hit]]
        if self._long:
            for i, e in enumerate(enc):
                if len(e) > width:
                    out[i] = self._long.get(tokens[i], -1)
        return out

    def get(self, term: str) -> int | None:
        """Id of one term, or None."""
        tid = int(self.lookup([term])[0])
        return None if tid < 0 else tid
