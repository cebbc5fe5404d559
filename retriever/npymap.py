"""Memory-map a `.npy` file read-only without numpy's header parser.

`np.load(path, mmap_mode="r")` reads the header (a Python dict literal such as
`{'descr': '<i8', 'fortran_order': False, 'shape': (100001,), }`) with `ast.literal_eval`.
CPython 3.11 up to 3.11.7 keeps the AST builder's recursion counter in state shared by all
threads, so two threads building ASTs at once can make either fail with "SystemError: AST
constructor recursion depth mismatch" (CPython issue 106905). A server reloads its index in
a background thread while other threads run, so opening an index must not parse Python
source. numpy writes these headers in one fixed shape (numpy/lib/format.py), which a regular
expression reads; any other header (a structured dtype, say) goes to np.load under a lock,
which at least keeps this process's own parses apart.
"""

from __future__ import annotations

import re
import threading
from pathlib import Path

import numpy as np

_MAGIC = b"\x93NUMPY"
# What numpy's _write_array_header writes: the keys sorted, a plain dtype string, a tuple.
_HEADER = re.compile(
    r"""\{'descr':\s*'(?P<descr>[<>|=]?[a-zA-Z]\d*)',\s*"""
    r"""'fortran_order':\s*(?P<fortran>True|False),\s*"""
    r"""'shape':\s*\((?P<shape>[\d,\s]*)\),?\s*\}\s*$"""
)
_fallback_lock = threading.Lock()


def _header(path: Path) -> tuple[np.dtype, bool, tuple[int, ...], int] | None:
    """(dtype, Fortran order, shape, data offset) from the header; None when not plain."""
    with open(path, "rb") as fh:
        start = fh.read(10)
        if len(start) < 10 or not start.startswith(_MAGIC):
            raise ValueError(f"{path.name} is not a .npy file (no NUMPY magic string)")
        major = start[6]
        if major == 1:
            size, offset = int.from_bytes(start[8:10], "little"), 10
        elif major in (2, 3):
            more = fh.read(2)
            if len(more) < 2:
                raise ValueError(f"{path.name}: the .npy header is cut off")
            size, offset = int.from_bytes(start[8:10] + more, "little"), 12
        else:
            raise ValueError(f"{path.name}: .npy format version {major} is not known")
        raw = fh.read(size)
    if len(raw) < size:
        raise ValueError(f"{path.name}: the .npy header is cut off")
    text = raw.decode("utf-8" if major == 3 else "latin-1")
    found = _HEADER.match(text.strip())
    if found is None:
        return None
    parts = [p for p in found["shape"].replace(" ", "").split(",") if p]
    shape = tuple(int(p) for p in parts)
    return np.dtype(found["descr"]), found["fortran"] == "True", shape, offset + size


def map_npy(path: Path) -> np.ndarray:
    """The array in `path`, memory-mapped read-only (as np.load(path, mmap_mode="r") gives
    it). ValueError or OSError for a file that is not a readable .npy array."""
    header = _header(path)
    if header is None:
        with _fallback_lock:
            return np.load(path, mmap_mode="r", allow_pickle=False)
    dtype, fortran, shape, offset = header
    if dtype.hasobject:
        raise ValueError(f"{path.name} holds Python objects, which an index never stores")
    count = int(np.prod(shape, dtype=np.int64)) if shape else 1
    need = offset + count * dtype.itemsize
    size = path.stat().st_size
    if size < need:
        raise ValueError(f"{path.name} is cut off: {size} bytes, its header needs {need}")
    if count == 0:  # an empty file region cannot be mapped
        empty = np.empty(shape, dtype=dtype, order="F" if fortran else "C")
        empty.flags.writeable = False
        return empty
    return np.memmap(
        path, dtype=dtype, mode="r", offset=offset, shape=shape, order="F" if fortran else "C"
    )


__all__ = ["map_npy"]
