"""Scale-out on loopback: three ``rbfgate serve`` replicas over one store, behind nginx.

What the deployment documentation promises for several replicas on a shared store:
- an activation made with the CLI reaches every replica (each replica follows the store's active
  pointer, polled every second by default); here within a generous 30 s, so that a replica that
  never follows fails while a busy machine does not. How fast it gets there (README, Deployment:
  within 2 s) is measured by the benchmark tests/benchmarks/test_scaleout_switch.py;
- a replica killed with SIGKILL under load costs no client request that the load balancer can
  resend (nginx ``proxy_next_upstream``, with ``non_idempotent`` for scoring); the only request
  it may cost is an answer it was writing at that instant: headers out, body not, which no
  balancer can resend (measured on this machine: in about one kill in five, one answer);
- a replica started again serves the version that is active now, and gets traffic again.

Every answer must carry the numbers of the version it names (scaleout/cluster.py: scikit-learn's
``decision_function`` and ``predict`` on iris, tolerance 1e-9 x max(1, |value|)).

nginx is the Debian package; .ci/run installs it. Without it the test is skipped, except in CI
(CI=true), where a missing nginx fails it. Each test is bounded (load threads stop on their own
after 45 s, every wait has a timeout) and stops every process it started.
"""

from __future__ import annotations

import time

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

FUNCTIONAL_BOUND_SECONDS = 30.0  # generous: a replica that never follows fails; speed is a benchmark


def test_an_activation_with_the_cli_reaches_every_replica(cluster, batch, check):  # noqa: F811
    urls = {replica.name: replica.url for replica in cluster.replicas}
    with ScoringLoad(cluster.balancer.url, SCORE_PATH, batch, check) as load, \
            DirectWatch(urls, SCORE_PATH, batch, check) as watch:
        wait_for_answers(load, 30)
        switched = activate_with_cli(cluster, "2.0.0")
        reached = watch.wait_for("2.0.0", timeout=FUNCTIONAL_BOUND_SECONDS)
        everywhere = max((watch.switched_at(name, "2.0.0") or switched) for name in urls)
        keep_loading(load, until=everywhere + 0.5)  # the load goes on after every replica switched
    assert reached, f"not every replica served 2.0.0 within {FUNCTIONAL_BOUND_SECONDS:g} s: {watch.failures[:3]}"
    assert not watch.failures and not load.failures and not load.cut_off, (watch.failures, load.failures)
    assert all(watch.versions_seen(name) == ["1.0.0", "2.0.0"] for name in urls)  # one switch, never back
    late = load.answered_since(everywhere)
    assert late and {answer.version for answer in late} == {"2.0.0"}  # through nginx as well


def test_a_replica_killed_mid_load_fails_no_request_but_an_answer_it_was_writing(cluster, batch, check):  # noqa: F811
    """nginx resends every request the dead replica had not begun to answer. The one thing no
    balancer can resend is an answer whose headers it already forwarded: a replica killed between
    writing the headers and the body leaves that answer cut off, and only such answers may be lost."""
    victim = cluster.replicas[1]
    with ScoringLoad(cluster.balancer.url, SCORE_PATH, batch, check) as load:
        wait_for_answers(load, 60)
        killed = time.time()
        victim.kill()
        keep_loading(load, until=killed + 2.5)  # past fail_timeout (1 s): nginx tries the dead replica again
    finished_after = [answer for answer in load.answers if answer.finished >= killed]
    print(f"\nkill test: {len(load.answers)} answers, {len(finished_after)} finished after the kill, "
          f"{len(load.failures)} failures, {len(load.cut_off)} cut off")
    assert not load.failures, load.failures[:5]
    assert all(cut.answered_by == victim.address and cut.started < killed for cut in load.cut_off)
    assert len(load.cut_off) <= load.threads  # at most one answer in flight per client connection
    assert victim.address in {answer.answered_by for answer in load.answers if answer.finished < killed}
    assert victim.address not in {answer.answered_by for answer in load.answered_since(killed)}
    # nginx found the replica dead and sent those requests on: the retry, not luck, saved them
    assert any(answer.tried[0] == victim.address and len(answer.tried) > 1 for answer in finished_after)


def test_a_restarted_replica_rejoins_serving_the_active_version(cluster, batch, check):  # noqa: F811
    victim, others = cluster.replicas[2], cluster.replicas[:2]
    urls = {replica.name: replica.url for replica in others}
    with ScoringLoad(cluster.balancer.url, SCORE_PATH, batch, check) as load:
        wait_for_answers(load, 30)
        killed = time.time()
        victim.kill()
        with DirectWatch(urls, SCORE_PATH, batch, check) as watch:
            activate_with_cli(cluster, "2.0.0")  # while the victim is down
            assert watch.wait_for("2.0.0", timeout=10.0), watch.failures[:3]
        restarted = time.time()
        victim.start()  # same port: the balancer's upstream list does not change
        victim.wait_ready()
        deadline = time.monotonic() + 15.0
        while time.monotonic() < deadline and not any(
            answer.answered_by == victim.address for answer in load.answered_since(restarted)
        ):
            time.sleep(0.05)
    with DirectWatch({victim.name: victim.url}, SCORE_PATH, batch, check) as direct:
        assert direct.wait_for("2.0.0", timeout=5.0)
    rejoined = [answer for answer in load.answered_since(restarted) if answer.answered_by == victim.address]
    assert not load.failures and not watch.failures and not direct.failures, (load.failures[:3], direct.failures[:3])
    assert all(cut.answered_by == victim.address and cut.started < killed for cut in load.cut_off)  # see the kill test
    assert direct.versions_seen(victim.name) == ["2.0.0"]  # from its first answer on
    assert rejoined and {answer.version for answer in rejoined} == {"2.0.0"}  # nginx sends it traffic again
