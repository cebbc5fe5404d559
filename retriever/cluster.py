"""Running a function over argument tuples: as Ray tasks on a cluster, or here in order.

Ray is optional (`hunchwise[cluster]`) and imported only here, only when a cluster is asked
for: 'local' starts one on this machine unless Ray runs already, an address joins one.
Without it the same calls run one after the other in this process, so every distributed
path has an in-process twin giving the same output.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

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


class Runner:
    """Runs a function over argument tuples: as Ray tasks, or here one after the other."""

    def __init__(self, ray_address: str | None, what: str = "build") -> None:
        self.ray: Any = None
        self._started = False
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

    def close(self) -> None:
        """Shut Ray down if this runner started it."""
        if self._started:
            self.ray.shutdown()

    def __enter__(self) -> Runner:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
