"""Benchmarks: rbfgate's scorer and service against scikit-learn and a hand-written endpoint.

Not collected by the default test run (the tests here are marked ``benchmark``);
run them all with ``python3 -m tests.benchmarks.run --out tests/benchmarks/results``.
"""
