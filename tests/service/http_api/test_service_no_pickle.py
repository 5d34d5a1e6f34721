"""The serving path never imports scikit-learn or joblib and never unpickles anything.

numpy itself imports the standard ``pickle`` module, so for pickle the check is
behavioural: every unpickling entry point (``pickle.load``, ``pickle.loads``,
``pickle.Unpickler`` and their C twins in ``_pickle``) is replaced with one that
raises, in a fresh interpreter, before the app starts, loads bundles and scores.
"""

from __future__ import annotations

import ast
import json
import subprocess
import sys
from pathlib import Path

import service

_PROBE = r"""
import json, pickle, _pickle, sys, warnings
from pathlib import Path

def refuse(*args, **kwargs):
    raise AssertionError("something tried to unpickle on the serving path")

class RefusingUnpickler:
    def __init__(self, *args, **kwargs):
        refuse()

for module in (pickle, _pickle):
    module.load = module.loads = refuse
    module.Unpickler = RefusingUnpickler

warnings.simplefilter("ignore")
from fastapi.testclient import TestClient
from service.app import create_app
from service.settings import Settings

store_root, record = Path(sys.argv[1]), json.loads(sys.argv[2])
app = create_app(Settings(store_root=store_root), environ={}, write_log=lambda event: None)
with TestClient(app) as client:
    scored = client.post("/score/iris", json={"records": [record]})
    pinned = client.post("/score/iris/versions/2.0.0", json={"records": [record]})
    schema = client.get("/models/iris/versions/1.0.0/schema")
print(json.dumps({
    "statuses": [scored.status_code, pinned.status_code, schema.status_code],
    "sklearn": sorted(name for name in sys.modules if name == "sklearn" or name.startswith("sklearn.")),
    "joblib": sorted(name for name in sys.modules if name == "joblib" or name.startswith("joblib.")),
}))
"""


def test_serving_imports_no_sklearn_or_joblib_and_unpickles_nothing(shared_store):
    record = {"sepal_length_cm": 5.1, "sepal_width_cm": 3.5, "petal_length_cm": 1.4, "petal_width_cm": 0.2}
    completed = subprocess.run(
        [sys.executable, "-c", _PROBE, str(shared_store.root), json.dumps(record)],
        capture_output=True, text=True, timeout=120,
    )
    assert completed.returncode == 0, completed.stderr
    report = json.loads(completed.stdout.strip().splitlines()[-1])
    assert report["statuses"] == [200, 200, 200]
    assert report["sklearn"] == [] and report["joblib"] == []


def test_service_source_imports_no_pickle_joblib_or_sklearn():
    forbidden = {"pickle", "_pickle", "cPickle", "dill", "cloudpickle", "joblib", "sklearn", "shelve", "marshal"}
    found = []
    for path in sorted(Path(service.__file__).parent.glob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
            if isinstance(node, ast.Import):
                names = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom):
                names = [node.module or ""]
            else:
                continue
            found += [f"{path.name}: {name}" for name in names if name.split(".")[0] in forbidden]
    assert found == []
