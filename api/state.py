"""What a worker serves: the loaded index and model, swapped as one unit, shared by workers.

Requests read `Serving.current` once and use that snapshot to the end, so a reload never
mixes an old index with a new model. A change builds a new `Loaded` and replaces the
reference in one assignment.

Files are taken into service through the state folder the workers share (`lastgood`): an
admin call copies the new files into a snapshot for the next generation, loads them from
there (a file that does not load is refused, 409, and the old files keep serving), and only
then publishes the generation marker naming the snapshot. Every worker runs a watcher
thread that stats the marker every `reload_check_seconds` (0.5 s by default) and, when the
generation is newer than its own, loads whichever part's generation moved on. A worker
that starts or restarts later loads the snapshot the marker names: the last files that
loaded, whatever has been put in place of the configured ones since. Admin changes are
serialized across processes by an fcntl.flock on `admin.lock`.
"""

from __future__ import annotations

import contextlib
import fcntl
import gc
import logging
import os
import shutil
import tempfile
import threading
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from reranker import ServedModel, load_model
from retriever import Index, atomicfile, load_index, update_index

from .lastgood import (
    MARKER,
    Marker,
    drop_snapshot,
    prune,
    read_marker,
    take_snapshot,
    write_marker,
)
from .servedlog import utc_now
from .settings import ServiceSettings

ADMIN_LOCK = "admin.lock"
log = logging.getLogger("hunchwise.serve")
__all__ = ["Change", "Loaded", "NoModelConfiguredError", "Serving", "load_pair", "read_marker"]


class NoModelConfiguredError(ValueError):
    """A model was sent to a server started without one (it has no model file to replace)."""


@dataclass(frozen=True)
class Loaded:
    """One consistent, read-only pair of index and model, and when it was loaded."""

    index: Index
    model: ServedModel | None
    generation: int
    loaded_at: str
    marker: Marker  # where the files came from, by part and generation

    @property
    def model_version(self) -> str | None:
        """Version of the model, or None when ranking by BM25 only."""
        return None if self.model is None else str(self.model.version)


@dataclass(frozen=True)
class Change:
    """What an admin call changed: versions before and after, and the new generation."""

    generation: int
    index_version: str
    model_version: str | None
    previous_index_version: str
    previous_model_version: str | None


def load_pair(
    settings: ServiceSettings, index: Index | None = None
) -> tuple[Index, ServedModel | None]:
    """Load the index folder (unless given) and the model file bound to it."""
    idx = index if index is not None else load_index(settings.index_dir)
    model = (
        None
        if settings.model_path is None
        else load_model(settings.model_path, index=idx, user_features=settings.user_features)
    )
    return idx, model


def _freeze() -> None:
    # A loaded index is ~10^5-10^6 long-lived objects; a full cyclic collection walks them
    # all (about 0.2 s for 100k articles), a stall in the middle of some request. Freezing
    # moves them out of the collector's sight; reference counting still frees an old index.
    gc.freeze()


class Serving:
    """The current `Loaded` of this worker, admin changes, and the marker watcher.

    resume=True (a uvicorn worker of `hunchwise serve`): start from the snapshot the marker
    names, as the siblings serve it. resume=False (or no snapshot yet): take the configured
    files into service as a new generation.
    """

    def __init__(
        self,
        settings: ServiceSettings,
        *,
        resume: bool = False,
        open_index: Callable[[Path], Index] = load_index,
    ) -> None:
        self.settings = settings
        # How an index folder becomes the index served: `load_index`, or a sharded folder
        # searched on a Ray cluster (api/rayserve.py).
        self._open_index = open_index
        self._own_state = settings.state_dir is None
        # Without a shared folder (one process), a private one holds the snapshots.
        self.state_dir: Path = (
            Path(tempfile.mkdtemp(prefix="hunchwise-state-"))
            if settings.state_dir is None
            else settings.state_dir
        )
        self.state_dir.mkdir(parents=True, exist_ok=True)
        self._local_lock = threading.Lock()
        self._stop = threading.Event()
        self._watcher: threading.Thread | None = None
        marker = read_marker(self.state_dir)
        if resume and marker.has_files:
            with self._folder_lock(fcntl.LOCK_SH):
                marker = read_marker(self.state_dir)  # as it is now, under the lock
                index, model = self._load_parts(marker)
            self.current = Loaded(index, model, marker.generation, utc_now(), marker)
            log.info("worker %d: started on generation %d", os.getpid(), marker.generation)
        else:
            with self._admin_lock():
                fresh = self._take_in(
                    index_src=settings.index_dir, model_src=settings.model_path, model_too=True
                )
                self._commit(fresh)
        _freeze()
        self._marker_stat: tuple[int, int] | None = self._stat_marker()

    # -- cross-worker coordination -------------------------------------
    @contextlib.contextmanager
    def _folder_lock(self, mode: int) -> Iterator[None]:
        """flock on the shared lock file: LOCK_EX to change the files, LOCK_SH to read them."""
        fd = os.open(self.state_dir / ADMIN_LOCK, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, mode)
            yield
        finally:
            fcntl.flock(fd, fcntl.LOCK_UN)
            os.close(fd)

    @contextlib.contextmanager
    def _admin_lock(self) -> Iterator[None]:
        with self._local_lock, self._folder_lock(fcntl.LOCK_EX):
            yield

    def _stat_marker(self) -> tuple[int, int] | None:
        try:
            st = os.stat(self.state_dir / MARKER)
        except FileNotFoundError:
            return None
        return st.st_ino, st.st_mtime_ns

    def _load_parts(
        self, marker: Marker, keep: Loaded | None = None
    ) -> tuple[Index, ServedModel | None]:
        """Load the parts the marker names; with `keep`, only those of a newer generation."""
        if marker.index_dir is None:
            raise ValueError(f"{self.state_dir / MARKER}: names no index snapshot")
        index = (
            keep.index
            if keep is not None and keep.marker.index_generation == marker.index_generation
            else self._open_index(Path(marker.index_dir))
        )
        if keep is not None and keep.marker.model_generation == marker.model_generation:
            return index, keep.model
        model = (
            None
            if marker.model_path is None
            else load_model(
                marker.model_path, index=index, user_features=self.settings.user_features
            )
        )
        return index, model

    def _take_in(
        self,
        *,
        index_src: Path | None = None,
        model_src: Path | None = None,
        model_text: str | None = None,
        model_too: bool = False,
    ) -> Loaded:
        """Snapshot new files as the next generation and load them from there (not published).

        index_src: a new index folder (None: keep the current index). With model_too, the
        model becomes model_text, else the file model_src, else none. On any failure the
        snapshot is removed and the error raised; nothing that serves has changed.
        """
        old = read_marker(self.state_dir)
        current: Loaded | None = getattr(self, "current", None)
        generation = max(old.generation, 0 if current is None else current.generation) + 1
        folder = take_snapshot(
            self.state_dir,
            generation,
            index_src=index_src,
            model_src=model_src if model_too else None,
            model_text=model_text if model_too else None,
        )
        has_model = model_too and (model_text is not None or model_src is not None)
        marker = replace(
            old,
            generation=generation,
            index_generation=generation if index_src is not None else old.index_generation,
            model_generation=generation if model_too else old.model_generation,
            index_dir=str(folder / "index") if index_src is not None else old.index_dir,
            model_path=(str(folder / "model.json") if has_model else None)
            if model_too
            else old.model_path,
            time=utc_now(),
            pid=os.getpid(),
        )
        try:
            index, model = self._load_parts(marker, keep=current)
        except BaseException:
            drop_snapshot(folder)
            raise
        marker = replace(
            marker,
            index_version=index.version,
            model_version=None if model is None else model.version,
        )
        return Loaded(index, model, generation, utc_now(), marker)

    def _commit(self, loaded: Loaded) -> Change:
        """Serve `loaded` here and publish its marker so the siblings follow."""
        old: Loaded | None = getattr(self, "current", None)
        self.current = loaded
        _freeze()
        write_marker(self.state_dir, loaded.marker)
        self._marker_stat = self._stat_marker()
        prune(self.state_dir, loaded.marker)
        return Change(
            loaded.generation,
            loaded.index.version,
            loaded.model_version,
            loaded.index.version if old is None else old.index.version,
            None if old is None else old.model_version,
        )

    def check_marker(self) -> bool:
        """Load again if a sibling worker published a newer generation; True if it did."""
        stat = self._stat_marker()
        if stat is None or stat == self._marker_stat:
            return False
        with self._local_lock:
            self._marker_stat = stat
            cur = self.current
            try:
                # Shared lock: no sibling changes the snapshots while this worker reads them.
                with self._folder_lock(fcntl.LOCK_SH):
                    marker = read_marker(self.state_dir)
                    if marker.generation <= cur.generation or not marker.has_files:
                        return False
                    index, model = self._load_parts(marker, keep=cur)
            except Exception as exc:  # any failure keeps the old pair serving
                log.error(
                    "worker %d: loading generation %d failed, still serving generation %d: %s",
                    os.getpid(),
                    marker.generation,
                    cur.generation,
                    exc,
                )
                return False
            self.current = Loaded(index, model, marker.generation, utc_now(), marker)
            _freeze()
            log.info(
                "worker %d: now serving generation %d (index %s, model %s)",
                os.getpid(),
                marker.generation,
                index.version,
                self.current.model_version,
            )
            return True

    def _watch(self) -> None:
        while not self._stop.wait(self.settings.reload_check_seconds):
            try:
                self.check_marker()
            except Exception:  # the watcher must outlive any one bad look at the marker
                log.exception("generation watcher")

    def start(self) -> None:
        """Start the marker watcher."""
        if self._watcher is not None:
            return
        self._watcher = threading.Thread(target=self._watch, name="hunchwise-reload", daemon=True)
        self._watcher.start()

    def stop(self) -> None:
        """Stop the watcher thread (and remove a private state folder)."""
        self._stop.set()
        if self._watcher is not None:
            self._watcher.join(timeout=5)
            self._watcher = None
        if self._own_state:
            shutil.rmtree(self.state_dir, ignore_errors=True)

    # -- admin changes ---------------------------------------------------
    def reload(self) -> Change:
        """Read the index folder and model file again; on failure the old pair keeps serving."""
        with self._admin_lock():
            s = self.settings
            return self._commit(
                self._take_in(index_src=s.index_dir, model_src=s.model_path, model_too=True)
            )

    def put_model(self, text: str) -> Change:
        """Serve a new model file's content; it replaces the configured file once it loads."""
        path = self.settings.model_path
        if path is None:
            raise NoModelConfiguredError(
                "the server was started without --model, so it has no model file to replace; "
                "restart it with --model FILE"
            )
        with self._admin_lock():
            loaded = self._take_in(model_text=text, model_too=True)
            # The configured file too (temp file + rename), so a fresh start serves it.
            atomicfile.write_text(path, text)
            return self._commit(loaded)

    def put_entries(self, records: Sequence[Mapping[str, Any]]) -> Change:
        """Add or replace articles in the index folder, then serve the new index."""
        with self._admin_lock():
            update_index(self.settings.index_dir, add=list(records))
            # The model does not depend on the index's content, so it keeps serving as it is.
            return self._commit(self._take_in(index_src=self.settings.index_dir))

    def remove_entry(self, doc_id: str) -> Change:
        """Remove one article from the index folder; UnknownDocumentError if it is not there."""
        with self._admin_lock():
            # Look in the folder as it is now: another worker may have changed it.
            load_index(self.settings.index_dir).row_of(doc_id)
            update_index(self.settings.index_dir, remove=[doc_id])
            return self._commit(self._take_in(index_src=self.settings.index_dir))
