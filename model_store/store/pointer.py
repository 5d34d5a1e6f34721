"""The active pointer of a model: which version is live, and where the trail ended.

``active.json`` is small on purpose: every service replica reads it every
second. It is replaced atomically (write, fsync, rename), so a reader sees
the old pointer or the new one. Besides the active version it records the
hash and sequence number of the trail's last entry; a trail that ends
earlier than that was truncated.

A model gets its pointer before its first history entry is written: the
genesis pointer (no active version, head GENESIS, seq 0). So a pointer
that is missing beside a trail was deleted; no crash leaves that state.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass
from pathlib import Path

from model_store.errors import HistoryError, StoreError
from model_store.store.durable import atomic_write
from model_store.store.files import UnsafeStoreEntry, read_store_file
from model_store.store.history import GENESIS

__all__ = ["GENESIS_POINTER", "ActiveRecord", "Pointer", "read_pointer", "write_pointer"]


@dataclass(frozen=True)
class ActiveRecord:
    """The active version of a model as the service sees it."""

    version: str
    digest: str
    activated_at: str
    history_head: str
    history_seq: int = 0


@dataclass(frozen=True)
class Pointer:
    """The whole pointer file; ``version`` is None until a version is first activated."""

    version: str | None
    digest: str | None
    activated_at: str | None
    history_head: str
    history_seq: int

    def active_record(self) -> ActiveRecord | None:
        if self.version is None:
            return None
        return ActiveRecord(self.version, self.digest, self.activated_at, self.history_head, self.history_seq)

    def moved_head(self, head: str, seq: int) -> "Pointer":
        return Pointer(self.version, self.digest, self.activated_at, head, seq)


GENESIS_POINTER = Pointer(version=None, digest=None, activated_at=None, history_head=GENESIS, history_seq=0)


def read_pointer(path: Path, *, root: Path | None = None) -> Pointer | None:
    """The pointer in ``path``, or None when the model has none yet.

    With ``root`` (the store root) it is read without following links. A link
    or a FIFO in its place, or a file that is not a pointer, was put there by
    hand: ``HistoryError``, as for any other tampering the history reveals.
    An OS error reading it is a ``StoreError`` (perhaps passing).
    """
    try:
        data = Path(path).read_bytes() if root is None else read_store_file(root, Path(path))
    except FileNotFoundError:
        return None
    except UnsafeStoreEntry as exc:
        raise HistoryError(f"active pointer {exc}") from exc
    except OSError as exc:
        raise StoreError(f"{path}: cannot read the active pointer: {exc.strerror}") from exc
    if data is None:
        return None
    try:
        document = json.loads(data)
        pointer = Pointer(
            version=document["version"],
            digest=document["digest"],
            activated_at=document["activated_at"],
            history_head=document["history_head"],
            history_seq=document["history_seq"],
        )
    except (ValueError, TypeError, KeyError) as exc:
        raise HistoryError(
            f"{path}: the active pointer is not valid ({exc!r}); it was edited by hand, restore it from a backup "
            f"or rebuild it with 'rbfgate repair-pointer {Path(path).parent.name} --reason TEXT'"
        ) from exc
    if not isinstance(pointer.history_head, str) or type(pointer.history_seq) is not int or not all(
        value is None or isinstance(value, str) for value in (pointer.version, pointer.digest, pointer.activated_at)
    ):
        raise HistoryError(f"{path}: the active pointer's fields are malformed (expected text for version, digest and "
                           "activated_at, a whole number for history_seq); restore it from a backup or rebuild it "
                           f"with 'rbfgate repair-pointer {Path(path).parent.name} --reason TEXT'")
    return pointer


def write_pointer(path: Path, pointer: Pointer) -> None:
    text = json.dumps(asdict(pointer), indent=2, sort_keys=True)
    atomic_write(path, (text + "\n").encode("utf-8"))
