"""The serving path loads and scores a bundle without scikit-learn, joblib or unpickling.

The design (DEVELOPERS.md, Layout; README, Python API): the serving path never imports
scikit-learn or joblib and never unpickles anything. numpy itself
imports the standard-library ``pickle`` module at import time (numpy.lib uses it for
object arrays), so ``'pickle' in sys.modules`` is true for every numpy program and is not
the criterion. What matters is that nothing is ever *unpickled*: the check replaces
pickle.load, pickle.loads and pickle.Unpickler (and their C twins in ``_pickle``) with
functions that raise, before model_store is imported, then loads and scores bundles.
"""

from __future__ import annotations

import io
import json
import shutil
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from model_store import BundleFormatError, load_bundle
from model_store.archive import pack_directory
from model_store.digest import sha256_bytes

_SERVING_SCRIPT = textwrap.dedent(
    """
    import sys, pickle, _pickle

    calls = []

    def refuse(*args, **kwargs):
        calls.append(args[:1])
        raise RuntimeError("unpickling attempted on the serving path")

    for module in (pickle, _pickle):
        module.load = module.loads = module.Unpickler = refuse

    import numpy as np
    import model_store
    import model_store.refusal
    from model_store import load_bundle

    for path in sys.argv[1:]:
        bundle = load_bundle(path)
        bundle.self_test()
        rows = np.asarray(bundle.manifest.golden.inputs)
        scores = bundle.score(rows)
        assert len(scores.labels) == len(rows)
        named = bundle.score({name: rows[:, index] for index, name in enumerate(bundle.feature_names)})
        assert named.labels.tolist() == scores.labels.tolist()

    # The model card and the pages are built on the serving path too (rbfgate card, /view/).
    import service.app
    from model_store.view.pages import offline_card_html
    from model_store.view.sources import file_card

    for path in sys.argv[1:]:
        assert "vegaLite" in offline_card_html(file_card(path))  # the plotting scripts are inlined

    # scipy too: like scikit-learn and joblib it is in the 'train' extra only; pandas is never needed,
    # named columns are recognised without it (model_store/columns.py).
    forbidden = sorted(name for name in sys.modules
                       if name.split(".")[0] in ("sklearn", "joblib", "scipy", "pandas")
                       or name in ("model_store.exporter", "model_store.estimator_parts", "model_store.trainer"))
    print("FORBIDDEN", forbidden)
    print("UNPICKLE CALLS", len(calls))
    # The guard works: unpickling now fails, so a silent unpickle above would have failed too.
    try:
        pickle.loads(b"\\x80\\x04K\\x01.")
    except RuntimeError:
        print("GUARD ACTIVE")
    """
)


def test_loading_and_scoring_imports_no_sklearn_joblib_and_unpickles_nothing(wine_sigmoid, tmp_path):
    bundle, _, _ = wine_sigmoid
    archive = tmp_path / "wine.tar"
    pack_directory(bundle.source, archive)
    result = subprocess.run(
        [sys.executable, "-c", _SERVING_SCRIPT, bundle.source, str(archive)],
        capture_output=True, text=True, timeout=120, check=False,
    )
    assert result.returncode == 0, result.stderr
    assert "FORBIDDEN []" in result.stdout, result.stdout
    assert "UNPICKLE CALLS 0" in result.stdout, result.stdout
    assert "GUARD ACTIVE" in result.stdout, result.stdout


def test_arrays_are_parsed_as_raw_float64_never_through_np_load(wine_sigmoid, monkeypatch):
    """The loader reads the .npy header, checks dtype and shape against the manifest, then
    views the bytes as little-endian float64: no code path can reach numpy's pickle support."""
    bundle, _, _ = wine_sigmoid
    calls = []
    monkeypatch.setattr(np, "load", lambda *args, **kwargs: calls.append(kwargs))
    loaded = load_bundle(bundle.source)
    assert calls == []
    assert loaded.digest == bundle.digest


def _replace_array(source, tmp_path, name: str, data: bytes):
    """Copy the bundle and put ``data`` in ``name`` with the manifest's checksum and size updated to match."""
    copy = tmp_path / "copy"
    shutil.copytree(source, copy)
    (copy / name).write_bytes(data)
    document = json.loads((copy / "manifest.json").read_text(encoding="utf-8"))
    document["files"][name].update(sha256=sha256_bytes(data), bytes=len(data))
    (copy / "manifest.json").write_text(json.dumps(document), encoding="utf-8")
    return copy


def _npy(array, allow_pickle=False) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, array, allow_pickle=allow_pickle)
    return buffer.getvalue()


def test_object_array_with_a_matching_checksum_is_refused_unread(wine_sigmoid, tmp_path):
    # An object array is stored pickled inside the .npy; loading it would run pickle.
    bundle, _, _ = wine_sigmoid
    payload = _npy(np.array([{"a": 1}, "text"], dtype=object), allow_pickle=True)
    copy = _replace_array(bundle.source, tmp_path, "dual_coef.npy", payload)
    with pytest.raises(BundleFormatError, match="dual_coef.npy"):
        load_bundle(copy)


@pytest.mark.parametrize(
    "payload",
    [b"", b"\x80\x04K\x01.", b"PK\x03\x04not really a zip", b"\x93NUMPY\x01\x00"],
    ids=["empty", "raw-pickle", "zip-npz", "truncated-header"],
)
def test_non_npy_bytes_with_a_matching_checksum_are_refused(wine_sigmoid, tmp_path, payload):
    # np.load would open zip bytes as an .npz and hand pickle bytes to the unpickler
    # (if allowed); a bundle accepts only the .npy format.
    bundle, _, _ = wine_sigmoid
    copy = _replace_array(bundle.source, tmp_path, "support_vectors.npy", payload)
    with pytest.raises(BundleFormatError, match="support_vectors.npy"):
        load_bundle(copy)
