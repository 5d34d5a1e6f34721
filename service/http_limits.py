"""Connection limits of ``rbfgate serve``: a read deadline on top of uvicorn's h11 protocol.

uvicorn closes idle keep-alive connections after ``timeout_keep_alive``, but it
arms that timer only after a response: a client that opens a connection and
sends its request line, headers or body a byte at a time (slowloris) keeps the
connection, and a file descriptor, for as long as it likes, and enough of them
exhaust the worker's descriptors so that nobody else gets in. ``GuardedH11Protocol``
gives every request ``read_timeout`` seconds, counted from the moment the
connection opens or the previous response ends, to arrive completely (request
line, headers and body); a connection still short of a whole request then is
closed. A request whose body was cut off this way ends in the app as a client
disconnect (``service.body`` answers it with 408, which the log records).

Headers are also capped in size. h11 refuses a request whose line and headers
pass ``MAX_HEADER_BYTES`` before they are complete (uvicorn answers 400, plain
text, and closes), so memory per connection stays bounded; a header block
that arrives whole in one read slips past that check, so ``HeaderSizeLimit``
refuses it in the app with 431 (RFC 6585 section 5) problem details.

When h11 refuses a request midway (say a malformed chunk of a body the app is
already reading), uvicorn answers 400 and closes while the app is still at
work; the app's own answer then hits a closed connection and is logged as an
internal error. ``GuardedH11Protocol`` tells the app its client is gone instead.

Connections are capped per worker at ``max_connections``, which ``rbfgate serve`` keeps below
the process's descriptor limit. uvicorn's own ``limit_concurrency`` does not do this: past its
limit it still accepts every connection and answers each new *request* 503, so slow clients that
hold the connections would turn every real request away. Here a connection accepted past the cap
makes room instead: the connection that has waited longest for its request to arrive (the slowest
sender, or the longest-idle keep-alive) is closed, so a client that sends its request promptly
always gets in while slow ones are shed. Connections whose request the app is answering are never
shed; if every connection is busy, the new one is closed at once (nothing was read, so retrying
is safe).

The h11 implementation is used whatever else is installed, so these limits
hold on every installation.
"""

from __future__ import annotations

import asyncio
import functools
from collections.abc import Callable

import h11
from starlette.types import ASGIApp, Receive, Scope, Send
from uvicorn.protocols.http.h11_impl import H11Protocol

from service.problems import ServiceProblem, problem_response

__all__ = [
    "DESCRIPTOR_RESERVE",
    "GuardedH11Protocol",
    "HeaderSizeLimit",
    "KEEP_ALIVE_SECONDS",
    "MAX_HEADER_BYTES",
    "connection_cap",
    "protocol_factory",
]

# uvicorn's default, stated here so that the documented value is the one in force.
KEEP_ALIVE_SECONDS = 5
# h11's default incomplete-event limit (16 KiB), stated here for the same reason; common
# practice for request line plus headers (nginx's default large buffers are 4 x 8 KiB).
MAX_HEADER_BYTES = 16 * 1024

# Descriptors a worker needs besides its connections: the listening socket, stdio, the store's
# files while reading a version, prometheus-client's multiprocess files, Python's own (common
# practice: a margin of a few dozen; a worker measured here holds about 30 with no connections).
DESCRIPTOR_RESERVE = 64

# The peer has not delivered a whole request yet: nothing (IDLE) or not all of its body.
_WAITING_FOR_REQUEST = (h11.IDLE, h11.SEND_BODY)


class GuardedH11Protocol(H11Protocol):
    """uvicorn's h11 protocol with a per-request read deadline of ``read_timeout`` seconds."""

    def __init__(self, *args, read_timeout: float, max_connections: int | None = None, **kwargs) -> None:
        super().__init__(*args, **kwargs)
        self.read_timeout = read_timeout
        self.max_connections = max_connections
        self._read_deadline: asyncio.TimerHandle | None = None
        self._waiting_since = 0.0  # loop time when this connection began waiting for a request

    def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
        super().connection_made(transport)
        self._arm_read_deadline()
        if self.max_connections is not None and len(self.connections) > self.max_connections:
            self._make_room()

    def waiting_for_request(self) -> bool:
        """True while the peer has not delivered a whole request and the app is not answering one."""
        if self.transport.is_closing() or self.conn.their_state not in _WAITING_FOR_REQUEST:
            return False
        return self.cycle is None or self.cycle.response_complete or not self.cycle.response_started

    def _make_room(self) -> None:
        """Close the connection that has waited longest for its request; this one if none is waiting."""
        waiting = [
            other for other in self.connections
            if other is not self and isinstance(other, GuardedH11Protocol) and other.waiting_for_request()
        ]
        victim = min(waiting, key=lambda other: other._waiting_since, default=self)
        if victim is self:
            self.logger.info("%d connections are all busy; closing a new one", len(self.connections) - 1)
        victim.transport.close()  # connection_lost removes it from the set and wakes a waiting app

    def on_response_complete(self) -> None:
        super().on_response_complete()
        if not self.transport.is_closing():
            self._arm_read_deadline()  # the next request on this connection gets its own deadline

    def connection_lost(self, exc: Exception | None) -> None:
        self._cancel_read_deadline()
        super().connection_lost(exc)

    def send_400_response(self, msg: str) -> None:
        cycle = self.cycle
        if cycle is not None and not cycle.response_complete:
            cycle.disconnected = True  # the app's answer is dropped; its reads see a disconnect
            cycle.message_event.set()
            if cycle.response_started:  # too late for a 400: just end the connection
                self.transport.close()
                return
        super().send_400_response(msg)

    def _arm_read_deadline(self) -> None:
        self._cancel_read_deadline()
        self._waiting_since = self.loop.time()
        self._read_deadline = self.loop.call_later(self.read_timeout, self._on_read_deadline)

    def _cancel_read_deadline(self) -> None:
        if self._read_deadline is not None:
            self._read_deadline.cancel()
            self._read_deadline = None

    def _on_read_deadline(self) -> None:
        self._read_deadline = None
        if self.transport.is_closing() or self.conn.their_state not in _WAITING_FOR_REQUEST:
            return  # the request arrived in time; the app is answering it
        if self.cycle is not None and not self.cycle.response_complete and self.conn.their_state is h11.SEND_BODY:
            self.logger.info("closing a connection whose request body did not arrive within %g s", self.read_timeout)
        self.transport.close()  # connection_lost tells a waiting app that the client is gone


def protocol_factory(read_timeout: float, max_connections: int | None = None) -> Callable[..., GuardedH11Protocol]:
    """What ``uvicorn.run(http=...)`` takes: the protocol with these limits (picklable for workers)."""
    return functools.partial(GuardedH11Protocol, read_timeout=read_timeout, max_connections=max_connections)


def connection_cap(requested: int, descriptor_limit: int) -> int:
    """``requested``, lowered so that the connections leave ``DESCRIPTOR_RESERVE`` descriptors of
    ``descriptor_limit`` (RLIMIT_NOFILE, per process) for the listening socket, the store, the logs
    and the metrics files; at least 8."""
    return max(8, min(requested, descriptor_limit - DESCRIPTOR_RESERVE))


class HeaderSizeLimit:
    """ASGI middleware: 431 for a request whose target and headers exceed ``limit`` bytes."""

    def __init__(self, app: ASGIApp, limit: int = MAX_HEADER_BYTES) -> None:
        self.app = app
        self.limit = limit

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] == "http":
            size = len(scope.get("raw_path") or b"") + sum(len(name) + len(value) + 4 for name, value in scope["headers"])
            if size > self.limit:
                problem = ServiceProblem(
                    431, "headers-too-large", "Request header fields too large",
                    f"the request target and headers hold {size} bytes; the limit is {self.limit}",
                )
                await problem_response(problem)(scope, receive, send)
                return
        await self.app(scope, receive, send)
