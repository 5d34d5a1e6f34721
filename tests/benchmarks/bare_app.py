"""The bare endpoint: FastAPI that only scores the bundle with numpy, the framework's ceiling.

No validation beyond what ``json.loads`` and indexing do, no range checks, no diagnostics, no
log line, no metrics, no authentication: one ``async`` handler (no thread hand-off) that reads
the body, stacks the records' features into an array, computes the decision with plain numpy
from the bundle's own arrays and writes labels and decisions with ``json.dumps``. Whatever it
costs per request is what FastAPI, uvicorn and the kernel expansion cost; rbfgate is measured
as a share of its requests/s (tests/benchmarks/service_bench.py).

    BARE_BUNDLE=path/to/bundle uvicorn tests.benchmarks.bare_app:app --no-access-log

It reads the bundle's manifest and ``.npy`` files itself (``allow_pickle=False``), not through
rbfgate's scorer, so its numbers are an independent computation of the same model: the
benchmark checks that its labels and decisions agree with rbfgate's and the reference's. Binary
StandardScaler + SVC bundles only (the benchmark's model).

Decision, as scikit-learn's ``decision_function`` for a binary SVC (its public ``dual_coef_``
and ``intercept_``, which the bundle stores): ``sum_j dual_coef_j exp(-gamma |z - s_j|^2) +
intercept`` with ``z = (x - center) / scale``; label ``classes[1]`` when it is positive.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
from fastapi import FastAPI, Request
from starlette.responses import Response

__all__ = ["app"]

_BUNDLE = Path(os.environ["BARE_BUNDLE"])
_MANIFEST = json.loads((_BUNDLE / "manifest.json").read_text(encoding="utf-8"))
FEATURES = [feature["name"] for feature in _MANIFEST["features"]]
CLASSES = _MANIFEST["classifier"]["classes"]
if len(CLASSES) != 2:
    raise SystemExit(f"bare_app scores binary bundles only; {_BUNDLE} has {len(CLASSES)} classes")
CENTER = np.asarray(_MANIFEST["scaler"]["center"], dtype=np.float64)
SCALE = np.asarray(_MANIFEST["scaler"]["scale"], dtype=np.float64)
GAMMA = float(_MANIFEST["kernel"]["gamma"])
INTERCEPT = float(_MANIFEST["classifier"]["intercepts"][0])
SUPPORT = np.load(_BUNDLE / "support_vectors.npy", allow_pickle=False)  # (n_sv, f), scaled space
COEF = np.load(_BUNDLE / "dual_coef.npy", allow_pickle=False)[0]  # (n_sv,)
SUPPORT_SQ = np.einsum("ij,ij->i", SUPPORT, SUPPORT)

app = FastAPI(title="bare scoring endpoint", openapi_url="/openapi.json", docs_url="/docs")


@app.post("/score")
async def score(request: Request) -> Response:
    records = json.loads(await request.body())["records"]
    X = np.array([[record[name] for name in FEATURES] for record in records], dtype=np.float64)
    Z = (X - CENTER) / SCALE
    d2 = np.maximum(np.einsum("ij,ij->i", Z, Z)[:, None] + SUPPORT_SQ - 2.0 * (Z @ SUPPORT.T), 0.0)
    decisions = np.exp(-GAMMA * d2) @ COEF + INTERCEPT
    results = [{"label": CLASSES[1] if decision > 0 else CLASSES[0], "decision": decision}
               for decision in decisions.tolist()]
    return Response(json.dumps({"results": results}), media_type="application/json")
