"""The write-behind log sink (service.log_lines): whole JSON lines (RFC 8259), in order, on time."""

from __future__ import annotations

import io
import json
import threading
import time

from fastapi.testclient import TestClient

from service.app import create_app
from service.log_lines import JsonLines
from service.settings import Settings

_RECORD = {"sepal_length_cm": 5.1, "sepal_width_cm": 3.5, "petal_length_cm": 1.4, "petal_width_cm": 0.2}


class _Recording(io.StringIO):
    """A stream that remembers each write call's text."""

    def __init__(self) -> None:
        super().__init__()
        self.writes: list[str] = []

    def write(self, text: str) -> int:
        self.writes.append(text)
        return super().write(text)


def _events(stream: io.StringIO) -> list[dict]:
    return [json.loads(line) for line in stream.getvalue().splitlines()]


def _wait_for(condition, seconds: float = 5.0) -> bool:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if condition():
            return True
        time.sleep(0.01)
    return condition()


def test_lines_reach_the_stream_without_a_flush_within_the_interval():
    stream = _Recording()
    write = JsonLines(stream, flush_seconds=0.05)
    write({"event": "request", "n": 1})
    assert _wait_for(lambda: len(stream.getvalue().splitlines()) == 1)
    assert _events(stream)[0]["n"] == 1


def test_lines_logged_together_are_written_with_one_write():
    stream = _Recording()
    write = JsonLines(stream, flush_seconds=0.5)
    for n in range(100):
        write({"event": "request", "n": n})
    assert _wait_for(lambda: len(stream.writes) >= 1)
    assert len(stream.writes) == 1  # one batch: 100 lines, logged well within the half second
    assert [event["n"] for event in _events(stream)] == list(range(100))


def test_nothing_is_written_before_the_interval_or_a_flush():
    stream = _Recording()
    write = JsonLines(stream, flush_seconds=3600)
    write({"event": "request"})
    time.sleep(0.05)
    assert stream.writes == []
    write.flush()
    assert [event["event"] for event in _events(stream)] == ["request"]


def test_zero_interval_writes_each_line_at_once():
    stream = _Recording()
    write = JsonLines(stream, flush_seconds=0)
    write({"event": "request", "n": 1})
    assert [event["n"] for event in _events(stream)] == [1]
    write({"event": "request", "n": 2})
    assert len(stream.writes) == 2


def test_a_line_holds_the_values_the_event_had_when_it_was_logged():
    stream = io.StringIO()
    write = JsonLines(stream, flush_seconds=3600)
    event = {"event": "request", "status": 200}
    write(event)
    event["status"] = 500
    write.flush()
    assert _events(stream)[0]["status"] == 200


def test_lines_from_many_threads_are_whole_each_once_and_in_each_threads_order():
    stream = io.StringIO()
    write = JsonLines(stream, flush_seconds=0.01)

    def log(thread: int) -> None:
        for n in range(300):
            write({"event": "request", "thread": thread, "n": n})

    threads = [threading.Thread(target=log, args=(thread,)) for thread in range(6)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    write.flush()
    events = _events(stream)  # json.loads raises on any line that is split or interleaved
    assert len(events) == 6 * 300
    for thread in range(6):
        assert [event["n"] for event in events if event["thread"] == thread] == list(range(300))


def test_a_broken_stream_does_not_stop_later_lines(tmp_path):
    class Flaky(io.StringIO):
        fail = True

        def write(self, text: str) -> int:
            if Flaky.fail:
                Flaky.fail = False
                raise OSError(28, "No space left on device")
            return super().write(text)

    stream = Flaky()
    write = JsonLines(stream, flush_seconds=0.01)
    write({"event": "lost"})
    assert _wait_for(lambda: not Flaky.fail)
    write({"event": "kept"})
    assert _wait_for(lambda: "kept" in stream.getvalue())


def test_the_apps_shutdown_writes_the_pending_lines(shared_store):
    stream = io.StringIO()
    sink = JsonLines(stream, flush_seconds=3600)  # nothing would be written for an hour but for shutdown
    app = create_app(Settings(store_root=shared_store.root, poll_seconds=3600.0), environ={}, write_log=sink)
    with TestClient(app, raise_server_exceptions=True) as client:
        assert client.post("/score/iris", json={"records": [_RECORD]}).status_code == 200
        assert stream.getvalue() == ""
    requests = [event for event in _events(stream) if event.get("event") == "request"]
    assert [event["route"] for event in requests] == ["/score/{model}"]
