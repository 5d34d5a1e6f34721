"""The A/B helper refuses what is not a source tree before it starts anything (no server, no wrk)."""

from __future__ import annotations

import pytest

from tests.benchmarks.ab_service import main


def test_a_folder_that_is_no_rbfgate_tree_is_refused_by_name(tmp_path, capsys):
    with pytest.raises(SystemExit) as stopped:
        main([str(tmp_path), "."])
    assert stopped.value.code == 2  # argparse's usage error
    assert f"{tmp_path}: not an rbfgate source tree (no service/app.py)" in capsys.readouterr().err


def test_the_column_form_needs_more_than_one_record(capsys):
    with pytest.raises(SystemExit) as stopped:
        main([".", ".", "--form", "columns"])
    assert stopped.value.code == 2
    assert "--form columns" in capsys.readouterr().err
