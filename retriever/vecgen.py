"""Vector generations: other word and article vectors for an index, kept inside its folder.

The index's own vectors (retriever/vectors.py) are learned from its articles alone. A
generation holds vectors learned again with more sentences (training refines them with
labelled clues joined to their answers' text, reranker/training/refine.py). Each lives in
a subfolder `vectors-<name>`, `name` a hash of its words and word vectors, so the same
vectors always get the same name and a model file names the one it was trained with. The
subfolder holds the same files as the index's own vectors (wordvec.npy, wordvec_weight.npy,
wordvec_terms, termvec_row.npy, docvec.npy, docvec.faiss for big indexes; never pickle)
and its own manifest.json, and is written to a temporary sibling then renamed, so a
serving process sees it whole or not at all. `hunchwise index add`/`remove` carry every
generation over to the new folder, giving new articles vectors from its stored words.
"""

from __future__ import annotations

import hashlib
import json
import re
from collections.abc import Iterable
from pathlib import Path
from typing import Any

import numpy as np

from . import columns, store
from . import vectors as vecs
from .errors import IndexFormatError

PREFIX = "vectors-"
GEN_FILE = "generation.json"
_NAME = re.compile(r"[0-9a-f]{16}")


def generation_name(words: list[str], wordvec: np.ndarray, weight: np.ndarray) -> str:
    """A 16-hex-digit hash of the words, their vectors and weights."""
    h = hashlib.sha256()
    h.update("\n".join(words).encode("utf-8"))
    h.update(np.ascontiguousarray(wordvec, dtype=np.float32).tobytes())
    h.update(np.ascontiguousarray(weight, dtype=np.float32).tobytes())
    return h.hexdigest()[:16]


def valid_name(name: str) -> bool:
    """True for a well-formed generation name."""
    return bool(_NAME.fullmatch(name))


def folder_of(index_folder: Path, name: str) -> Path:
    """Where generation `name` of an index lives (after checking the name's form)."""
    if not _NAME.fullmatch(name):
        raise IndexFormatError(f"{name!r} is not a vector generation name (16 hex digits)")
    return Path(index_folder) / f"{PREFIX}{name}"


def names(index_folder: Path) -> list[str]:
    """The complete generations of an index folder, sorted."""
    return sorted(
        p.name[len(PREFIX) :]
        for p in Path(index_folder).glob(f"{PREFIX}*")
        if p.is_dir() and _NAME.fullmatch(p.name[len(PREFIX) :]) and (p / GEN_FILE).exists()
    )


def write_generation(
    index_folder: Path,
    words: list[str],
    wordvec: np.ndarray,
    weight: np.ndarray,
    settings: vecs.VectorSettings,
    *,
    extra: dict[str, Any] | None = None,
) -> str:
    """Store a generation of the index in `index_folder` (unless already there); its name."""
    index_folder = Path(index_folder)
    manifest = store.read_manifest(index_folder)
    wordvec = np.ascontiguousarray(wordvec, dtype=np.float32)
    weight = np.ascontiguousarray(weight, dtype=np.float32)
    name = generation_name(words, wordvec, weight)
    target = folder_of(index_folder, name)
    if (target / GEN_FILE).exists():
        return name
    n_docs, n_terms = int(manifest["counts"]["articles"]), int(manifest["counts"]["terms"])
    with store.atomic_folder(target) as tmp:
        store.save_array(tmp, vecs.WORDVEC, wordvec)
        store.save_array(tmp, vecs.WORDVEC_WEIGHT, weight)
        columns.write_strings(tmp, vecs.WORDVEC_TERMS, words)
        rows = vecs.term_rows(index_folder, n_terms, words)
        store.save_array(tmp, vecs.TERMVEC_ROW, rows)
        shape = (n_docs, settings.dim)
        out = np.lib.format.open_memmap(
            tmp / f"{vecs.DOCVEC}.npy", mode="w+", dtype=settings.dtype, shape=shape
        )
        vecs.article_vectors(vecs.body_counts(index_folder, manifest), rows, wordvec, weight, out)
        out.flush()
        del out
        entry: dict[str, Any] = {
            "settings": settings.to_dict(),
            "words": len(words),
            "ann": None,
            "index_version": manifest["index_version"],
            **(extra or {}),
        }
        if n_docs >= settings.ann_min_articles and words:
            from . import ann

            docvec = vecs.open_matrix(tmp, vecs.DOCVEC, settings.dtype, n_docs, settings.dim)
            entry["ann"] = ann.build(tmp, docvec, settings)
        store.write_json(tmp / GEN_FILE, {"vectors": entry})
    return name


def _entry(folder: Path) -> dict[str, Any]:
    path = folder / GEN_FILE
    try:
        entry = json.loads(path.read_text(encoding="utf-8"))["vectors"]
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise IndexFormatError(f"{path}: unreadable ({exc}); train the model again") from exc
    if not isinstance(entry, dict):
        raise IndexFormatError(f"{path}: 'vectors' must be an object; train the model again")
    return entry


def open_generation(index_folder: Path, name: str) -> vecs.DenseVectors:
    """The vectors of generation `name` of an index folder (IndexFormatError if absent)."""
    index_folder = Path(index_folder)
    folder = folder_of(index_folder, name)
    if not (folder / GEN_FILE).exists():
        raise IndexFormatError(
            f"{index_folder}: has no vector generation {name} (the model was trained with "
            "vectors refined for another build of this index); retrain the model on this index"
        )
    manifest = store.read_manifest(index_folder)
    entry = _entry(folder)
    counts = manifest["counts"]
    return vecs.DenseVectors(folder, entry, int(counts["articles"]), int(counts["terms"]))


def carry_over(old_folder: Path, new_folder: Path, only: Iterable[str] | None = None) -> None:
    """Write every generation of `old_folder` (or those named) for the index in `new_folder`,
    from the stored words and weights (no training)."""
    for name in only if only is not None else names(old_folder):
        old = open_generation(old_folder, name)
        entry = _entry(folder_of(old_folder, name))
        keep = {k: v for k, v in entry.items() if k not in ("settings", "words", "ann")}
        keep.pop("index_version", None)
        write_generation(
            new_folder,
            old.words(),
            np.asarray(old.wordvec),
            np.asarray(old.weight),
            old.settings,
            extra=keep,
        )
