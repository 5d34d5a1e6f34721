"""The kernel block's size follows the core's L2 cache, read from Linux's description of CPU 0's caches.

Reference: the layout of ``/sys/devices/system/cpu/cpuN/cache/indexM/{level,type,size}`` (Linux's
ABI document sysfs-devices-system-cpu, cited from memory; the sizes below are the ones this
project's Intel Xeon machine reports: 48K L1 data, 64K L1 instruction, 2048K L2, 491520K L3) and
the rule of ``model_store.kernel.block_bytes_for``: a quarter of L2 within 512 KiB and 4 MiB,
1 MiB when unknown.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from model_store.cpu_cache import data_cache_bytes
from model_store.kernel import block_bytes_for


def _caches(root: Path, entries: list[tuple[str, str, str]]) -> Path:
    for index, (level, kind, size) in enumerate(entries):
        folder = root / f"index{index}"
        folder.mkdir(parents=True)
        (folder / "level").write_text(level + "\n")
        (folder / "type").write_text(kind + "\n")
        (folder / "size").write_text(size + "\n")
    return root


XEON = [("1", "Data", "48K"), ("1", "Instruction", "64K"), ("2", "Unified", "2048K"), ("3", "Unified", "491520K")]


def test_the_level_2_cache_is_read_in_bytes(tmp_path):
    caches = _caches(tmp_path, XEON)
    assert data_cache_bytes(2, caches) == 2048 * 1024
    assert data_cache_bytes(3, caches) == 491520 * 1024


def test_the_level_1_instruction_cache_is_not_taken_for_the_data_cache(tmp_path):
    caches = _caches(tmp_path, [("1", "Instruction", "64K"), ("1", "Data", "48K")])
    assert data_cache_bytes(1, caches) == 48 * 1024


def test_a_size_in_megabytes_is_read(tmp_path):
    assert data_cache_bytes(2, _caches(tmp_path, [("2", "Unified", "1M")])) == 1 << 20


@pytest.mark.parametrize("entries", [
    [], [("1", "Data", "48K")], [("2", "Unified", "two megabytes")], [("2", "Unified", "0K")],
    [("2", "Unified", "9" * 5000 + "K")],       # past Python's int digit limit: must not raise
    [("2", "Unified", "\u0662\u0660\u0664\u0668K")],  # Arabic-Indic digits: not what the kernel writes
])
def test_an_unreadable_or_missing_level_2_is_unknown(tmp_path, entries):
    assert data_cache_bytes(2, _caches(tmp_path, entries)) is None


def test_a_size_file_that_is_not_text_is_unknown(tmp_path):
    caches = _caches(tmp_path, [("2", "Unified", "2048K")])
    (caches / "index0" / "size").write_bytes(b"\xff\xfe2048K")
    assert data_cache_bytes(2, caches) is None


def test_no_cache_folder_at_all_is_unknown(tmp_path):
    assert data_cache_bytes(2, tmp_path / "absent") is None


@pytest.mark.parametrize(("l2_bytes", "block"), [
    (2 << 20, 512 << 10),     # 2 MB of L2 (the Intel Xeon): a quarter
    (8 << 20, 2 << 20),       # a quarter
    (64 << 20, 4 << 20),      # capped at the 4 MiB measured before on an AMD EPYC
    (512 << 10, 512 << 10),   # a quarter would be 128 KiB: at least 512 KiB (64 rows of 1,024 tiles)
    (None, 1 << 20),          # unknown
])
def test_the_block_is_a_quarter_of_l2_within_its_bounds(l2_bytes, block):
    assert block_bytes_for(l2_bytes) == block
