"""Outputs of file scoring: a CSV file or a directory of Parquet parts, written atomically.

The output name decides the format: a name ending in ``.parquet`` is a
directory of parts (``part-00000.parquet``, one per input partition, every part
with the same schema and the bundle's identity in its key-value metadata);
anything else is one CSV file, with a sidecar ``OUT.json`` holding the same
identity and the counts. Everything is written under a hidden temporary name
beside the target and renamed into place only when every partition succeeded,
so a failure never leaves half an output; a failed run removes its temporary
files.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from datetime import datetime, timezone
from pathlib import Path

import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.parquet as pq

from model_store.bundle import Bundle
from model_store.errors import InputError

__all__ = ["OutputTarget", "PartWriter", "csv_header", "identity", "part_name"]

_METADATA_PREFIX = "rbfgate."


def identity(bundle: Bundle, *, source: str) -> dict[str, str]:
    """What the output records about the model: name, version, digest, where it came from, when."""
    return {
        "model": bundle.name,
        "version": bundle.version,
        "digest": bundle.digest,
        "source": source,
        "scored_at": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
    }


def part_name(index: int, file_format: str) -> str:
    return f"part-{index:05d}.{file_format}"


class PartWriter:
    """Write tables to ``path`` under a hidden name, renamed to ``path`` by ``commit()``.

    ``file_format`` is ``"csv"`` (``header`` says whether to write the header line) or
    ``"parquet"`` (``metadata`` becomes the schema's key-value metadata, keys prefixed ``rbfgate.``).
    """

    def __init__(self, path: Path, schema: pa.Schema, file_format: str, *, header: bool = True,
                 metadata: dict[str, str] | None = None):
        self.path = Path(path)
        descriptor, name = tempfile.mkstemp(prefix=f".{self.path.name}.", dir=self.path.parent)
        os.fchmod(descriptor, 0o666 & ~_umask())  # mkstemp makes it private; outputs get the usual mode
        os.close(descriptor)
        self._temporary = Path(name)
        if file_format == "parquet":
            schema = schema.with_metadata({f"{_METADATA_PREFIX}{key}": value for key, value in (metadata or {}).items()})
            self._writer = pq.ParquetWriter(self._temporary, schema)
        else:
            self._writer = pcsv.CSVWriter(self._temporary, schema, write_options=pcsv.WriteOptions(include_header=header))
        self.schema = schema
        self._open = True

    def write(self, table: pa.Table) -> None:
        self._writer.write_table(table)

    def commit(self) -> Path:
        self._open = False
        self._writer.close()
        os.replace(self._temporary, self.path)
        return self.path

    def abort(self) -> None:
        if not self._open:
            return
        self._open = False
        try:
            self._writer.close()
        finally:
            self._temporary.unlink(missing_ok=True)


class OutputTarget:
    """The ``--out`` path: its format, the checks made before any row is read, staging and commit."""

    def __init__(self, out: Path):
        self.path = Path(out)
        self.format = "parquet" if self.path.suffix.lower() == ".parquet" else "csv"
        if not self.path.parent.is_dir():
            raise InputError(f"--out {self.path}: folder {self.path.parent} does not exist; create it first")
        if self.format == "csv" and self.path.is_dir():
            raise InputError(f"--out {self.path} is a directory; give the path of the CSV file to write "
                             "(or a name ending in .parquet for a directory of Parquet parts)")
        if self.format == "csv":
            for target in (self.path, self.sidecar):
                _refuse_special(target)
        if self.format == "parquet" and self.path.exists() and not (self.path.is_dir() and not any(self.path.iterdir())):
            raise InputError(f"--out {self.path}: already exists; choose a new name or remove it first "
                             "(a Parquet output is a directory that is never overwritten)")
        self.staging: Path | None = None

    @property
    def sidecar(self) -> Path:
        return self.path.with_name(self.path.name + ".json")

    def stage(self) -> Path:
        """A new hidden directory beside the target, for parts (and, for CSV, the file being written)."""
        self.staging = Path(tempfile.mkdtemp(prefix=f".{self.path.name}.", dir=self.path.parent))
        os.chmod(self.staging, 0o777 & ~_umask())
        return self.staging

    def commit(self, csv_parts: list[Path] | None, document: dict) -> None:
        """Move the staged output into place; ``csv_parts`` (header first) are joined into the CSV file."""
        if self.staging is None:
            raise RuntimeError("OutputTarget.commit() called before stage()")
        for stray in self.staging.glob(".*"):
            stray.unlink()  # an attempt killed mid-write leaves its hidden temporary file
        if self.format == "parquet":
            os.replace(self.staging, self.path)
            self.staging = None
            return
        joined = self.staging / "joined.csv"
        if csv_parts is not None:
            with open(joined, "wb") as sink:
                for part in csv_parts:
                    with open(part, "rb") as piece:
                        shutil.copyfileobj(piece, sink, 1 << 20)
        sidecar = self.staging / "sidecar.json"
        sidecar.write_text(json.dumps(document, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
        os.chmod(joined, 0o666 & ~_umask())
        os.chmod(sidecar, 0o666 & ~_umask())
        # The CSV last: once it is in place its sidecar already describes it.
        os.replace(sidecar, self.sidecar)
        os.replace(joined, self.path)
        self.abort()

    def abort(self) -> None:
        if self.staging is not None:
            shutil.rmtree(self.staging, ignore_errors=True)
            self.staging = None


def csv_header(schema: pa.Schema, path: Path) -> Path:
    """Write the CSV header line of ``schema`` (as Arrow's writer spells it) to ``path``."""
    pcsv.write_csv(schema.empty_table(), path)
    return path


def _refuse_special(target: Path) -> None:
    """The output is renamed over its target, which would replace a link or a device (say
    /dev/stdout) instead of writing through it: only a missing path or a regular file is replaced."""
    if target.is_symlink() or (target.exists() and not target.is_file()):
        kind = "a symbolic link" if target.is_symlink() else "not a regular file (a device, pipe or socket)"
        raise InputError(f"--out {target} is {kind}; the output is written beside it and renamed into place, "
                         "which would replace it: give the path of a regular file")


def _umask() -> int:
    current = os.umask(0)
    os.umask(current)
    return current
