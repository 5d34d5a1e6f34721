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

Two HTTP parsers carry these limits: httptools (``GuardedHttpToolsProtocol``, the C parser the
``serve`` extra installs; measured in tests/benchmarks it took a third off the server CPU of a
one-record request compared with h11) and h11 (``GuardedH11Protocol``, pure Python, used when
httptools is not installed). Both run the same deadline and shedding code (``_RequestGuard``);
they differ only in how they tell that a whole request has arrived and in how the header cap is
counted: h11 counts its own incomplete-event buffer, and the httptools protocol counts the bytes
received since a request began until its headers are complete, with the same 16 KiB limit and
the same plain-text 400.
"""

from __future__ import annotations

import asyncio
import functools
from collections.abc import Callable

import h11
from starlette.types import ASGIApp, Receive, Scope, Send
from uvicorn.protocols.http.h11_impl import H11Protocol

try:  # the serve extra installs httptools; without it the h11 protocol carries the limits
    from uvicorn.protocols.http.httptools_impl import HttpToolsProtocol
except ImportError:  # pragma: no cover - depends on the installation
    HttpToolsProtocol = None

from service.problems import ServiceProblem, problem_response

__all__ = [
    "DESCRIPTOR_RESERVE",
    "GuardedH11Protocol",
    "GuardedHttpToolsProtocol",
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


class _RequestGuard:
    """The read deadline and the connection cap, for a uvicorn protocol class that comes after it.

    The protocol supplies ``_whole_request_received()``: True once the peer has sent the current
    request completely (the app is answering it, or about to).
    """

    def _guard_init(self, read_timeout: float, max_connections: int | None) -> None:
        self.read_timeout = read_timeout
        self.max_connections = max_connections
        self._read_deadline: asyncio.TimerHandle | None = None
        self._waiting_since = 0.0  # loop time when this connection began waiting for a request

    def _whole_request_received(self) -> bool:
        raise NotImplementedError

    def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
        super().connection_made(transport)
        self._arm_read_deadline()
        if self.max_connections is not None and len(self.connections) > self.max_connections:
            self._make_room()

    def waiting_for_request(self) -> bool:
        """True while the peer has not delivered a whole request and the app is not answering one."""
        if self.transport.is_closing() or self._whole_request_received():
            return False
        return self.cycle is None or self.cycle.response_complete or not self.cycle.response_started

    def _make_room(self) -> None:
        """Close the connection that has waited longest for its request; this one if none is waiting."""
        waiting = [
            other for other in self.connections
            if other is not self and isinstance(other, _RequestGuard) and other.waiting_for_request()
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
        """Start this connection's wait for a whole request now; it may last ``read_timeout`` seconds.

        One timer per connection, moved lazily: a keep-alive connection's next request only records
        when its wait began, and a timer that fires early for that reason sets itself again for the
        rest of the wait. Cancelling and making a timer on every request cost about 5% of a
        one-record request's server CPU (tests/benchmarks, A/B under wrk, 2026-12-03).
        """
        self._waiting_since = self.loop.time()
        if self._read_deadline is None:
            self._read_deadline = self.loop.call_later(self.read_timeout, self._on_read_deadline)

    def _cancel_read_deadline(self) -> None:
        if self._read_deadline is not None:
            self._read_deadline.cancel()
            self._read_deadline = None

    def _on_read_deadline(self) -> None:
        self._read_deadline = None
        if self.transport.is_closing() or self._whole_request_received():
            return  # the request arrived in time; the app is answering it (its end arms the next wait)
        remaining = self._waiting_since + self.read_timeout - self.loop.time()
        if remaining > 0:  # a later request began this wait: its deadline is still ahead
            self._read_deadline = self.loop.call_later(remaining, self._on_read_deadline)
            return
        if self.cycle is not None and not self.cycle.response_complete:
            self.logger.info("closing a connection whose request body did not arrive within %g s", self.read_timeout)
        self.transport.close()  # connection_lost tells a waiting app that the client is gone


class GuardedH11Protocol(_RequestGuard, H11Protocol):
    """uvicorn's h11 protocol with a per-request read deadline of ``read_timeout`` seconds."""

    def __init__(self, *args, read_timeout: float, max_connections: int | None = None, **kwargs) -> None:
        super().__init__(*args, **kwargs)
        self._guard_init(read_timeout, max_connections)

    def _whole_request_received(self) -> bool:
        return self.conn.their_state not in _WAITING_FOR_REQUEST


if HttpToolsProtocol is not None:

    class GuardedHttpToolsProtocol(_RequestGuard, HttpToolsProtocol):
        """uvicorn's httptools protocol with the same deadline, cap and header limit as ``GuardedH11Protocol``."""

        def __init__(self, *args, read_timeout: float, max_connections: int | None = None,
                     max_header_bytes: int = MAX_HEADER_BYTES, **kwargs) -> None:
            super().__init__(*args, **kwargs)
            self._guard_init(read_timeout, max_connections)
            self.max_header_bytes = max_header_bytes
            self._head_bytes = 0  # bytes received since the current request began, until its headers are complete
            self._headers_complete = False
            self._request_complete = False

        def _whole_request_received(self) -> bool:
            return self._request_complete

        def data_received(self, data: bytes) -> None:
            if not self._headers_complete:
                self._head_bytes += len(data)
            super().data_received(data)
            if not self._headers_complete and self._head_bytes > self.max_header_bytes and not self.transport.is_closing():
                # What h11 does with an incomplete request line and headers past its limit.
                self.logger.warning("request line and headers passed %d bytes before they were complete",
                                    self.max_header_bytes)
                self.send_400_response("Invalid HTTP request received.")

        def on_message_begin(self) -> None:
            super().on_message_begin()
            self._request_complete = False

        def on_headers_complete(self) -> None:
            self._headers_complete = True
            self._head_bytes = 0
            super().on_headers_complete()
            if self.cycle is not None and self.cycle.scope["method"] != "HEAD":  # a HEAD answer has no body write
                self.cycle.transport = _HeadWithBody(self.transport, self.cycle)

        def on_message_complete(self) -> None:
            self._request_complete = True
            super().on_message_complete()

        def on_response_complete(self) -> None:
            if not self.pipeline:  # the next request has not arrived yet
                self._request_complete = False
                self._headers_complete = False
                self._head_bytes = 0
            super().on_response_complete()

else:  # pragma: no cover - depends on the installation
    GuardedHttpToolsProtocol = None


class _HeadWithBody:
    """One request's view of the connection's transport: the response head goes out with the first body write.

    uvicorn's httptools protocol writes the status line and headers when the app starts its answer
    and the body when the app sends it, two ``send`` calls for every answer. On loopback each one
    costs the sender the receiver's TCP work too: profiled with py-spy under wrk, the two writes
    were a fifth of a one-record request's server CPU. Holding the head back until the body (or
    a close) joins them into one write; the bytes on the wire are the same, in the same order.
    Only the first write after the answer has started is held (a ``100 Continue`` is written
    before, and is never held), and never for a HEAD request, whose answer has no body write.
    """

    def __init__(self, transport: asyncio.Transport, cycle) -> None:
        self._transport = transport
        self._cycle = cycle
        self._head: bytes | None = None
        self._head_written = False

    def write(self, data: bytes) -> None:
        if self._head is not None:
            data, self._head = self._head + data, None
        elif self._cycle.response_started and not self._head_written:
            self._head, self._head_written = data, True
            return
        self._transport.write(data)

    def close(self) -> None:
        if self._head is not None:
            self._transport.write(self._head)
            self._head = None
        self._transport.close()

    def is_closing(self) -> bool:
        return self._transport.is_closing()  # asked several times per answer: no __getattr__ detour

    def __getattr__(self, name: str):
        return getattr(self._transport, name)  # get_extra_info, ...


def protocol_factory(read_timeout: float, max_connections: int | None = None,
                     parser: str | None = None) -> Callable[..., _RequestGuard]:
    """What ``uvicorn.run(http=...)`` takes: the protocol with these limits (picklable for workers).

    ``parser`` is "httptools" or "h11"; None picks httptools when it is installed.
    """
    if parser is None:
        parser = "httptools" if HttpToolsProtocol is not None else "h11"
    if parser == "httptools" and HttpToolsProtocol is None:
        raise RuntimeError("httptools is not installed; install the serve extra, or use the h11 parser")
    protocol = GuardedHttpToolsProtocol if parser == "httptools" else GuardedH11Protocol
    return functools.partial(protocol, read_timeout=read_timeout, max_connections=max_connections)


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
