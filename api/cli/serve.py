"""Sub-command `serve`: the JSON service under uvicorn, with one or more worker processes.

The parent process checks the index, model and token first (so mistakes are reported as a
one-line error, not a traceback per worker), then hands every setting to the workers
through HUNCHWISE_* environment variables. It also prepares what the workers share: the
state folder (generation marker, admin lock, the key that signs request ids) and the
folder of prometheus_client's multiprocess mode.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import multiprocessing
import os
import shutil
import tempfile
from collections.abc import Iterator
from multiprocessing.connection import Connection
from pathlib import Path

from ..parentwatch import PARENT_ENV
from .options import add_feature_option, add_port_option, positive_int

ENV_PREFIX = "HUNCHWISE_"
STARTUP_FAILURE_NOTE = "worker-failed.txt"  # as api.app writes it (not imported: it is heavy)


class ServerStoppedError(OSError):
    """The server stopped on a failure, not because it was asked to (exit code 1)."""


METRICS_ENV = "PROMETHEUS_MULTIPROC_DIR"
GUARDED_PROTOCOL = "api.connections:GuardedHttpToolsProtocol"
DESCRIPTOR_HEADROOM = 256


def register(sub: argparse._SubParsersAction) -> None:
    """Add the serve sub-command."""
    p = sub.add_parser("serve", help="serve the JSON API (rank, feedback, entries, admin)")
    p.add_argument("--index", type=Path, required=True, help="index folder to serve")
    p.add_argument(
        "--model", type=Path, help="reranker model file (without one: BM25 order, no probabilities)"
    )
    p.add_argument("--host", default="127.0.0.1", help="address to bind (default 127.0.0.1)")
    add_port_option(p)
    p.add_argument("--workers", type=int, default=1, help="worker processes (default 1)")
    p.add_argument("--log-dir", type=Path, help="folder of the served log served.jsonl")
    add_feature_option(p, "user feature function the model was trained with (repeatable)")
    p.add_argument(
        "--state-dir",
        type=Path,
        help="folder the workers share: reload marker, locks, request-id key (default: a "
        "temporary folder removed on exit; keep one to accept feedback across restarts)",
    )
    p.add_argument(
        "--admin-token-file",
        type=Path,
        help="file holding the admin bearer token (or set HUNCHWISE_ADMIN_TOKEN)",
    )
    p.add_argument("--log-max-bytes", type=int, help="rotate served.jsonl past this many bytes")
    p.add_argument("--log-backups", type=int, help="rotated served logs to keep")
    p.add_argument(
        "--cors-origin",
        action="append",
        default=[],
        metavar="ORIGIN",
        help="allow this origin by CORS (repeatable; default: CORS off)",
    )
    p.add_argument("--access-log", action="store_true", help="print one line per request")
    p.add_argument(
        "--max-connections",
        type=int,
        help="open connections per worker; one more closes the one waiting longest for its "
        "request with 503, or gets 503 when all are busy (default 1000)",
    )
    p.add_argument(
        "--request-timeout",
        type=float,
        metavar="SECONDS",
        help="time a request may take to arrive, headers and body; then 408 (default 60)",
    )
    p.add_argument(
        "--keep-alive",
        type=int,
        metavar="SECONDS",
        help="close an idle kept-alive connection after this long (default 5)",
    )
    p.add_argument(
        "--ray",
        metavar="ADDRESS",
        help="serve a sharded index (index build --shards) on Ray Serve: one deployment per "
        "shard and the API in front, on this Ray cluster, or 'local' to start one here "
        "(needs the 'cluster' extra)",
    )
    p.add_argument(
        "--shard-replicas",
        type=positive_int,
        metavar="N",
        default=None,
        help="with --ray: replicas of each shard's deployment (default 1)",
    )
    p.add_argument(
        "--front-replicas",
        type=positive_int,
        metavar="N",
        default=None,
        help="with --ray: replicas of the front deployment, the HTTP API that analyses "
        "clues, merges the shards' lists and computes features and probabilities; Ray "
        "Serve's proxy spreads requests among them (default 1)",
    )
    p.set_defaults(func=cmd_serve)


def _environment(args: argparse.Namespace, state_dir: Path) -> dict[str, str]:
    env = {
        "INDEX_DIR": str(args.index.resolve()),
        "STATE_DIR": str(state_dir.resolve()),
    }
    if args.model is not None:
        env["MODEL_PATH"] = str(args.model.resolve())
    if args.log_dir is not None:
        env["LOG_DIR"] = str(args.log_dir.resolve())
    if args.feature:
        env["USER_FEATURES"] = json.dumps(args.feature)
    if args.admin_token_file is not None:
        env["ADMIN_TOKEN_FILE"] = str(args.admin_token_file.resolve())
    if args.log_max_bytes is not None:
        env["LOG_MAX_BYTES"] = str(args.log_max_bytes)
    if args.log_backups is not None:
        env["LOG_BACKUPS"] = str(args.log_backups)
    if args.max_connections is not None:
        env["MAX_CONNECTIONS"] = str(args.max_connections)
    if args.request_timeout is not None:
        env["REQUEST_TIMEOUT_SECONDS"] = str(args.request_timeout)
    if args.keep_alive is not None:
        env["KEEP_ALIVE_SECONDS"] = str(args.keep_alive)
    if args.cors_origin:
        env["CORS_ORIGINS"] = "[" + ",".join(f'"{o}"' for o in args.cors_origin) + "]"
    return {ENV_PREFIX + k: v for k, v in env.items()}


@contextlib.contextmanager
def _state_folder(given: Path | None) -> Iterator[Path]:
    if given is not None:
        given.mkdir(parents=True, exist_ok=True)
        yield given
        return
    folder = Path(tempfile.mkdtemp(prefix="hunchwise-serve-"))
    try:
        yield folder
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def _check_files() -> str:
    """Load the index, model and token as a worker will; return a one-line summary.

    The files that load become the first snapshot of the state folder, the last good
    files every worker starts (and restarts) from.
    """
    from ..settings import settings_from_env
    from ..state import Serving

    settings = settings_from_env()
    settings.resolved_admin_token()
    loaded = Serving(settings).current
    index, model = loaded.index, loaded.model
    what = f"model {model.version}" if model is not None else "no model: BM25 order only"
    return f"serving index {index.version} ({index.n_docs} articles), {what}"


def _check_child(conn: Connection) -> None:
    from reranker import RerankerError
    from retriever import RetrieverError

    try:
        conn.send(("ok", _check_files()))
    except (RetrieverError, RerankerError, ValueError, OSError) as exc:
        conn.send(("error", str(exc)))
    finally:
        conn.close()


def _check(args: argparse.Namespace) -> None:
    """Fail fast, in the parent, on anything a worker would fail on at startup.

    The loading happens in a forked child: the parent only supervises workers, and memory
    it had used for a whole index would stay with it (CPython keeps freed arenas).
    """
    if args.workers < 1:
        raise ValueError("--workers must be at least 1")
    if not 0 <= args.port <= 65535:
        raise ValueError("--port must be between 0 and 65535")
    ctx = multiprocessing.get_context("fork")
    receiver, sender = ctx.Pipe(duplex=False)
    child = ctx.Process(target=_check_child, args=(sender,), name="hunchwise-check")
    child.start()
    sender.close()
    try:
        status, message = receiver.recv()
    except EOFError:
        status, message = "error", f"checking the index and model failed (exit {child.exitcode})"
    child.join()
    if status != "ok":
        raise ValueError(message)
    print(f"{message}, {args.workers} worker(s) on http://{args.host}:{args.port}", flush=True)


def _ensure_descriptors(max_connections: int) -> None:
    """Raise this process's open-file limit (workers inherit it) to fit max_connections.

    A worker out of descriptors cannot accept, so new clients would be reset rather than
    told 503. Headroom for index files, logs, metrics and pipes is a rule of thumb
    (common practice, no source).
    """
    try:
        import resource
    except ImportError:  # not on Windows
        return
    need = max_connections + DESCRIPTOR_HEADROOM
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    if soft != resource.RLIM_INFINITY and soft < need:
        target = need if hard == resource.RLIM_INFINITY else min(hard, need)
        resource.setrlimit(resource.RLIMIT_NOFILE, (target, hard))
        if target < need:
            raise ValueError(
                f"--max-connections {max_connections} needs about {need} open files per "
                f"worker, but the limit is {hard}; lower it or raise the limit (ulimit -n)"
            )


# Options of the uvicorn server that Ray Serve's HTTP proxy does not take.
_UVICORN_ONLY = ("workers", "max_connections", "request_timeout", "keep_alive", "access_log")


def _serve_on_ray(args: argparse.Namespace) -> int:
    """`serve --ray ADDRESS`: the sharded index on Ray Serve (api/rayserve.py)."""
    given = [
        "--" + name.replace("_", "-")
        for name in _UVICORN_ONLY
        if getattr(args, name) not in (None, False, 1)
    ]
    if given:
        raise ValueError(
            f"{', '.join(given)}: not with --ray (Ray Serve's HTTP proxy serves the requests; "
            "scale with --shard-replicas and --front-replicas)"
        )
    if not 1 <= args.port <= 65535:
        raise ValueError("--port must be between 1 and 65535 with --ray")
    try:
        from .. import rayserve
    except ImportError as exc:
        raise ValueError(
            f"--ray needs Ray Serve ({exc}); install it: pip install 'hunchwise[cluster]'"
        ) from exc
    from ..settings import settings_from_env

    return rayserve.run(
        settings_from_env(),
        args.ray,
        host=args.host,
        port=args.port,
        shard_replicas=args.shard_replicas or 1,
        front_replicas=args.front_replicas or 1,
    )


def cmd_serve(args: argparse.Namespace) -> int:
    """Run the service until interrupted."""
    from ..settings import settings_from_env

    given = [n for n in ("shard_replicas", "front_replicas") if getattr(args, n) is not None]
    if args.ray is None and given:
        flags = ", ".join("--" + n.replace("_", "-") for n in given)
        raise ValueError(
            f"{flags}: only with --ray (replicas of the Ray Serve deployments of a sharded "
            "index); without --ray, run more server processes with --workers"
        )
    with _state_folder(args.state_dir) as state_dir:
        os.environ.update(_environment(args, state_dir))
        if args.ray is not None:
            return _serve_on_ray(args)
        import uvicorn

        # Workers compare their parent pid with this, to end when this process is gone.
        os.environ[PARENT_ENV] = str(os.getpid())
        metrics_dir = state_dir / "metrics"
        shutil.rmtree(metrics_dir, ignore_errors=True)
        metrics_dir.mkdir(parents=True)
        # Set before any worker imports prometheus_client: it picks its mode at import time.
        os.environ[METRICS_ENV] = str(metrics_dir)
        failure_note = state_dir / STARTUP_FAILURE_NOTE
        failure_note.unlink(missing_ok=True)
        _check(args)
        settings = settings_from_env()
        _ensure_descriptors(settings.max_connections)
        uvicorn.run(
            "api.app:app_from_env",
            factory=True,
            host=args.host,
            port=args.port,
            workers=args.workers,
            access_log=args.access_log,
            log_level="info",
            timeout_graceful_shutdown=10,
            # The connection cap and the request-arrival deadline live in this protocol
            # (see api/connections.py for why uvicorn's own options do not cover them).
            http=GUARDED_PROTOCOL,
            timeout_keep_alive=settings.keep_alive_seconds,
            # No endpoint speaks WebSocket; refusing upgrades keeps every connection HTTP.
            ws="none",
        )
        # With several workers uvicorn stops, and returns normally, when one cannot start.
        if failure_note.exists():
            reason = failure_note.read_text(encoding="utf-8", errors="replace").strip()
            raise ServerStoppedError(f"the server stopped: a worker could not start: {reason}")
    return 0
