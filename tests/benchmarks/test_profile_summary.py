"""The profile helper's arithmetic on py-spy's raw output (collapsed stacks, one per line:
``thread;outermost;...;innermost count``, the format of Brendan Gregg's flame graph tools)."""

from __future__ import annotations

from tests.benchmarks.profile_service import summarise

_RAW = """\
thread (1): MainThread;run (/usr/lib/python3.11/asyncio/runners.py:118) 6
thread (2): rbfgate-scoring_0;work (/srv/app/service/score_routes.py:64);score (/srv/app/model_store/bundle.py:126) 3
thread (2): rbfgate-scoring_0;work (/srv/app/service/score_routes.py:64) 1
"""


def test_shares_count_each_stack_once_per_frame_and_the_innermost_frame_apart():
    summary = summarise(_RAW.splitlines())
    assert summary.samples == 10
    assert summary.threads == {"thread (1): MainThread": 6, "thread (2): rbfgate-scoring_0": 4}
    assert summary.inclusive["work (service/score_routes.py:64)"] == 4
    assert summary.innermost["work (service/score_routes.py:64)"] == 1
    assert summary.innermost["score (model_store/bundle.py:126)"] == 3


def test_library_paths_are_shortened_to_the_module_path():
    summary = summarise(["thread (1): MainThread;run (/usr/lib/python3.11/asyncio/runners.py:118) 2",
                         "thread (1): MainThread;f (/x/.venv/lib/python3.11/site-packages/uvicorn/main.py:9) 1"])
    assert set(summary.innermost) == {"run (asyncio/runners.py:118)", "f (uvicorn/main.py:9)"}
    assert " 66.7 %  run (asyncio/runners.py:118)" in summary.render().splitlines()


def test_the_inclusive_list_shows_rbfgates_own_frames_only():
    lines = summarise(_RAW.splitlines()).render().splitlines()
    inclusive = lines[lines.index(next(line for line in lines if line.startswith("-- inclusive"))) + 1:
                      lines.index("-- innermost Python frame")]
    assert inclusive == [" 40.0 %  work (service/score_routes.py:64)", " 30.0 %  score (model_store/bundle.py:126)"]
