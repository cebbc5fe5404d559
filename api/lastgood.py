"""The last good files: copies of the index folder and model file that loaded, one per generation.

A worker that starts (or restarts after a crash) must serve what its siblings serve, even
if someone has since put a file in place that does not load. So whenever files are taken
into service, they are first copied into the state folder, `good/g<generation>/` (the index
folder as hard links where the file system allows, else copied; the model file copied),
loaded from there, and only then named in the generation marker. Nothing is ever changed
inside a snapshot: a later change makes a new one. The marker names, for the index and the
model separately, the snapshot and the generation it came from; workers follow the marker
by generation, never by comparing versions.

Every write here is to a temporary name first, then renamed.
"""

from __future__ import annotations

import json
import logging
import os
import shutil
import uuid
from dataclasses import asdict, dataclass
from pathlib import Path

from retriever import atomicfile

GOOD = "good"
MARKER = "generation.json"
KEEP = 3  # snapshots kept: the newest ones, which a slow sibling may still be loading
log = logging.getLogger("hunchwise.serve")


@dataclass(frozen=True)
class Marker:
    """What the workers should serve: the generation and where each part's files are."""

    generation: int = 0
    index_generation: int = 0
    model_generation: int = 0
    index_dir: str | None = None  # snapshot folders; None before the first snapshot
    model_path: str | None = None
    index_version: str | None = None
    model_version: str | None = None
    time: str = ""
    pid: int = 0

    @property
    def has_files(self) -> bool:
        """True once a snapshot of the index (and of the model, if any) is named here."""
        return self.index_dir is not None


def read_marker(state_dir: Path | None) -> Marker:
    """The marker's content; generation 0 and no files when there is none (or it is broken)."""
    if state_dir is None:
        return Marker()
    try:
        data = json.loads((state_dir / MARKER).read_text(encoding="utf-8"))
    except FileNotFoundError:
        return Marker()
    except (OSError, ValueError) as exc:
        log.warning("unreadable generation marker in %s: %s", state_dir, exc)
        return Marker()
    if not isinstance(data, dict) or not isinstance(data.get("generation"), int):
        return Marker()
    fields = Marker.__dataclass_fields__
    try:
        return Marker(**{k: v for k, v in data.items() if k in fields})
    except TypeError:
        return Marker()


def write_marker(state_dir: Path, marker: Marker) -> None:
    """Publish the marker (temp file + rename)."""
    atomicfile.write_text(state_dir / MARKER, json.dumps(asdict(marker)))


def _link_tree(src: Path, dst: Path) -> None:
    """Hard-link every file of src under dst (copy where linking is impossible).

    Index folders are only ever replaced whole (a new folder renamed over the old one),
    never changed file by file, so a hard link is a faithful, free snapshot.
    """
    for root, _dirs, files in os.walk(src):
        target = dst / Path(root).relative_to(src)
        target.mkdir(parents=True, exist_ok=True)
        for name in files:
            try:
                os.link(Path(root) / name, target / name)
            except OSError:  # another file system, or links not allowed: copy instead
                shutil.copy2(Path(root) / name, target / name)


def take_snapshot(
    state_dir: Path,
    generation: int,
    *,
    index_src: Path | None = None,
    model_src: Path | None = None,
    model_text: str | None = None,
) -> Path:
    """Copy an index folder and/or a model (a file, or its text) into `good/g<generation>`.

    The folder is built under a temporary name and renamed when complete. Returns it.
    """
    good = state_dir / GOOD
    good.mkdir(parents=True, exist_ok=True)
    final = good / f"g{generation:08d}"
    tmp = good / f".{final.name}.{uuid.uuid4().hex[:8]}.tmp"
    try:
        tmp.mkdir()
        if index_src is not None:
            _link_tree(index_src, tmp / "index")
        if model_text is not None:
            (tmp / "model.json").write_text(model_text, encoding="utf-8")
        elif model_src is not None:
            # Copied, not linked: a model file may be edited in place.
            shutil.copyfile(model_src, tmp / "model.json")
        if final.exists():  # left by a change that failed after its snapshot
            shutil.rmtree(final)
        os.rename(tmp, final)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return final


def drop_snapshot(folder: Path) -> None:
    """Remove a snapshot whose files did not load."""
    shutil.rmtree(folder, ignore_errors=True)


def prune(state_dir: Path, marker: Marker) -> None:
    """Remove old snapshots: keep the newest few and those the marker names."""
    good = state_dir / GOOD
    if not good.is_dir():
        return
    named = {Path(p).parent.name for p in (marker.index_dir, marker.model_path) if p is not None}
    folders = sorted(p for p in good.iterdir() if p.name.startswith("g"))
    for old in folders[:-KEEP]:
        if old.name not in named:
            shutil.rmtree(old, ignore_errors=True)
    for stale in good.glob(".g*.tmp"):
        shutil.rmtree(stale, ignore_errors=True)
