"""``kridge compare --pairs``: the shadow's pairs file from a real gunicorn, joined to lab values.

Scenario data are our own (the demo's invented coating line): the lab values are the
training file's own hardness values, which the two versions fit differently. References:
scikit-learn 1.9.1 ``sklearn.metrics`` for RMSE and MAE, statsmodels 0.15.0 OLS with a
Newey–West (HAC, Bartlett) covariance for the Diebold–Mariano statistic.
"""

from __future__ import annotations

import csv
import json
import math
import threading

import numpy as np
import pytest
import requests
import statsmodels.api as sm
from cli_helpers import run_cli
from service_helpers import Gunicorn, metric_count, metric_samples, wait_for
from sklearn.metrics import mean_absolute_error, mean_squared_error
from test_serving_traffic import FEATURES, served  # noqa: F401 (the fixture)

from service import idle
from service.answers import COMPUTE_SLOT
from service.shadow import idle_slot
from trainer.compare_stats import newey_west_lag

N = 40  # rows sent with ids s0 … s39


def lab_table(root) -> list[dict]:
    with open(root / "small.csv") as fh:
        return list(csv.DictReader(fh))


def write_lab(path, rows: list[tuple[str, str]]) -> None:
    path.write_text("sample,hardness_s\n" + "".join(f"{i},{y}\n" for i, y in rows))


def serve_with_ids(root, store) -> list[dict]:
    """Rows s0 … s39 through a gunicorn with version 2 as the shadow; the pairs file's lines."""
    pairs = root / "pairs.jsonl"
    table = lab_table(root)
    env = {"KRIDGE_SHADOW_PAIRS": str(pairs), "KRIDGE_POLL_SECONDS": "0.1"}
    from trainer.cli import main
    assert main(["shadow", "c", "2", "--store", str(store)]) == 0
    with Gunicorn(store, workers=1, env=env) as g:
        g.wait_ready()
        wait_for(lambda: "is scored beside the live version" in g.get("/page/c").text,
                 what="the worker to shadow")
        s = requests.Session()
        for start in range(0, N, 4):
            rows = [[float(table[i][f]) for f in FEATURES] for i in range(start, start + 4)]
            r = s.post(f"{g.base}/models/c/predict", json={
                "rows": rows, "ids": [f"s{i}" for i in range(start, start + 4)]}, timeout=30)
            assert r.status_code == 200, r.text
        wait_for(lambda: metric_count(metric_samples(g.get("/metrics").text),
                                      "kridge_shadow_rows_total", model="c") >= N,
                 what="the shadow to score every row in idle time")
    return [json.loads(t) for t in pairs.read_text().splitlines()]


def test_compare_scores_the_served_pairs(served, capsys):  # noqa: F811
    root, store = served
    lines = serve_with_ids(root, store)
    capsys.readouterr()  # training and kridge shadow said their part
    assert sorted(p["id"] for p in lines) == sorted(f"s{i}" for i in range(N))
    table = lab_table(root)
    # lab values for s0 … s34 (s35 … s39 never measured) and three samples never served
    lab = [(f"s{i}", table[i]["hardness_s"]) for i in range(35)] + [
        ("x1", "4.0"), ("x2", "4.1"), ("x3", "")]
    write_lab(root / "lab.csv", lab)
    code, out, err = run_cli(capsys, "compare", "c", root / "lab.csv", "--pairs",
                             root / "pairs.jsonl", "--id", "sample", "--json",
                             "--store", store)
    assert code == 0, err
    doc = json.loads(out)
    c = doc["counts"]
    assert (c["matched"], c["pairs_unmatched"], c["lab_unmatched"]) == (35, 5, 2)
    assert c["lab_rows_without_value"] == 1
    # the joined pairs in the order served, values as the pairs file holds them
    by_id = {p["id"]: p for p in lines}
    joined = sorted((by_id[i] for i, _ in lab[:35]), key=lambda p: p["time"])
    y = np.array([float(table[int(p["id"][1:])]["hardness_s"]) for p in joined])
    figs = {}
    for v, key in ((1, "live"), (2, "shadow")):
        pred = np.array([p[key] for p in joined])
        f = next(s for s in doc["versions"] if s["version"] == v)["targets"]["hardness_s"]
        figs[key] = y - pred
        assert f["rows"] == 35
        assert f["rmse"] == pytest.approx(math.sqrt(mean_squared_error(y, pred)), rel=1e-12)
        assert f["mae"] == pytest.approx(mean_absolute_error(y, pred), rel=1e-12)
        assert f["bias"] == pytest.approx(float(np.mean(y - pred)), rel=1e-12)
    # Diebold–Mariano on d = live² − shadow²: the t statistic of mean(d) under a
    # Newey–West covariance with the same lag (statsmodels, no small-sample correction)
    d = figs["live"] ** 2 - figs["shadow"] ** 2
    ref = sm.OLS(d, np.ones(d.size)).fit(cov_type="HAC", use_t=False, cov_kwds={
        "maxlags": newey_west_lag(d.size), "use_correction": False})
    (verdict,) = doc["verdicts"]
    assert (verdict["baseline"], verdict["version"]) == (1, 2)
    assert verdict["test"]["statistic"] == pytest.approx(float(ref.tvalues[0]), rel=1e-9)
    assert verdict["test"]["p_value"] == pytest.approx(float(ref.pvalues[0]), rel=1e-9)
    # the text form says the same in words
    code, out, _ = run_cli(capsys, "compare", "c", root / "lab.csv", "--pairs",
                           root / "pairs.jsonl", "--id", "sample", "--store", store)
    assert code == 0 and "35 row ids matched" in out and verdict["text"] in out


def write_pairs(path, rows: list[dict]) -> None:
    path.write_text("".join(json.dumps(r) + "\n" for r in rows))


def pair(rid, live_v=1, shadow_v=2, live=1.0, shadow=1.5) -> dict:
    return {"time": "2026-01-01T00:00:00.000+00:00", "request_id": "q", "model": "c",
            "live_version": live_v, "shadow_version": shadow_v, "row": 0, "id": rid,
            "inputs": dict.fromkeys(FEATURES, 0.0), "live": live, "shadow": shadow}


def test_duplicates_and_mixed_pairs_are_refused(served, capsys):  # noqa: F811
    root, store = served
    capsys.readouterr()
    write_lab(root / "lab.csv", [("a", "1"), ("b", "2")])
    write_pairs(root / "p.jsonl", [pair("a"), pair("b"), pair("a")])
    code, _, err = run_cli(capsys, "compare", "c", root / "lab.csv", "--pairs",
                           root / "p.jsonl", "--id", "sample", "--store", store)
    assert code == 2 and "row id 'a' is on lines 1 and 3" in err and "Traceback" not in err
    write_pairs(root / "p.jsonl", [pair("a"), pair("b")])
    write_lab(root / "lab2.csv", [("a", "1"), ("b", "2"), ("a", "3")])
    code, _, err = run_cli(capsys, "compare", "c", root / "lab2.csv", "--pairs",
                           root / "p.jsonl", "--id", "sample", "--store", store)
    assert code == 2 and "line 4: row id 'a' again (first at line 2)" in err
    # two version pairs in one file: choose one; --versions picks it
    write_pairs(root / "p.jsonl", [pair("a"), pair("b"), pair("a", shadow_v=3)])
    code, _, err = run_cli(capsys, "compare", "c", root / "lab.csv", "--pairs",
                           root / "p.jsonl", "--id", "sample", "--store", store)
    assert code == 2 and "live v1 / shadow v2, live v1 / shadow v3" in err
    code, out, err = run_cli(capsys, "compare", "c", root / "lab.csv", "--pairs",
                             root / "p.jsonl", "--id", "sample", "--versions", "1,3",
                             "--json", "--store", store)
    assert code == 0, err
    doc = json.loads(out)
    assert doc["counts"]["matched"] == 1 and doc["counts"]["pairs_other_versions"] == 2
    code, _, err = run_cli(capsys, "compare", "c", root / "lab.csv", "--id", "sample",
                           "--store", store)
    assert code == 2 and "--pairs and --id go together" in err
    (root / "bad.jsonl").write_text(json.dumps(pair("a")) + "\n{oops\n")
    code, _, err = run_cli(capsys, "compare", "c", root / "lab.csv", "--pairs",
                           root / "bad.jsonl", "--id", "sample", "--store", store)
    assert code == 2 and "bad.jsonl: line 2: not a JSON object" in err


def test_shadow_waits_while_a_request_is_in_flight():
    took = threading.Event()

    def shadow() -> None:
        with idle_slot():
            took.set()

    idle.started()
    try:
        t = threading.Thread(target=shadow)
        t.start()
        # the slot is free, yet the shadow must not take it while the request is marked
        assert not took.wait(0.05)
        with COMPUTE_SLOT:  # the request's own computation gets the slot at once
            pass
    finally:
        idle.finished()
    assert took.wait(10), "the shadow never took the slot once the worker was idle"
    t.join(10)
    assert not idle.busy()
