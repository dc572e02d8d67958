"""Drift while serving and the shadow version, on a real gunicorn (service/traffic.py).

Scenario data are our own (the demo's invented coating line); the drift test itself is the
MMD permutation test already checked against references in tests/test_drift.py.
"""

from __future__ import annotations

import csv
import json
import re
from pathlib import Path

import numpy as np
import pytest
import requests
from make_coating_data import TYPICAL_ROW
from service_helpers import Gunicorn, metric_count, metric_samples, small_model_store, wait_for

from service.model import load_model
from service.store import Store
from trainer.cli import main

FEATURES = list(TYPICAL_ROW)


def training_rows(root: Path) -> np.ndarray:
    with open(root / "small.csv") as fh:
        return np.array([[float(r[f]) for f in FEATURES] for r in csv.DictReader(fh)])


def train_version(root: Path, store: Path, name: str, ridge: str) -> None:
    assert main(["train", str(root / "small.csv"), "--name", name, "--store", str(store),
                 "--target", "hardness_s", "--features", ",".join(FEATURES), "--gamma", "0.3",
                 "--ridge", ridge, "--no-report", "--quiet"]) == 0


@pytest.fixture
def served(tmp_path, demo_csv):
    """Model c: version 1 live, versions 2 and 3 trained but not live."""
    store = small_model_store(tmp_path, demo_csv)
    train_version(tmp_path, store, "c", "0.1")
    train_version(tmp_path, store, "c", "0.05")
    return tmp_path, store


def samples(g: Gunicorn) -> dict:
    return metric_samples(g.get("/metrics").text)


def test_drift_gauges_flag_drifted_traffic_only(tmp_path, demo_csv):
    store = small_model_store(tmp_path, demo_csv)
    # the same model under a second name: one gets drifted traffic, the other not
    train_version(tmp_path, store, "steady", "0.5")
    assert main(["release", "steady", "1", "--store", str(store)]) == 0
    x = training_rows(tmp_path)
    rng = np.random.default_rng(3)
    same = x[rng.integers(0, len(x), 120)]
    moved = same.copy()
    moved[:, 0] += 3 * x[:, 0].std()  # oven 3 training standard deviations hotter
    # the first test runs 2 s after the worker starts: after the traffic, as a rule (a test
    # of part of it would hold at least drift_window.MIN_ROWS rows, and pass as well)
    env = {"KRIDGE_DRIFT_SECONDS": "2", "KRIDGE_DRIFT_PERMUTATIONS": "99",
           "KRIDGE_DRIFT_WINDOW": "100"}
    with Gunicorn(store, workers=1, env=env) as g:
        g.wait_ready()
        s = requests.Session()
        for i in range(0, 120, 4):
            for name, rows in (("c", moved), ("steady", same)):
                r = s.post(f"{g.base}/models/{name}/predict",
                           json={"rows": rows[i:i + 4].tolist()}, timeout=30)
                assert r.status_code == 200, r.text

        def tested() -> dict | None:
            m = samples(g)
            names = {(n, dict(lab).get("model")) for n, lab in m}
            ok = all((n, model) in names for n in ("kridge_drift_p_value",
                                                   "kridge_drift_statistic")
                     for model in ("c", "steady"))
            return m if ok else None

        got = wait_for(tested, what="a drift test of both models")
        page = g.get("/").text
    p_moved = metric_count(got, "kridge_drift_p_value", model="c")
    p_same = metric_count(got, "kridge_drift_p_value", model="steady")
    # 99 permutations: the smallest possible p-value is 1/100
    assert p_moved <= 0.02, p_moved
    assert p_same > 0.05, p_same
    assert (metric_count(got, "kridge_drift_statistic", model="c")
            > metric_count(got, "kridge_drift_statistic", model="steady"))
    assert 30 <= metric_count(got, "kridge_drift_window_rows", model="c") <= 100
    assert "drift p-value" in page


def without_timing(raw: bytes) -> bytes:
    return re.sub(rb'"timing_ms":\{[^}]*\}', b"", raw)


def ask(g: Gunicorn, rows: list, rid: str) -> requests.Response:
    return requests.post(g.base + "/models/c/predict", json={"rows": rows, "ids": [
        f"r{i}" for i in range(len(rows))]}, headers={"X-Request-ID": rid}, timeout=30)


def test_shadow_on_off_release_and_pairs(served):
    root, store = served
    pairs = root / "pairs.jsonl"
    x = training_rows(root)
    batches = [x[i:i + 3].tolist() for i in range(0, 30, 3)]
    env = {"KRIDGE_SHADOW_PAIRS": str(pairs), "KRIDGE_POLL_SECONDS": "0.1"}
    with Gunicorn(store, workers=2, env=env) as g:
        g.wait_ready()
        before = [ask(g, b, f"q{i}") for i, b in enumerate(batches)]
        assert main(["shadow", "c", "2", "--store", str(store)]) == 0
        assert Store(store).shadow_version("c") == 2

        def shadowed_rows() -> float:
            return metric_count(samples(g), "kridge_shadow_rows_total", model="c")

        # until both workers shadow (each has its own queue): requests on new connections
        wait_for(lambda: ask(g, batches[0], "warm") and shadowed_rows() >= 30,
                 what="shadowed requests")
        n0 = shadowed_rows()
        after = [ask(g, b, f"q{i}") for i, b in enumerate(batches)]
        wait_for(lambda: shadowed_rows() >= n0 + 30, what="the shadow to catch up")
        m = samples(g)
        assert main(["shadow", "c", "--off", "--store", str(store)]) == 0
        wait_for(lambda: all(line.strip() for line in [pairs.read_text()]), what="pairs")
    for b, a in zip(before, after, strict=True):
        assert a.status_code == b.status_code == 200
        assert without_timing(a.content) == without_timing(b.content)
        assert a.headers["X-Model-Version"] == b.headers["X-Model-Version"] == "1"
    hist = metric_count(m, "kridge_shadow_abs_difference_count", model="c")
    assert hist == metric_count(m, "kridge_shadow_rows_total", model="c") >= 60
    assert ("kridge_shadow_dropped_total", (("model", "c"),)) in m
    # the pairs file: live values are the answers, shadow values version 2's offline ones
    lines = [json.loads(t) for t in pairs.read_text().splitlines()]
    mine = [p for p in lines if re.fullmatch(r"q\d+", p["request_id"])]
    assert len(mine) == 30
    v2 = load_model(store, "c", 2)
    answers = {(f"q{i}", r["id"]): r["value"] for i, a in enumerate(after)
               for r in a.json()["results"]}
    for p in mine:
        assert set(p) == {"time", "request_id", "model", "live_version", "shadow_version",
                          "row", "id", "inputs", "live", "shadow"}
        assert (p["model"], p["live_version"], p["shadow_version"]) == ("c", 1, 2)
        assert p["live"] == answers[(p["request_id"], p["id"])]
        inputs = np.array([[p["inputs"][f] for f in FEATURES]])
        assert p["shadow"] == pytest.approx(float(v2.predict(inputs)[0]), rel=1e-12)
    history = Store(store).history("c")
    assert [h["action"] for h in history][-2:] == ["shadow", "shadow_off"]
    assert Store(store).shadow("c") is None


def test_shadow_stops_after_off_and_release_makes_it_live(served):
    root, store = served
    x = training_rows(root)
    with Gunicorn(store, workers=1, env={"KRIDGE_POLL_SECONDS": "0.1"}) as g:
        g.wait_ready()
        assert main(["shadow", "c", "3", "--store", str(store)]) == 0
        wait_for(lambda: ask(g, x[:2].tolist(), "a") and metric_count(
            samples(g), "kridge_shadow_rows_total", model="c") > 0, what="the shadow")
        assert main(["shadow", "c", "--off", "--store", str(store)]) == 0
        # once the worker saw the pointer go, requests are no longer shadowed
        wait_for(lambda: "no shadow" in g.get("/page/c").text, what="the page to say so")
        n = metric_count(samples(g), "kridge_shadow_rows_total", model="c")
        for _ in range(5):
            assert ask(g, x[:2].tolist(), "b").status_code == 200
        assert metric_count(samples(g), "kridge_shadow_rows_total", model="c") == n
        # releasing the shadow makes it live and ends the shadow
        assert main(["shadow", "c", "3", "--store", str(store)]) == 0
        assert main(["release", "c", "3", "--store", str(store)]) == 0
        assert Store(store).shadow("c") is None
        last = Store(store).history("c")[-1]
        assert (last["action"], last["version"], last["reason"]) == ("shadow_off", 3, "released")
        wait_for(lambda: ask(g, x[:1].tolist(), "c").headers.get("X-Model-Version") == "3",
                 what="version 3 live")
        page = g.get("/page/c").text
    # the timeline words each record; "live now" marks the release, not the shadow's end
    assert "named <strong>v3</strong> the shadow" in page and "ended the shadow v3" in page
    assert page.count('class="live">live now') == 1
    assert page.index("ended the shadow v3") < page.index(
        "released <strong>v3</strong>") < page.index("live now")


def test_shadow_that_fails_verification_is_ignored_and_reported(served):
    root, store = served
    x = training_rows(root)
    dual = store / "c" / "versions" / "3" / "arrays" / "dual.npy"
    dual.write_bytes(dual.read_bytes()[:-8] + b"\0" * 8)  # same size, other bytes
    with Gunicorn(store, workers=1, env={"KRIDGE_POLL_SECONDS": "0.1"}) as g:
        g.wait_ready()
        first = ask(g, x[:2].tolist(), "a")
        Store(store).set_shadow("c", 3)  # named without the CLI's verification
        wait_for(lambda: metric_count(samples(g), "kridge_shadow_load_failures_total",
                                      model="c", version="3") >= 1, what="the refusal")
        again = ask(g, x[:2].tolist(), "a")
        page = g.get("/page/c").text
        m = samples(g)
    assert without_timing(again.content) == without_timing(first.content)
    assert metric_count(m, "kridge_shadow_rows_total", model="c") == 0
    assert "shadow version 3 is not used" in page and "checksum" in page


def test_a_failing_hook_never_changes_the_answer(served, monkeypatch):
    """The drift window and the shadow queue run after the answer is made: a fault there is
    logged, and the caller still gets the answer (in process, through the Flask app)."""
    from service import traffic
    from service.app import create_app
    from service.settings import Settings

    _root, store = served
    app = create_app(Settings.from_env(store=str(store)), watch=False)

    class Broken:
        def after_answer(self, *a):
            raise RuntimeError("a fault after the answer")

    monkeypatch.setattr(traffic, "CURRENT", Broken())
    r = app.test_client().post("/models/c/predict", json={"rows": [list(TYPICAL_ROW.values())]})
    assert r.status_code == 200
