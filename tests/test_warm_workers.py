"""Every worker warms each live model (one prediction, the laplacian's L1 loop compiled for
the very argument types requests pass) before it serves: no request meets a compilation."""

from __future__ import annotations

from make_coating_data import TYPICAL_ROW
from service_helpers import Gunicorn, metric_count, metric_samples, wait_for

from trainer.cli import main


def _laplacian_store(root, demo_csv):
    csv = root / "small.csv"
    csv.write_text("\n".join(demo_csv.read_text().splitlines()[:61]) + "\n")
    store = root / "store"
    assert main(["train", str(csv), "--name", "lap", "--release", "--store", str(store),
                 "--target", "hardness_s", "--features", ",".join(TYPICAL_ROW),
                 "--kernel", "laplacian", "--gamma", "0.1", "--ridge", "0.5", "--no-report",
                 "--quiet"]) == 0
    return store


def test_no_request_compiles_in_a_ready_worker(tmp_path, demo_csv):
    store = _laplacian_store(tmp_path, demo_csv)
    env = {"PROMETHEUS_MULTIPROC_DIR": str(tmp_path / "metrics")}
    with Gunicorn(store, workers=2, env=env) as g:
        wait_for(lambda: g.get("/readyz").json()["ready"], what="/readyz to say ready")

        def compiles(during: str) -> float:
            return metric_count(metric_samples(g.get("/metrics").text),
                                "kridge_l1_compiles_total", during=during)

        # each worker compiles while warming, before it takes its first request
        wait_for(lambda: compiles("warm") >= 2, what="both workers to warm model lap")
        for i in range(40):  # enough for both workers to answer several
            row = {**TYPICAL_ROW, "oven_temp_c": 150.0 + i}
            r = g.post("/models/lap/predict", json={"rows": [row] * (1 + i % 3)})
            assert r.status_code == 200, r.text
        assert compiles("request") == 0

