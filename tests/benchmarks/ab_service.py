"""Two versions of rbfgate under the same load, alternating: server CPU per request, A against B.

    git worktree add /tmp/rbfgate-before HEAD          # A: the committed code
    python3 -m tests.benchmarks.ab_service /tmp/rbfgate-before .          # B: the working tree
    python3 -m tests.benchmarks.ab_service A B --records 1000 --rounds 8 --form columns

Starts ``rbfgate serve`` (one worker) from each source tree on one store holding the service
benchmark's model (989 support vectors x 10 features, cached under results/cache), then runs wrk
(8 connections, 3 s after a 1 s warm-up) against A and B in turn, swapping the order every round,
and prints each side's median CPU time per request (user + system, every process of the server,
from /proc) and requests/s. Alternating in one run is what makes a difference of a few percent
visible on a shared machine: numbers taken minutes apart differ by more than that (a median over
8 rounds of the same tree against itself differed by 2 us of ~315 here, 2026-12-03). Each tree is
put first on ``sys.path`` of its own server, so the installed rbfgate is not what runs.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
from pathlib import Path

__all__ = ["main"]

_CACHE = Path(__file__).resolve().parent / "results" / "cache"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python3 -m tests.benchmarks.ab_service", description=__doc__.split("\n")[0])
    parser.add_argument("a", type=Path, help="source tree A (a checkout of rbfgate)")
    parser.add_argument("b", type=Path, help="source tree B")
    parser.add_argument("--records", type=int, default=1, help="records per request (default 1)")
    parser.add_argument("--form", choices=("records", "columns"), default="records")
    parser.add_argument("--rounds", type=int, default=8, help="wrk runs per side (default 8)")
    args = parser.parse_args(argv)
    for tree in (args.a, args.b):
        if not (tree / "service" / "app.py").is_file():
            parser.error(f"{tree}: not an rbfgate source tree (no service/app.py)")
    if args.form == "columns" and args.records < 2:
        parser.error("--form columns: the column-form body is written for --records above 1")

    from model_store.bundle import load_bundle

    from .load_generator import ensure_wrk, run_wrk
    from .models import cached_model
    from .servers import Server, _clean_environ, free_port
    from .service_bench import _write_bodies, publish_model

    model = cached_model(_CACHE, 1000, 10)
    with tempfile.TemporaryDirectory(prefix="rbfgate-ab-") as folder:
        workdir = Path(folder)
        name, _ = publish_model(workdir / "store", model.bundle_path)
        body = _write_bodies(workdir, load_bundle(model.bundle_path), model.reference, [args.records])[args.records][args.form]
        wrk = ensure_wrk(print)
        servers = {side: _server(Server, free_port, _clean_environ, tree.resolve(), workdir, side)
                   for side, tree in (("A", args.a), ("B", args.b))}
        with servers["A"], servers["B"]:
            rounds: dict[str, list[tuple[float, float]]] = {"A": [], "B": []}
            for index in range(args.rounds):
                for side in ("A", "B") if index % 2 == 0 else ("B", "A"):
                    url = f"{servers[side].url}/score/{name}"
                    run_wrk(wrk, url, body, connections=8, seconds=1.0)
                    before = servers[side].cpu_seconds()
                    load = run_wrk(wrk, url, body, connections=8, seconds=3.0)
                    if load.non_2xx or load.socket_errors:
                        raise SystemExit(f"{side}: {load.non_2xx} non-2xx answers, {load.socket_errors} socket errors")
                    cpu_us = 1e6 * (servers[side].cpu_seconds() - before) / load.requests
                    rounds[side].append((cpu_us, load.requests / load.seconds))
    for side, tree in (("A", args.a), ("B", args.b)):
        cpu = [value for value, _ in rounds[side]]
        print(f"{side} {tree}: server CPU {statistics.median(cpu):.1f} us/request (median of "
              f"{' '.join(f'{value:.0f}' for value in cpu)}), {statistics.median(r for _, r in rounds[side]):.0f} requests/s")
    a_cpu = statistics.median(value for value, _ in rounds["A"])
    b_cpu = statistics.median(value for value, _ in rounds["B"])
    print(f"B / A server CPU per request: {b_cpu / a_cpu:.3f}")
    return 0


def _server(server_class, free_port, clean_environ, tree: Path, workdir: Path, side: str):
    """``rbfgate serve`` run from ``tree``: the tree first on sys.path, whatever is installed."""
    port = free_port()
    environ = clean_environ({})
    environ["PYTHONPATH"] = str(tree)
    launch = (f"import sys; sys.path.insert(0, {str(tree)!r}); sys.argv[0] = 'rbfgate'; "
              "from model_store.cli import main; sys.exit(main(sys.argv[1:]))")
    args = [sys.executable, "-c", launch, "serve", "--store", str(workdir / "store"), "--host", "127.0.0.1",
            "--port", str(port), "--workers", "1"]
    return server_class(f"ab-{side}", args, port, workdir, "/readyz", environ)


if __name__ == "__main__":
    sys.exit(main())
