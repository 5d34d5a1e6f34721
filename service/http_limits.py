"""Connection limits of ``rbfgate serve``: a read deadline on top of uvicorn's h11 protocol.

uvicorn closes idle keep-alive connections after ``timeout_keep_alive``, but it
arms that timer only after a response: a client that opens a connection and
sends its request line, headers or body a byte at a time (slowloris) keeps the
connection, and a file descriptor, for as long as it likes, and enough of them
exhaust the worker's descriptors so that nobody else gets in. ``ReadDeadline``
gives every request ``read_timeout`` seconds, counted from the moment the
connection opens or the previous response ends, to arrive completely (request
line, headers and body); a connection still short of a whole request then is
closed. A request whose body was cut off this way ends in the app as a client
disconnect (``service.body`` answers it with 408, which the log records).

Headers are also capped in size: h11 refuses a request whose line and headers
pass ``MAX_HEADER_BYTES`` before they are complete (uvicorn answers 400 and
closes), so memory per connection stays bounded.

The h11 implementation is used whatever else is installed, so these limits
hold on every installation.
"""

from __future__ import annotations

import asyncio
import functools
from collections.abc import Callable

import h11
from uvicorn.protocols.http.h11_impl import H11Protocol

__all__ = [
    "KEEP_ALIVE_SECONDS",
    "MAX_HEADER_BYTES",
    "ReadDeadline",
    "protocol_factory",
]

# uvicorn's default, stated here so that the documented value is the one in force.
KEEP_ALIVE_SECONDS = 5
# h11's default incomplete-event limit (16 KiB), stated here for the same reason; common
# practice for request line plus headers (nginx's default large buffers are 4 x 8 KiB).
MAX_HEADER_BYTES = 16 * 1024

# The peer has not delivered a whole request yet: nothing (IDLE) or not all of its body.
_WAITING_FOR_REQUEST = (h11.IDLE, h11.SEND_BODY)


class ReadDeadline(H11Protocol):
    """uvicorn's h11 protocol with a per-request read deadline of ``read_timeout`` seconds."""

    def __init__(self, *args, read_timeout: float, **kwargs) -> None:
        super().__init__(*args, **kwargs)
        self.read_timeout = read_timeout
        self._read_deadline: asyncio.TimerHandle | None = None

    def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
        super().connection_made(transport)
        self._arm_read_deadline()

    def on_response_complete(self) -> None:
        super().on_response_complete()
        if not self.transport.is_closing():
            self._arm_read_deadline()  # the next request on this connection gets its own deadline

    def connection_lost(self, exc: Exception | None) -> None:
        self._cancel_read_deadline()
        super().connection_lost(exc)

    def _arm_read_deadline(self) -> None:
        self._cancel_read_deadline()
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


def protocol_factory(read_timeout: float) -> Callable[..., ReadDeadline]:
    """What ``uvicorn.run(http=...)`` takes: the protocol with this deadline (picklable for workers)."""
    return functools.partial(ReadDeadline, read_timeout=read_timeout)
