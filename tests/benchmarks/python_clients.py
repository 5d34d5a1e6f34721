"""N Python client processes posting one body in a loop (``python -m tests.benchmarks.python_clients URL BODY N SECONDS``).

A load that, unlike wrk, costs the client side real CPU on the same cores, as callers written in Python on
the same machine would. Each process stops after SECONDS or on SIGINT/SIGTERM; the parent then prints
``RESULT requests=... non2xx=...`` like post.lua does.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import sys
import time

__all__ = ["main"]


def _client(url: str, body: bytes, seconds: float, counts) -> None:
    import httpx

    signal.signal(signal.SIGINT, signal.SIG_DFL)
    headers = {"Content-Type": "application/json"}
    token = os.environ.get("BENCH_TOKEN")
    if token:
        headers["Authorization"] = f"Bearer {token}"
    deadline = time.monotonic() + seconds
    done = failed = 0
    with httpx.Client(timeout=30.0) as client:
        while time.monotonic() < deadline:
            response = client.post(url, content=body, headers=headers)
            done += 1
            failed += response.status_code >= 300
            if done % 50 == 0:
                with counts.get_lock():
                    counts[0] += 50
    with counts.get_lock():
        counts[0] += done % 50
        counts[1] += failed


def main(argv: list[str]) -> None:
    url, body_path, processes, seconds = argv[0], argv[1], int(argv[2]), float(argv[3])
    body = open(body_path, "rb").read()
    counts = multiprocessing.Array("q", 2)
    workers = [multiprocessing.Process(target=_client, args=(url, body, seconds, counts)) for _ in range(processes)]
    for worker in workers:
        worker.start()
    stop = {"now": False}
    signal.signal(signal.SIGINT, lambda *_: stop.update(now=True))
    while any(worker.is_alive() for worker in workers) and not stop["now"]:
        time.sleep(0.1)
    for worker in workers:
        worker.terminate()
        worker.join(10)
    print(f"RESULT requests={counts[0]} non2xx={counts[1]}", flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
