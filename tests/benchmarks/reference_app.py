"""The reference endpoint: what a team would write in an afternoon without rbfgate.

FastAPI, a scikit-learn pipeline loaded with joblib, a pydantic model of the
features, and a handler calling predict and decision_function. Its model file
comes from $REFERENCE_MODEL (the same fitted pipeline rbfgate's bundle was
exported from) and its feature names from $REFERENCE_FEATURES (comma-separated,
the bundle's feature order); the pydantic model is built from those names, as a
team would write out one ``float`` field per feature.

    REFERENCE_MODEL=model.joblib REFERENCE_FEATURES=x00,x01 uvicorn tests.benchmarks.reference_app:app

It checks types (pydantic) but not ranges, reports no nearest-support
diagnostics, writes no log line of its own and exposes no metrics: it does
less work per request than rbfgate, which makes the comparison conservative.
"""

from __future__ import annotations

import os

import joblib
import numpy as np
from fastapi import FastAPI
from pydantic import BaseModel, ConfigDict, create_model

__all__ = ["app"]

FEATURES = os.environ["REFERENCE_FEATURES"].split(",")
MODEL = joblib.load(os.environ["REFERENCE_MODEL"])  # a pickle: trusted here because we wrote it

Record = create_model(
    "Record", __config__=ConfigDict(extra="forbid"), **{name: (float, ...) for name in FEATURES}
)


class ScoreRequest(BaseModel):
    records: list[Record]


app = FastAPI(title="reference scoring endpoint")


@app.post("/score")
def score(request: ScoreRequest) -> dict:
    X = np.array([[getattr(record, name) for name in FEATURES] for record in request.records])
    labels = MODEL.predict(X)
    decisions = MODEL.decision_function(X)
    return {
        "results": [
            {"label": label.item(), "decision": float(decision)} for label, decision in zip(labels, decisions)
        ]
    }
