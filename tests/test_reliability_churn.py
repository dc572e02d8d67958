"""Release churn under load (short form; ``bench/soak.py`` is the long one).

8 clients predict without pause for 6 s against a real 2-worker gunicorn while the live
version changes 8 times, through the command line (its ``main``, in this process) and the
admin route, releases and rollbacks mixed. No request may fail, every answer must name a
version live at some moment from 1 s before its request to its end, and every worker
follows each change within 1 s (default poll interval, 0.25 s).
"""

from __future__ import annotations

import sys
from pathlib import Path

from service_helpers import Gunicorn
from test_reliability_tampering import every_worker_serving

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from test_fuzz import small_store  # noqa: E402

from bench.soak import Change, judge, run_churn  # noqa: E402

TOKEN = "churn-token-61f0"


def test_release_churn_under_load_loses_nothing(tmp_path, demo_csv):
    store = small_store(tmp_path, demo_csv, versions=4)
    metrics = tmp_path / "metrics"
    env = {"KRIDGE_ADMIN_TOKEN": TOKEN, "PROMETHEUS_MULTIPROC_DIR": str(metrics)}
    with Gunicorn(store, workers=2, env=env) as g:
        every_worker_serving(g, metrics, 2, model="coating")
        res = run_churn(g.base, store, TOKEN, "coating", [1, 2, 3, 4], clients=8,
                        seconds=6.0, changes=8, cli_in_process=True)
    figures = res.figures()
    print("churn:", figures)
    assert res.failed == 0 and res.stale == 0, res.failures
    assert res.requests >= 200
    assert len(res.changes) == 8
    assert {"cli release", "admin release", "cli rollback", "admin rollback"} <= set(
        figures["by"])
    assert len(res.versions_seen) >= 3  # the clients really saw the changes
    assert res.max_lag < 1.0


def test_the_judge_catches_stale_and_failed_answers():
    # a timeline: v1 from the start, v2 live from t = 10.0 (change took 0.1 s)
    timeline = [Change("initial", -3600, -3600, 1), Change("cli release", 10.0, 10.1, 2)]
    good = [(9.0, 9.01, 200, 1, ""), (10.05, 10.06, 200, 2, ""), (10.5, 10.51, 200, 1, ""),
            (12.0, 12.01, 200, 2, "")]
    res = judge(good, timeline, follow=1.0)
    assert res.failed == res.stale == 0 and abs(res.max_lag - 0.5) < 1e-9
    late = judge(good + [(11.5, 11.51, 200, 1, "")], timeline, follow=1.0)
    assert late.stale == 1 and late.max_lag > 1.0  # v1 1.4 s after the change
    never = judge(good + [(12.0, 12.01, 200, 3, "")], timeline, follow=1.0)
    assert never.stale == 1  # v3 was never live
    reset = judge(good + [(12.0, 12.01, 0, 0, "ConnectionResetError")], timeline, follow=1.0)
    assert reset.failed == 1
