"""Forged bundles: each class of lie a bundle file can tell, written so that only the defence under
test can catch it (checksums and byte counts in the manifest are recomputed after every edit).

A forgery takes a bundle directory (a copy) and edits it in place. ``ARCHIVE_FORGERIES`` write a
single-file bundle (a tar) from a bundle directory instead. Sources for the formats: the .npy
format (NEP 1, numpy.lib.format), POSIX pax headers (IEEE Std 1003.1, pax), the GNU sparse
formats 0.1 and 1.0 as carried in pax headers (GNU tar manual, "Storing Sparse Files"), and
I-JSON (RFC 7493) for duplicate names and surrogates.
"""

from __future__ import annotations

import hashlib
import io
import json
import tarfile
from collections.abc import Callable
from pathlib import Path

__all__ = ["ARCHIVE_FORGERIES", "DIRECTORY_FORGERIES", "rewrite_npy_header"]

_ARRAY = "reference_quantiles.npy"  # (101,) float64 in every exported bundle
_DEEP = 100_000


def _manifest_text(bundle: Path) -> str:
    return (bundle / "manifest.json").read_text(encoding="utf-8")


def _insert_member(bundle: Path, raw_member: str) -> None:
    """Add ``raw_member`` (text such as ``"x": 1``) as the first member of the top-level object."""
    text = _manifest_text(bundle).lstrip()
    assert text.startswith("{")
    (bundle / "manifest.json").write_text("{" + raw_member + "," + text[1:], encoding="utf-8")


def _duplicate_top_level_name(bundle: Path) -> None:
    _insert_member(bundle, '"name": "someone-else"')


def _duplicate_name_inside_a_feature(bundle: Path) -> None:
    text = _manifest_text(bundle)
    # The first feature object: give it a second "unit" member.
    start = text.index('"features"')
    brace = text.index("{", start)
    (bundle / "manifest.json").write_text(text[: brace + 1] + '"unit": "forged",' + text[brace + 1:], encoding="utf-8")


def _duplicate_name_deep_in_training(bundle: Path) -> None:
    document = json.loads(_manifest_text(bundle))
    document["training"]["notes"] = {"deep": {"deeper": {"x": 1}}}
    text = json.dumps(document).replace('"deeper": {"x": 1}', '"deeper": {"x": 1, "x": 2}')
    (bundle / "manifest.json").write_text(text, encoding="utf-8")


def _nested_arrays(bundle: Path) -> None:
    _insert_member(bundle, '"deep": ' + "[" * _DEEP + "]" * _DEEP)


def _nested_objects(bundle: Path) -> None:
    _insert_member(bundle, '"deep": ' + '{"a":' * _DEEP + "1" + "}" * _DEEP)


def _lone_surrogate_value(bundle: Path) -> None:
    _insert_member(bundle, '"creator_note": "\\ud800"')


def _lone_surrogate_name(bundle: Path) -> None:
    _insert_member(bundle, '"\\udfff": 1')


def _oversized_manifest(bundle: Path) -> None:
    text = _manifest_text(bundle)
    (bundle / "manifest.json").write_text(text + " " * (65 * 1024 * 1024), encoding="utf-8")


def rewrite_npy_header(bundle: Path, shape_literal: str, manifest_shape, data_bytes: int = 808) -> None:
    """Replace the quantile array by a .npy version 1.0 file whose header says ``shape_literal``,
    followed by ``data_bytes`` zero bytes; the manifest entry is updated to match (shape, size, SHA-256)."""
    header = "{'descr': '<f8', 'fortran_order': False, 'shape': %s, }" % shape_literal
    header += " " * ((64 - (10 + len(header) + 1) % 64) % 64) + "\n"  # NEP 1: data aligned to 64 bytes
    data = b"\x93NUMPY\x01\x00" + len(header).to_bytes(2, "little") + header.encode("latin-1") + b"\0" * data_bytes
    (bundle / _ARRAY).write_bytes(data)
    document = json.loads(_manifest_text(bundle))
    document["files"][_ARRAY].update(sha256=hashlib.sha256(data).hexdigest(), bytes=len(data), shape=manifest_shape)
    (bundle / "manifest.json").write_text(json.dumps(document), encoding="utf-8")


def _negative_dimension(bundle: Path) -> None:
    rewrite_npy_header(bundle, "(-1, 101)", [-1, 101])


def _two_negative_dimensions(bundle: Path) -> None:
    rewrite_npy_header(bundle, "(-101, -1)", [-101, -1])


def _dimension_past_int64(bundle: Path) -> None:
    rewrite_npy_header(bundle, str((2**64,)), [2**64])


def _dimensions_whose_int64_product_wraps(bundle: Path) -> None:
    # 3 x b = 101 (mod 2**64): an int64 product of the shape says 101 values, as many as the file holds.
    b = (101 * pow(3, -1, 2**64)) % 2**64
    rewrite_npy_header(bundle, f"(3, {b})", [3, b])


def _header_promising_more_than_the_file(bundle: Path) -> None:
    rewrite_npy_header(bundle, "(100000000,)", [100_000_000])  # 800 MB promised, 808 bytes held


def _deeply_nested_header_literal(bundle: Path) -> None:
    rewrite_npy_header(bundle, "(" * 3000 + ")" * 3000, [101])


def _array_file_larger_than_the_manifest_says(bundle: Path) -> None:
    # A sparse 4 GiB file on disk: reading it would allocate 4 GiB; its size alone must refuse it.
    with open(bundle / _ARRAY, "r+b") as handle:
        handle.truncate(4 * 1024**3)


DIRECTORY_FORGERIES: dict[str, Callable[[Path], None]] = {
    "duplicate top-level name": _duplicate_top_level_name,
    "duplicate name inside a feature": _duplicate_name_inside_a_feature,
    "duplicate name four levels deep": _duplicate_name_deep_in_training,
    "arrays nested 100,000 deep": _nested_arrays,
    "objects nested 100,000 deep": _nested_objects,
    "lone surrogate as a value": _lone_surrogate_value,
    "lone surrogate as a name": _lone_surrogate_name,
    "manifest over 64 MiB": _oversized_manifest,
    "npy negative dimension": _negative_dimension,
    "npy two negative dimensions": _two_negative_dimensions,
    "npy dimension past int64": _dimension_past_int64,
    "npy dimensions whose int64 product wraps": _dimensions_whose_int64_product_wraps,
    "npy header promising more than the file": _header_promising_more_than_the_file,
    "npy header literal nested 3,000 deep": _deeply_nested_header_literal,
    "array file larger than the manifest says": _array_file_larger_than_the_manifest_says,
}


def _pack(bundle: Path, out: Path, pax_for: dict[str, dict[str, str]] | None = None, cut: int = 0) -> None:
    names = ["manifest.json", *sorted(json.loads(_manifest_text(bundle))["files"])]
    buffer = io.BytesIO()
    with tarfile.open(fileobj=buffer, mode="w", format=tarfile.PAX_FORMAT) as tar:
        for name in names:
            data = (bundle / name).read_bytes()
            info = tarfile.TarInfo(name)
            info.size = len(data)
            info.pax_headers = dict((pax_for or {}).get(name, {}))
            tar.addfile(info, io.BytesIO(data))
    data = buffer.getvalue()
    out.write_bytes(data[: len(data) - cut] if cut else data)


def _sparse_0_1(bundle: Path, out: Path) -> None:
    size = (bundle / "support_vectors.npy").stat().st_size
    # GNU sparse 0.1: the real size and the map of data regions travel in pax keywords.
    keys = {"GNU.sparse.size": str(2 * 1024**3 - 2**20), "GNU.sparse.map": f"0,{size}", "GNU.sparse.numblocks": "1"}
    _pack(bundle, out, {"support_vectors.npy": keys})


def _sparse_1_0(bundle: Path, out: Path) -> None:
    # GNU sparse 1.0: major/minor and the real size in pax keywords, the map at the start of the data.
    keys = {"GNU.sparse.major": "1", "GNU.sparse.minor": "0", "GNU.sparse.name": "support_vectors.npy",
            "GNU.sparse.realsize": str(2 * 1024**3 - 2**20)}
    _pack(bundle, out, {"support_vectors.npy": keys})


def _member_longer_than_the_archive(bundle: Path, out: Path) -> None:
    # Cut the file inside the last member's data (past tar's two end blocks and record padding).
    _pack(bundle, out)
    data = out.read_bytes()
    last = data.rfind(b"\x93NUMPY")
    out.write_bytes(data[: last + 200])


ARCHIVE_FORGERIES: dict[str, Callable[[Path, Path], None]] = {
    "pax GNU sparse 0.1 member of 2 GB": _sparse_0_1,
    "pax GNU sparse 1.0 member of 2 GB": _sparse_1_0,
    "member longer than the archive": _member_longer_than_the_archive,
}
