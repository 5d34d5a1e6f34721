"""Where ``rbfgate score --out`` may write.

The output is written beside its target and renamed over it (atomic replacement, POSIX
rename(2)), which would replace a symbolic link or a device such as /dev/stdout with a regular
file instead of writing through it. Such targets are refused before any row is read.
"""

from __future__ import annotations

import os

from model_store.cli import main

from .conftest import iris_table, write_csv


def test_a_symbolic_link_as_out_is_refused_and_left_in_place(tmp_path, iris_calibrated, capsys):
    bundle, _, X = iris_calibrated
    source = write_csv(tmp_path / "in.csv", iris_table(X, 5))
    real = tmp_path / "real.csv"
    real.write_text("keep me\n")
    link = tmp_path / "link.csv"
    link.symlink_to(real)
    assert main(["score", bundle.source, str(source), "--out", str(link)]) == 2
    assert "is a symbolic link" in capsys.readouterr().err
    assert link.is_symlink() and real.read_text() == "keep me\n"


def test_a_pipe_as_out_is_refused_and_left_in_place(tmp_path, iris_calibrated, capsys):
    bundle, _, X = iris_calibrated
    source = write_csv(tmp_path / "in.csv", iris_table(X, 5))
    fifo = tmp_path / "out.csv"
    os.mkfifo(fifo)
    assert main(["score", bundle.source, str(source), "--out", str(fifo)]) == 2
    assert "not a regular file" in capsys.readouterr().err
    assert fifo.exists() and not fifo.is_file()


def test_an_existing_regular_file_is_replaced_whole(tmp_path, iris_calibrated):
    bundle, _, X = iris_calibrated
    source = write_csv(tmp_path / "in.csv", iris_table(X, 5))
    out = tmp_path / "out.csv"
    out.write_text("old contents\n")
    assert main(["score", bundle.source, str(source), "--out", str(out)]) == 0
    header = out.read_text().splitlines()[0].replace('"', "").split(",")
    assert header[:2] == ["row", "status"] and "old contents" not in out.read_text()
