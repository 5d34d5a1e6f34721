"""The size of one core's CPU caches, as Linux reports it, for sizing the scorer's kernel block.

Linux describes each CPU's caches under ``/sys/devices/system/cpu/cpuN/cache/indexM/`` with the
files ``level`` (1, 2, 3), ``type`` (``Data``, ``Instruction`` or ``Unified``) and ``size``
(``2048K``, say; the kernel's ABI document Documentation/ABI/testing/sysfs-devices-system-cpu,
cited from memory; the format is the one this machine's files have).
CPU 0 stands for every core: the machines rbfgate runs on have one kind of core. Anything unreadable
(another operating system, a container without ``/sys``, an unexpected file) means "unknown",
never an error: the caller then falls back to a fixed size.
"""

from __future__ import annotations

import re
from pathlib import Path

__all__ = ["CPU0_CACHES", "data_cache_bytes"]

CPU0_CACHES = Path("/sys/devices/system/cpu/cpu0/cache")
_SIZE = re.compile(r"([0-9]{1,12})([KMG]?)")  # ASCII digits only, a bounded count
_UNITS = {"": 1, "K": 1 << 10, "M": 1 << 20, "G": 1 << 30}


def data_cache_bytes(level: int, caches: Path = CPU0_CACHES) -> int | None:
    """Bytes of the data (or unified) cache at ``level`` under ``caches``, or None when unknown."""
    try:
        entries = sorted(caches.glob("index*"))
        for entry in entries:
            if _read(entry / "level") != str(level):
                continue
            if _read(entry / "type") not in ("Data", "Unified"):
                continue
            size = _SIZE.fullmatch(_read(entry / "size"))
            if size is None:
                return None
            found = int(size.group(1)) * _UNITS[size.group(2)]
            return found or None
    except (OSError, UnicodeDecodeError):
        return None
    return None


def _read(path: Path) -> str:
    return path.read_text(encoding="ascii").strip()  # sysfs attributes are short ASCII text
