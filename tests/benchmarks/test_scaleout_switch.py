"""How fast an activation reaches three replicas behind nginx: the 2 s target of the README's
Deployment section ("How a version switch reaches every replica").

Marked ``benchmark`` (excluded from the default run, which checks only that the switch arrives,
tests/deploy/test_deploy_scaleout.py). Run it with ``python3 -m pytest -m benchmark
tests/benchmarks/test_scaleout_switch.py -s``; it prints each replica's delay and its fraction of
the target, measured in one run. Needs nginx (the Debian package).
"""

from __future__ import annotations

import pytest
from scaleout.cluster import (  # noqa: F401  (fixtures: nginx, iris_versions, batch, check, cluster)
    SCORE_PATH,
    activate_with_cli,
    batch,
    check,
    cluster,
    iris_versions,
    keep_loading,
    nginx,
    wait_for_answers,
)
from scaleout.load import DirectWatch, ScoringLoad

pytestmark = pytest.mark.benchmark

SWITCH_TARGET_SECONDS = 2.0  # README, Deployment: every replica serves the new version within 2 s


def test_an_activation_with_the_cli_reaches_every_replica_within_the_target(cluster, batch, check):  # noqa: F811
    urls = {replica.name: replica.url for replica in cluster.replicas}
    with ScoringLoad(cluster.balancer.url, SCORE_PATH, batch, check) as load, \
            DirectWatch(urls, SCORE_PATH, batch, check) as watch:
        wait_for_answers(load, 30)
        switched = activate_with_cli(cluster, "2.0.0")
        reached = watch.wait_for("2.0.0", timeout=10 * SWITCH_TARGET_SECONDS)
        keep_loading(load, until=switched + SWITCH_TARGET_SECONDS + 0.5)  # the load goes on past the target
    delays = {name: (watch.switched_at(name, "2.0.0") or float("inf")) - switched for name in urls}
    shares = ", ".join(f"{name} {delay:.2f} s ({delay / SWITCH_TARGET_SECONDS:.0%} of the target)"
                       for name, delay in delays.items())
    print(f"\nswitch propagation after the pointer moved: {shares}")
    assert reached and not watch.failures and not load.failures, (watch.failures[:3], load.failures[:3])
    assert max(delays.values()) <= SWITCH_TARGET_SECONDS, delays
    late = load.answered_since(switched + SWITCH_TARGET_SECONDS)
    assert late and {answer.version for answer in late} == {"2.0.0"}  # through nginx as well
