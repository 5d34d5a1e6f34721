"""The write-behind log sink (service.log_lines): whole JSON lines (RFC 8259), in order, on time."""

from __future__ import annotations

import io
import json
import os
import subprocess
import sys
import threading
import time
from pathlib import Path

from fastapi.testclient import TestClient

from service.app import create_app
from service.log_lines import JsonLines
from service.settings import Settings
from service.write_behind import WriteBehind

_REPO = Path(__file__).resolve().parents[3]

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


def test_lines_logged_together_are_written_in_few_writes_of_whole_lines_within_pipe_buf():
    stream = _Recording()
    write = JsonLines(stream, flush_seconds=0.5)
    for n in range(100):
        write({"event": "request", "n": n, "pad": "x" * 200})  # ~250 bytes a line, 25 KB in all
    write({"event": "request", "n": 100, "pad": "y" * 10_000})  # one line longer than PIPE_BUF
    assert _wait_for(lambda: len(_events(stream)) == 101)
    # pipe(7): Linux keeps a pipe write of at most PIPE_BUF = 4,096 bytes whole.
    assert all(len(text.encode()) <= 4096 for text in stream.writes[:-1])
    assert stream.writes[-1].count("\n") == 1 and len(stream.writes[-1]) > 10_000  # the long line alone
    assert all(text.endswith("\n") for text in stream.writes)
    assert 7 <= len(stream.writes) <= 9  # 25 KB in chunks of up to 4 KB, not one write per line
    assert [event["n"] for event in _events(stream)] == list(range(101))


_CHILD = """
import sys
from service.log_lines import JsonLines
log = JsonLines()  # stdout: the pipe all the processes share
for n in range(2000):
    log({"event": "request", "worker": int(sys.argv[1]), "n": n, "pad": "x" * 300})
"""


def test_three_processes_writing_to_one_pipe_never_cut_each_others_lines():
    # What several rbfgate workers do: one stdout pipe, a reader (a log collector) slower than them.
    read_end, write_end = os.pipe()
    children = [subprocess.Popen([sys.executable, "-c", _CHILD, str(worker)], stdout=write_end, cwd=_REPO,
                                 env={**os.environ, "PYTHONPATH": str(_REPO)}) for worker in range(3)]
    os.close(write_end)
    data = b""
    with os.fdopen(read_end, "rb", buffering=0) as pipe:
        while chunk := pipe.read(4096):
            data += chunk
            time.sleep(0.0005)
    assert [child.wait(60) for child in children] == [0, 0, 0]
    events = [json.loads(line) for line in data.decode("utf-8").splitlines()]  # raises on a broken line
    for worker in range(3):  # every line once, in each process's order (their atexit flush wrote the rest)
        assert [event["n"] for event in events if event["worker"] == worker] == list(range(2000))


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


def test_a_failing_handler_loses_its_batch_but_not_the_writer_thread(caplog):
    handled: list[list[int]] = []

    def handle(items: list[int]) -> None:
        if not handled and items[0] == 0:
            handled.append([])  # fail once
            raise RuntimeError("a bug in the handler")
        handled.append(items)

    batch = WriteBehind(handle, seconds=0.01, name="test-writer")
    batch.add(0)
    assert _wait_for(lambda: len(handled) == 1)
    batch.add(1)
    assert _wait_for(lambda: handled[-1:] == [[1]])
    assert "test-writer: a batch could not be handled and was dropped" in caplog.text


def test_the_apps_shutdown_writes_the_pending_lines(shared_store):
    stream = io.StringIO()
    sink = JsonLines(stream, flush_seconds=3600)  # nothing would be written for an hour but for shutdown
    app = create_app(Settings(store_root=shared_store.root, poll_seconds=3600.0), environ={}, write_log=sink)
    with TestClient(app, raise_server_exceptions=True) as client:
        assert client.post("/score/iris", json={"records": [_RECORD]}).status_code == 200
        assert stream.getvalue() == ""
    requests = [event for event in _events(stream) if event.get("event") == "request"]
    assert [event["route"] for event in requests] == ["/score/{model}"]
