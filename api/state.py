"""What a worker serves: the loaded index and model, swapped as one unit, shared by workers.

Requests read `Serving.current` once and use that snapshot to the end, so a reload never
mixes an old index with a new model. A reload builds a new `Loaded` and replaces the
reference in one assignment.

With several uvicorn workers an admin call reaches one of them. That worker changes the
files, loads them itself, and then writes a generation marker (`generation.json`, temp file +
rename) in the state folder the workers share. Every worker runs a watcher thread that
stats the marker every `reload_check_seconds` (0.5 s by default) and, when the generation
is newer than its own, loads the index folder and model file again into a fresh `Loaded`.
Admin changes are serialized across processes by an fcntl.flock on `admin.lock`.
"""

from __future__ import annotations

import contextlib
import fcntl
import gc
import json
import logging
import os
import threading
import uuid
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from reranker import ServedModel, load_model
from retriever import Index, load_index, update_index

from .servedlog import utc_now
from .settings import ServiceSettings

MARKER = "generation.json"
ADMIN_LOCK = "admin.lock"
log = logging.getLogger("hunchwise.serve")


@dataclass(frozen=True)
class Loaded:
    """One consistent, read-only pair of index and model, and when it was loaded."""

    index: Index
    model: ServedModel | None
    generation: int
    loaded_at: str

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


def read_marker(state_dir: Path | None) -> dict[str, Any]:
    """The generation marker's content; {'generation': 0} when there is none yet."""
    if state_dir is None:
        return {"generation": 0}
    try:
        data = json.loads((state_dir / MARKER).read_text(encoding="utf-8"))
    except FileNotFoundError:
        return {"generation": 0}
    except (OSError, ValueError) as exc:
        log.warning("unreadable generation marker in %s: %s", state_dir, exc)
        return {"generation": 0}
    return (
        data
        if isinstance(data, dict) and isinstance(data.get("generation"), int)
        else {"generation": 0}
    )


def _freeze() -> None:
    # A loaded index is ~10^5-10^6 long-lived objects; a full cyclic collection walks them
    # all (about 0.2 s for 100k articles), a stall in the middle of some request. Freezing
    # moves them out of the collector's sight; reference counting still frees an old index.
    gc.freeze()


class Serving:
    """The current `Loaded` of this worker, admin changes, and the marker watcher."""

    def __init__(self, settings: ServiceSettings) -> None:
        self.settings = settings
        self.state_dir = settings.state_dir
        if self.state_dir is not None:
            self.state_dir.mkdir(parents=True, exist_ok=True)
        # Read the marker before loading: a change made while we load is then seen as newer.
        generation = int(read_marker(self.state_dir)["generation"])
        with self._folder_lock(fcntl.LOCK_SH):
            index, model = load_pair(settings)
        self.current = Loaded(index, model, generation, utc_now())
        _freeze()
        self._local_lock = threading.Lock()
        self._stop = threading.Event()
        self._watcher: threading.Thread | None = None
        self._marker_stat: tuple[int, int] | None = self._stat_marker()

    # -- cross-worker coordination -------------------------------------
    @contextlib.contextmanager
    def _folder_lock(self, mode: int) -> Iterator[None]:
        """flock on the shared lock file: LOCK_EX to change the files, LOCK_SH to read them."""
        if self.state_dir is None:
            yield
            return
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
        if self.state_dir is None:
            return None
        try:
            st = os.stat(self.state_dir / MARKER)
        except FileNotFoundError:
            return None
        return st.st_ino, st.st_mtime_ns

    def _publish(self, loaded: Loaded) -> None:
        """Write the marker (temp + rename) so sibling workers load the same files."""
        if self.state_dir is None:
            return
        data = {
            "generation": loaded.generation,
            "index_version": loaded.index.version,
            "model_version": loaded.model_version,
            "time": loaded.loaded_at,
            "pid": os.getpid(),
        }
        tmp = self.state_dir / f".{MARKER}.{uuid.uuid4().hex[:8]}.tmp"
        tmp.write_text(json.dumps(data), encoding="utf-8")
        os.replace(tmp, self.state_dir / MARKER)
        self._marker_stat = self._stat_marker()

    def _next_generation(self) -> int:
        return max(int(read_marker(self.state_dir)["generation"]), self.current.generation) + 1

    def _swap(self, index: Index, model: ServedModel | None, generation: int) -> Change:
        old = self.current
        self.current = Loaded(index, model, generation, utc_now())
        _freeze()
        return Change(
            generation,
            index.version,
            self.current.model_version,
            old.index.version,
            old.model_version,
        )

    def check_marker(self) -> bool:
        """Load again if a sibling worker published a newer generation; True if it did."""
        stat = self._stat_marker()
        if stat is None or stat == self._marker_stat:
            return False
        with self._local_lock:
            self._marker_stat = stat
            marker = read_marker(self.state_dir)
            generation = int(marker["generation"])
            if generation <= self.current.generation:
                return False
            cur = self.current
            try:
                # Shared lock: no sibling swaps the index folder while this worker reads it.
                with self._folder_lock(fcntl.LOCK_SH):
                    index = cur.index
                    if marker.get("index_version") != cur.index.version:
                        index = load_index(self.settings.index_dir)
                    model = cur.model
                    if marker.get("model_version") != cur.model_version:
                        _, model = load_pair(self.settings, index)
            except Exception as exc:  # any failure keeps the old pair serving
                log.error(
                    "worker %d: reload for generation %d failed, still serving the old files: %s",
                    os.getpid(),
                    generation,
                    exc,
                )
                return False
            self._swap(index, model, generation)
            log.info(
                "worker %d: now serving generation %d (index %s, model %s)",
                os.getpid(),
                generation,
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
        """Start the marker watcher (only when there is a state folder to watch)."""
        if self.state_dir is None or self._watcher is not None:
            return
        self._watcher = threading.Thread(target=self._watch, name="hunchwise-reload", daemon=True)
        self._watcher.start()

    def stop(self) -> None:
        """Stop the watcher thread."""
        self._stop.set()
        if self._watcher is not None:
            self._watcher.join(timeout=5)
            self._watcher = None

    # -- admin changes ---------------------------------------------------
    def reload(self) -> Change:
        """Read the index folder and model file again; on failure the old pair keeps serving."""
        with self._admin_lock():
            index, model = load_pair(self.settings)
            change = self._swap(index, model, self._next_generation())
            self._publish(self.current)
            return change

    def put_entries(self, records: Sequence[Mapping[str, Any]]) -> Change:
        """Add or replace articles in the index folder, then serve the new index."""
        with self._admin_lock():
            index = update_index(self.settings.index_dir, add=list(records))
            return self._after_update(index)

    def remove_entry(self, doc_id: str) -> Change:
        """Remove one article from the index folder; UnknownDocumentError if it is not there."""
        with self._admin_lock():
            # Look in the folder as it is now: another worker may have changed it.
            load_index(self.settings.index_dir).row_of(doc_id)
            index = update_index(self.settings.index_dir, remove=[doc_id])
            return self._after_update(index)

    def _after_update(self, index: Index) -> Change:
        # The model does not depend on the index's content, so it keeps serving as it is.
        change = self._swap(index, self.current.model, self._next_generation())
        self._publish(self.current)
        return change
