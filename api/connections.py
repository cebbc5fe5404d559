"""uvicorn's HTTP protocol with a cap on open connections and a deadline for requests to arrive.

Written by hand because uvicorn (0.55) has neither. Its `timeout_keep_alive` only covers
the idle time after a reply and is cancelled by the first byte of the next request, so a
client that sends half a request line and stalls keeps its connection, and its file
descriptor, for ever. Its `limit_concurrency` answers 503 only once a request's headers
are complete, which a stalled client never reaches. Middleware cannot help either: the
application is only called after the headers have arrived.

So each connection here starts a timer when it opens and again when the next request's
first byte arrives; the timer is cancelled once that request is completely received
(line, headers and body), so the time the application takes is never limited. On expiry
the connection is closed, with a 408 when no reply is in progress.

A connection opened while the worker already holds `max_connections` makes room by closing
(503) the connection that has waited longest for its request to arrive: clients that
stall or trickle are the ones that wait long, while a normal client sends its request
at once. Refusing the newcomer instead would let a few thousand stalled sockets keep
every new client out for as long as they are renewed. Only when every held connection
has a complete request the application is working on is the newcomer refused (503).

Limits come from the HUNCHWISE_* environment, as every other setting of a worker does:
uvicorn builds protocol objects itself and passes them nothing but its own config.
"""

from __future__ import annotations

import asyncio
import functools
import logging
import time
from collections import OrderedDict
from typing import Any

from uvicorn.protocols.http.httptools_impl import HttpToolsProtocol, RequestResponseCycle

from .settings import settings_from_env

logger = logging.getLogger("uvicorn.error")

WARN_EVERY_SECONDS = 10.0
_last_warned: dict[str, float] = {}

# Connections waiting for a request to arrive, longest-waiting first (those whose arrival
# timer runs). One per worker process: uvicorn runs one event loop, and protocol objects
# are only touched from it.
_waiting: OrderedDict[GuardedHttpToolsProtocol, None] = OrderedDict()


@functools.cache
def _limits() -> tuple[int, float]:
    settings = settings_from_env()
    return settings.max_connections, settings.request_timeout_seconds


def _plain_reply(status: str, text: str) -> bytes:
    body = text.encode("ascii")
    head = (
        f"HTTP/1.1 {status}\r\ncontent-type: text/plain; charset=utf-8\r\n"
        f"content-length: {len(body)}\r\nconnection: close\r\n\r\n"
    )
    return head.encode("ascii") + body


BUSY = _plain_reply("503 Service Unavailable", "too many open connections; try again later")
TIMED_OUT = _plain_reply("408 Request Timeout", "the request did not arrive in time")


def _warn(kind: str, message: str) -> None:
    # Under a flood of bad clients one line per connection would drown the log.
    now = time.monotonic()
    if now - _last_warned.get(kind, -WARN_EVERY_SECONDS) >= WARN_EVERY_SECONDS:
        _last_warned[kind] = now
        logger.warning(message)


class _HeadFirst:
    """A reply's transport while its body is sent: the held status line and headers go out in
    the same write as the first body bytes (or alone, before anything else the cycle does)."""

    def __init__(self, transport: Any, head: bytes) -> None:
        self.transport = transport
        self.head: bytes | None = head

    def flush(self) -> None:
        head, self.head = self.head, None
        if head is not None:
            self.transport.write(head)

    def write(self, data: bytes) -> None:
        head, self.head = self.head, None
        self.transport.write(data if head is None else head + data)

    def __getattr__(self, name: str) -> Any:
        self.flush()  # close(), is_closing() ...: the head goes out first, as before
        return getattr(self.transport, name)


class _Held:
    """Collects what the cycle writes while it handles http.response.start (the head)."""

    def __init__(self, transport: Any) -> None:
        self.transport = transport
        self.data = b""

    def write(self, data: bytes) -> None:
        self.data += data

    def __getattr__(self, name: str) -> Any:
        return getattr(self.transport, name)


class OneWriteCycle(RequestResponseCycle):
    """uvicorn's request cycle with the reply's head and body in one write, not two.

    uvicorn writes the status line and headers as soon as the application starts its reply,
    then the body: two sends, two TCP segments, two wake-ups of the client on every request.
    Here the head is held until the body's first write. The bytes on the wire are the same.
    """

    _head: bytes | None = None

    async def send(self, message: Any) -> None:
        """Hold the head of the reply; send it with the body."""
        if message["type"] == "http.response.start" and not self.response_started:
            transport = self.transport
            self.transport = held = _Held(transport)  # type: ignore[assignment]
            try:
                await super().send(message)
            finally:
                self.transport = transport
            self._head = held.data or None
            return
        if self._head is None:
            await super().send(message)
            return
        transport = self.transport
        self.transport = joined = _HeadFirst(transport, self._head)  # type: ignore[assignment]
        self._head = None
        try:
            await super().send(message)
        finally:
            self.transport = transport
            if not self.disconnected:
                joined.flush()  # nothing written (a HEAD reply, an error): the head alone


class GuardedHttpToolsProtocol(HttpToolsProtocol):
    """HttpToolsProtocol plus the connection cap and the request-arrival deadline."""

    arrival_timer: asyncio.TimerHandle | None = None

    def connection_made(  # type: ignore[override]
        self, transport: asyncio.Transport
    ) -> None:
        """Over the cap, make room (or refuse when all are busy); start the arrival deadline."""
        super().connection_made(transport)
        max_connections, _ = _limits()
        if len(self.connections) > max_connections:
            oldest = next(iter(_waiting), None)
            if oldest is None:
                _warn("busy", f"{max_connections} open connections all busy: refusing new ones")
                transport.write(BUSY)
                transport.close()
                return
            _warn(
                "full",
                f"at {max_connections} open connections: closing those waiting longest "
                "for their request",
            )
            oldest._close_waiting(BUSY)
        self._arm()

    def data_received(self, data: bytes) -> None:
        """Bytes with no request in progress start a deadline (stray bytes included)."""
        if self.cycle is None or self.cycle.response_complete:
            self._arm()
        super().data_received(data)

    def on_message_begin(self) -> None:
        """A new request: its deadline starts (kept if its bytes already started one)."""
        super().on_message_begin()
        self._arm()

    def on_message_complete(self) -> None:
        """The request is fully received: from here on the application has the time."""
        super().on_message_complete()
        self._disarm()

    def _start_asgi_task(self, cycle: RequestResponseCycle, app: Any) -> None:
        # uvicorn (0.55) builds its cycle itself; it becomes the one-write cycle here,
        # before its task first runs (pipelined requests pass here too).
        if type(cycle) is RequestResponseCycle:
            cycle.__class__ = OneWriteCycle
        super()._start_asgi_task(cycle, app)

    def connection_lost(self, exc: Exception | None) -> None:
        """Drop the timer with the connection."""
        self._disarm()
        super().connection_lost(exc)

    def _arm(self) -> None:
        if self.arrival_timer is None and not self.transport.is_closing():
            _, seconds = _limits()
            self.arrival_timer = self.loop.call_later(seconds, self._expired)
            _waiting[self] = None

    def _disarm(self) -> None:
        if self.arrival_timer is not None:
            self.arrival_timer.cancel()
            self.arrival_timer = None
        _waiting.pop(self, None)

    def _expired(self) -> None:
        self.arrival_timer = None
        _waiting.pop(self, None)
        if self.transport.is_closing():
            return
        _warn("slow", "closing connections whose request did not arrive in time")
        self._close_waiting(TIMED_OUT)

    def _close_waiting(self, reply: bytes) -> None:
        """Close a connection whose request has not fully arrived, telling the client why."""
        self._disarm()
        if self.cycle is None or self.cycle.response_complete:
            # Nothing is replying on this connection, so a reply of our own cannot collide.
            self.transport.write(reply)
        self.transport.close()
