"""Where a real ``rbfgate serve`` worker spends its time under load: py-spy samples while wrk sends one body.

    python3 -m tests.benchmarks.profile_service --records 1000 --seconds 8    # needs py-spy and wrk
    python3 -m tests.benchmarks.profile_service --records 1000 --form columns  # the column-form body
    python3 -m tests.benchmarks.profile_service --records 1000 --form columns --gil --scoring-threads 2

Publishes the service benchmark's model (989 support vectors x 10 features, fitted once and cached
under tests/benchmarks/results/cache like the benchmark's), starts ``rbfgate serve`` with one
worker, warms it with wrk, then samples the worker with py-spy (``--nonblocking``, so the worker is
never paused; 200 Hz; every thread) while wrk keeps 8 connections busy with a body of ``--records``
records (``--form``: the record form ``{"records": [...]}`` or, for more than one record, the
column form ``{"columns": {...}}`` of the same rows). It prints each thread's share of the
samples, rbfgate's own frames with the largest inclusive shares, and the frames that are most often the innermost Python frame, and keeps py-spy's raw output (``--out``) for a flame
graph. Native work shows up under the Python frame that called it: "Runner.run" as the innermost
frame is the event loop's own C work (socket reads and writes, HTTP parsing). With ``--gil`` only
the thread holding the GIL is sampled: samples / (rate x seconds) is then the share of the time the
GIL was held, and the frames are the Python work that more scoring threads cannot overlap (py-spy
reads the GIL holder without pausing the worker, so treat it as an estimate). py-spy is a sampling
profiler from outside the process (https://github.com/benfred/py-spy); install it with
``pip install py-spy``. Shares, not times, are the result: the machine is shared and noisy.
"""

from __future__ import annotations

import argparse
import re
import subprocess
import sys
import tempfile
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

__all__ = ["ProfileSummary", "main", "summarise"]

_CACHE = Path(__file__).resolve().parent / "results" / "cache"
# "/…/lib/python3.11/site-packages/uvicorn/main.py" -> "uvicorn/main.py"; the same for the standard
# library ("asyncio/runners.py") and this repository ("service/body.py").
_SITE = re.compile(r" \((?:/[^()]*?/(?:lib/python3\.\d+/site-packages|site-packages|lib/python3\.\d+)/"
                   r"|/[^()]*?/(?=model_store/|service/|tests/))")
_OWN = re.compile(r" \((?:model_store|service)/")
_RATE = 200  # samples per second


@dataclass(frozen=True)
class ProfileSummary:
    """Sample counts from py-spy's raw (collapsed-stack) output."""

    samples: int
    threads: Counter        # thread name -> samples
    inclusive: Counter      # frame -> samples whose stack holds it (once per stack)
    innermost: Counter      # frame -> samples where it is the innermost Python frame

    def render(self, top: int = 30) -> str:
        lines = [f"{self.samples} samples"]
        lines += [f"{100 * count / self.samples:5.1f} %  {name}" for name, count in self.threads.most_common()]
        lines.append("-- inclusive: rbfgate's own frames")
        own = [(frame, count) for frame, count in self.inclusive.most_common() if _OWN.search(frame)]
        lines += [f"{100 * count / self.samples:5.1f} %  {frame}" for frame, count in own[:top]]
        lines.append("-- innermost Python frame")
        lines += [f"{100 * count / self.samples:5.1f} %  {frame}" for frame, count in self.innermost.most_common(top)]
        return "\n".join(lines)


def summarise(raw_lines) -> ProfileSummary:
    """Count py-spy ``--format raw`` lines: ``thread (id): name;frame;frame;... count``, outermost first."""
    threads, inclusive, innermost = Counter(), Counter(), Counter()
    samples = 0
    for line in raw_lines:
        line = line.strip()
        if not line:
            continue
        stack, count_text = line.rsplit(" ", 1)
        count = int(count_text)
        thread, *frames = stack.split(";")
        frames = [_SITE.sub(" (", frame) for frame in frames]
        samples += count
        threads[thread] += count
        for frame in set(frames):
            inclusive[frame] += count
        if frames:
            innermost[frames[-1]] += count
    return ProfileSummary(samples, threads, inclusive, innermost)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--records", type=int, default=1000, help="records per request (default 1000)")
    parser.add_argument("--seconds", type=float, default=8.0, help="seconds of sampling (default 8)")
    parser.add_argument("--form", choices=("records", "columns"), default="records",
                        help="the body's form (default records; columns needs --records above 1)")
    parser.add_argument("--out", type=Path, default=Path("profile-raw.txt"), help="py-spy's raw output")
    parser.add_argument("--top", type=int, default=30, help="frames to print in each list")
    parser.add_argument("--gil", action="store_true",
                        help="keep only the samples of the thread holding the GIL: the Python work that one "
                        "worker cannot spread over more threads")
    parser.add_argument("--scoring-threads", type=int, help="the worker's --scoring-threads (default: serve's)")
    args = parser.parse_args(argv)
    if args.form == "columns" and args.records < 2:
        parser.error("--form columns: the column-form body is written for --records above 1")

    from model_store.bundle import load_bundle

    from .load_generator import ensure_wrk, run_wrk
    from .models import cached_model
    from .servers import rbfgate_server
    from .service_bench import _write_bodies, publish_model

    spy = _py_spy()
    model = cached_model(_CACHE, 1000, 10)
    with tempfile.TemporaryDirectory(prefix="rbfgate-profile-") as folder:
        workdir = Path(folder)
        name, _ = publish_model(workdir / "store", model.bundle_path)
        body = _write_bodies(workdir, load_bundle(model.bundle_path), model.reference, [args.records])[args.records][args.form]
        wrk = ensure_wrk(print)
        threads = () if args.scoring_threads is None else ("--scoring-threads", str(args.scoring_threads))
        with rbfgate_server(workdir / "store", 1, workdir, None, *threads) as server:
            url = f"{server.url}/score/{name}"
            run_wrk(wrk, url, body, connections=8, seconds=2.0)
            worker = _worker_pid(server.process.pid)
            sampler = subprocess.Popen([spy, "record", "-p", str(worker), "-d", f"{args.seconds:g}", "-r", str(_RATE),
                                        "-f", "raw", "-o", str(args.out), "--threads", "--nonblocking",
                                        *(["--gil"] if args.gil else [])])
            load = run_wrk(wrk, url, body, connections=8, seconds=args.seconds + 1.0)
            if sampler.wait(timeout=args.seconds + 60) != 0:
                raise SystemExit(f"py-spy failed (exit {sampler.returncode}); it needs ptrace rights on the worker")
    print(f"{load.requests} requests of {args.records} record(s) ({args.form} form), {load.requests / load.seconds:.0f} req/s while sampled")
    summary = summarise(args.out.read_text().splitlines())
    if args.gil:  # one sample per tick at most while some thread holds the GIL
        print(f"the GIL was held in about {summary.samples / (_RATE * args.seconds):.0%} of the sampled time")
    print(summary.render(args.top))
    print(f"raw samples: {args.out}")
    return 0


def _py_spy() -> str:
    candidate = Path(sys.executable).with_name("py-spy")
    if candidate.exists():
        return str(candidate)
    raise SystemExit("py-spy is not installed beside this Python; install it with `python3 -m pip install py-spy`")


def _worker_pid(leader: int) -> int:
    """The newest process in the server's process group: the one that runs the app (with one
    worker, uvicorn serves from the ``rbfgate serve`` process itself)."""
    found = subprocess.run(["pgrep", "-g", str(leader)], capture_output=True, text=True, check=True).stdout.split()
    return int(found[-1])


if __name__ == "__main__":
    raise SystemExit(main())
