"""Running a function over argument tuples: as Ray tasks on a cluster, or here in order.

Ray is optional (`hunchwise[cluster]`) and imported only here, only when a cluster is asked
for: 'local' starts one on this machine unless Ray runs already, an address joins one.
Without it the same calls run one after the other in this process, so every distributed
path has an in-process twin giving the same output.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from .errors import RetrieverError


class ClusterError(RetrieverError):
    """Raised when the Ray cluster a command asks for is missing or unreachable."""


def import_ray(what: str) -> Any:
    """The ray module, or a ClusterError saying how to do without it."""
    try:
        import ray
    except ImportError as exc:
        raise ClusterError(
            f"Ray is not installed: pip install 'hunchwise[cluster]', or {what} without --ray "
            "(the same work then runs in this process)"
        ) from exc
    return ray


def _user_error(exc: BaseException) -> BaseException:
    """The first error in `exc`'s chain that is not Ray's own (a worker's bad input, say)."""
    seen: BaseException | None = exc
    while seen is not None:
        if not type(seen).__module__.startswith("ray"):
            return seen
        seen = getattr(seen, "cause", None) or seen.__cause__
    return exc


class Runner:
    """Runs a function over argument tuples: as Ray tasks, or here one after the other."""

    def __init__(self, ray_address: str | None, what: str = "build") -> None:
        self.ray: Any = None
        self._started = False
        # Each Ray Data job's execution record as the driver's Dataset.stats() gives it
        # (operators, tasks, rows), in the order the jobs ran; empty in this process.
        self.data_runs: list[str] = []
        if ray_address is None:
            return
        ray = import_ray(what)
        if not ray.is_initialized():
            try:
                if ray_address == "local":
                    ray.init(include_dashboard=False, log_to_driver=False)
                else:
                    ray.init(address=ray_address, log_to_driver=False)
            except (ConnectionError, RuntimeError, ValueError) as exc:
                raise ClusterError(
                    f"cannot reach the Ray cluster at {ray_address!r}: {exc}"
                ) from exc
            self._started = True
        self.ray = ray

    def unwrap(self, exc: BaseException) -> BaseException:
        """A task's own error (a bad line, say) as the in-process run raises it, without
        the remote traceback Ray puts in its message."""
        cause = getattr(exc, "cause", None)
        return cause if isinstance(cause, Exception) else exc

    def put(self, value: Any) -> Any:
        """`value` stored once in the cluster's object store (a reference tasks take in its
        place), or `value` itself in this process."""
        return value if self.ray is None else self.ray.put(value)

    def map(self, fn: Callable[..., Any], calls: Sequence[tuple[Any, ...]]) -> list[Any]:
        """fn(*args) for each tuple of `calls`, in order."""
        if self.ray is None:
            return [fn(*args) for args in calls]
        task = self.ray.remote(num_cpus=1, max_retries=0)(fn)
        try:
            return list(self.ray.get([task.remote(*args) for args in calls]))
        except self.ray.exceptions.RayTaskError as exc:
            err = self.unwrap(exc)
            if err is exc:
                raise
            raise err from None

    def map_batches(
        self,
        columns: dict[str, np.ndarray],
        worker: type,
        args: tuple[Any, ...],
        batch_size: int,
    ) -> dict[str, np.ndarray]:
        """Rows (equal-length `columns`, one of them `seq`, ascending) through `worker(*args)`,
        a callable taking and returning a batch (a dict of columns, `seq` passed through):
        with Ray Data, one worker per cluster CPU, each set up once; here, one worker over
        consecutive batches. The output's rows come back ordered by `seq` either way."""
        n = len(columns["seq"])
        if self.ray is None:
            fn = worker(*args)
            parts = [
                fn({c: v[s : s + batch_size] for c, v in columns.items()})
                for s in range(0, n, batch_size)
            ]
        else:
            parts = self._ray_batches(columns, worker, args, batch_size)
        parts = [p for p in parts if len(p["seq"])]
        if not parts:
            return fn({c: v[:0] for c, v in columns.items()}) if self.ray is None else {}
        out = {c: np.concatenate([p[c] for p in parts]) for c in parts[0]}
        order = np.argsort(out["seq"], kind="stable")
        return {c: v[order] for c, v in out.items()}

    def _ray_batches(
        self, columns: dict[str, np.ndarray], worker: type, args: tuple[Any, ...], batch_size: int
    ) -> list[dict[str, np.ndarray]]:
        ray = self.ray
        with warnings.catch_warnings():
            # Ray Data's first DataContext sets its own deprecated options to their defaults
            # on construction and warns about each (Ray 2.60); nothing here sets them.
            warnings.filterwarnings(
                "ignore", category=DeprecationWarning, module=r"ray\.data\.context"
            )
            ctx = ray.data.DataContext.get_current()
        ctx.enable_progress_bars = False
        # A worker's own error (a bad line, say) comes back as itself, not as Ray Data's
        # UserCodeException, which carries only its traceback text across (Ray 2.60).
        ctx.raise_original_map_exception = True
        names = list(columns)
        values = [columns[c].tolist() for c in names]
        rows = [dict(zip(names, r, strict=True)) for r in zip(*values, strict=True)]
        ds = ray.data.from_items(rows).map_batches(
            worker,
            fn_constructor_args=args,
            batch_size=batch_size,
            batch_format="numpy",
            **self.worker_pool(),
        )
        try:
            parts = list(ds.iter_batches(batch_size=None, batch_format="numpy"))
        except Exception as exc:  # Ray Data wraps the worker's own error in its own
            err = _user_error(exc)
            if err is exc:
                raise
            raise err from None
        self.data_runs.append(ds.stats())
        return parts

    def worker_pool(self) -> dict[str, Any]:
        """`map_batches` options for a class of workers: one per cluster CPU, each set up
        once."""
        ray = self.ray
        workers = max(1, int(ray.cluster_resources().get("CPU", 1)))
        return {
            # A fixed pool of `workers` actors: what `concurrency=workers` meant for a class,
            # deprecated since Ray 2.51 for `compute` (ray.data.ActorPoolStrategy's docs).
            "compute": ray.data.ActorPoolStrategy(size=workers),
            "num_cpus": 1,
            # Not set: max_restarts. Ray Data restarts a dead worker and resends its batch
            # without end, and logs on every job that such restarts may fail (its own
            # constructor arguments live in the object store, ray-project/ray#57733); the
            # only way to turn that off, max_restarts=0, goes through **ray_remote_args,
            # deprecated in Ray 2.60.
        }

    def close(self) -> None:
        """Shut Ray down if this runner started it."""
        if self._started:
            self.ray.shutdown()

    def __enter__(self) -> Runner:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
