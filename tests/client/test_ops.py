"""The operator commands (``likewise metrics`` … ``prune``) against the live service.

Each test runs ``service.cli.main(argv)`` as the ``likewise`` command does and checks
the real outcome through the client (the activation moved, the old batches are gone).
Data: iris as bundled with scikit-learn (Fisher 1936), batches from tests/datasets.py.
"""

from __future__ import annotations

import re
import time
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest

from likewise_client.ops import feature_weights, parse_when
from service.cli import main
from tests.api.helpers import IRIS_FEATURES, iris_batches


@pytest.fixture
def run(live, capsys):
    def run(*argv: str) -> tuple[int, str, str]:
        code = main([*argv, "--url", live.url, "--token", live.token])
        out, err = capsys.readouterr()
        return code, out, err

    return run


@pytest.fixture
def two_versions(live, metric_name):
    """A metric with four iris batches, version 1 (auto, active), version 2 (Euclidean)."""
    with live.client() as lw:
        lw.put_metric(metric_name, IRIS_FEATURES)
        for X, y in iris_batches(4):
            lw.post_batch(metric_name, X, y, columns=IRIS_FEATURES)
        for params in ({}, {"method": "euclidean", "activate": "by_hand"}):
            fit = lw.wait_for_fit(lw.start_fit(metric_name, **params)["fit_id"], 120)
            assert fit["status"] == "succeeded", fit
    return metric_name


def test_metrics_versions_and_explain(live, run, two_versions) -> None:
    name = two_versions
    code, out, _ = run("metrics")
    assert code == 0
    row = next(line for line in out.splitlines() if line.startswith(name))
    assert row.split() == [name, "4", "4", row.split()[3], "2", "1"]

    code, out, _ = run("versions", name)
    assert code == 0
    lines = out.splitlines()
    assert "held-out ARI" in lines[0] and "Euclidean ARI" in lines[0]
    assert re.match(r"^\*\s+1\s", lines[2]) and re.match(r"^\s+2\s+euclidean", lines[3])

    code, out, _ = run("explain", name)
    assert code == 0 and f"{name} version 1 (active)" in out
    assert all(f in out for f in IRIS_FEATURES)
    # Euclidean: M is the identity on standardised features, so every feature holds
    # an equal share, 1/d (definition of the Euclidean baseline; no other source)
    code, out, _ = run("explain", name, "2")
    shares = [float(line.split()[1]) for line in out.splitlines()
              if line.split() and line.split()[0] in IRIS_FEATURES]
    assert shares == [0.25] * 4
    # the command shows the service's explanation (not weights of its own): per-unit
    # weight against numpy, the length of L·e_j / scale_j from the stored map itself
    with live.client() as lw:
        version = lw.get_version(name, 1)
        explanation = lw.explain(name, 1)
    L = np.array(version["metric"]["components"])
    scales = np.array(version["metric"]["scales"])
    expected = dict(zip(IRIS_FEATURES, np.linalg.norm(L, axis=0) / scales, strict=True))
    for feature, share, per_unit in feature_weights(explanation):
        np.testing.assert_allclose(per_unit, expected[feature], rtol=1e-9)
        assert 0 <= share <= 1
    assert sum(s for _, s, _ in feature_weights(explanation)) == pytest.approx(1.0)
    code, out, _ = run("explain", name, "1")
    folds = [line.split() for line in out.splitlines()[-len(explanation["folds"]):]]
    assert [(int(f[0]), float(f[3])) for f in folds] == [
        (f["fold"], round(f["ari"], 3)) for f in explanation["folds"]]


def test_drift_shows_the_verdict_and_names_the_shifted_feature(live, run, two_versions
                                                               ) -> None:
    name = two_versions
    pool = np.vstack([X for X, _ in iris_batches(6)])
    moved = pool.copy()
    moved[:, 2] *= 1000  # petal length in other units
    with live.client() as lw:
        lw.group(name, moved, 3, columns=IRIS_FEATURES)
        expected = lw.drift(name)
    code, out, _ = run("drift", name)
    assert code == 0 and expected["verdict"] == "drifted"
    assert out.splitlines()[0].startswith(f"{name} version 1: drifted")
    row = next(line.split() for line in out.splitlines() if line.startswith("petal_length"))
    assert row[1] == "drifted" and "flagged: petal_length" in out
    assert expected["margins"]["reference"] == "held_out"
    assert "margins scored against: the training batches held out in cross-validation" in out


def test_activate_and_rollback_need_a_reason_and_move_the_active_version(
        live, run, two_versions) -> None:
    name = two_versions
    with pytest.raises(SystemExit) as refused:  # argparse: --reason is required
        main(["activate", name, "2", "--url", live.url, "--token", live.token])
    assert refused.value.code == 2
    code, out, _ = run("activate", name, "2", "--reason", "try the baseline")
    assert code == 0 and "version 1 -> 2" in out
    with live.client() as lw:
        assert lw.get_metric(name)["active_version"] == 2
    code, out, _ = run("rollback", name, "--reason", "baseline groups worse")
    assert code == 0 and "version 2 -> 1" in out
    with live.client() as lw:
        assert lw.get_metric(name)["active_version"] == 1
        moves = [(h["from"], h["to"], h["reason"]) for h in lw.history(name)]
    assert moves[-2:] == [(1, 2, "try the baseline"), (2, 1, "baseline groups worse")]



def test_follow_shows_progress_until_the_fit_ends(live, run, metric_name) -> None:
    with live.client() as lw:
        lw.put_metric(metric_name, IRIS_FEATURES)
        for X, y in iris_batches(3):
            lw.post_batch(metric_name, X, y, columns=IRIS_FEATURES)
        fit = lw.start_fit(metric_name)
    code, out, err = run("follow", fit["fit_id"], "--interval", "0.1", "--timeout", "120")
    assert code == 0, err
    assert f"fit {fit['fit_id']} succeeded: version 1 of {metric_name} (activated)" in out
    assert "100%" in err  # the bar, on stderr, reached the end
    code, _, err = run("rollback", metric_name, "--reason", "no")  # 1 is the first active
    assert code == 1 and "nothing to roll back to" in err


def test_queue_refreshes_a_bounded_number_of_times(live, run) -> None:
    code, out, _ = run("queue", "--times", "2", "--interval", "0.5")
    assert code == 0
    assert out.count("fit queue at") == 2 and out.count("waiting") == 2
    assert live.settings.queue_name in out
    assert f"{live.settings.key_prefix}-worker" in out  # the fixture's worker


def _post_after(lw, name: str, when: datetime, seed: int) -> dict:
    """Post a batch once the wall clock (the service's: same machine) is past ``when``."""
    deadline = time.monotonic() + 5
    while datetime.now(timezone.utc) <= when:  # at most a few milliseconds
        assert time.monotonic() < deadline
    (X, y), = iris_batches(1, seed=seed)
    return lw.post_batch(name, X, y, columns=IRIS_FEATURES)


def test_prune_deletes_only_batches_older_than_the_date(live, run, metric_name,
                                                        monkeypatch) -> None:
    with live.client() as lw:
        lw.put_metric(metric_name, IRIS_FEATURES)
        old = [_post_after(lw, metric_name, datetime.min.replace(tzinfo=timezone.utc), s)
               for s in (1, 2)]
        cutoff = parse_when(old[-1]["created_at"]) + timedelta(milliseconds=1)
        new = _post_after(lw, metric_name, cutoff, 3)
        assert parse_when(new["created_at"]) >= cutoff
    stamp = cutoff.isoformat(timespec="milliseconds").replace("+00:00", "Z")

    code, out, _ = run("prune", metric_name, "--before", stamp, "--dry-run")
    assert code == 0 and "would delete 2 batches" in out
    assert all(b["batch_id"] in out for b in old) and new["batch_id"] not in out
    with live.client() as lw:
        assert len(lw.list_batches(metric_name)) == 3  # a dry run deletes nothing

    # URL and token from the environment this time
    monkeypatch.setenv("LIKEWISE_URL", live.url)
    monkeypatch.setenv("LIKEWISE_TOKEN", live.token)
    assert main(["prune", metric_name, "--before", stamp]) == 0
    with live.client() as lw:
        assert [b["batch_id"] for b in lw.list_batches(metric_name)] == [new["batch_id"]]


def test_an_error_is_one_line_and_exit_code_1(run) -> None:
    code, out, err = run("versions", "no-such-metric")
    assert code == 1 and out == ""
    assert "404" in err and "Traceback" not in err


def test_queue_watch_ends_quietly_on_ctrl_c(live) -> None:
    import argparse
    import io

    from likewise_client.ops import cmd_queue

    def interrupted(seconds: float) -> None:  # Ctrl-C arrives while it waits
        assert 0.5 <= seconds <= 60  # the interval is kept within its bounds
        raise KeyboardInterrupt

    out = io.StringIO()
    with live.client() as lw:
        code = cmd_queue(lw, argparse.Namespace(interval=0.01, times=0), out, interrupted)
    assert code == 0 and out.getvalue().count("fit queue at") == 1
