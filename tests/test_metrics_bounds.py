"""Metrics stay bounded whatever callers send: label values come from the store only, so
thousands of requests for random model names add no series, neither to /metrics nor to the
workers' metric files (service/metrics.py, service/routes/errors.py)."""

from __future__ import annotations

import random
import string
from pathlib import Path

import requests
from make_coating_data import TYPICAL_ROW
from service_helpers import Gunicorn, metric_count, metric_samples, small_model_store

from service.metrics import UNKNOWN_MODEL

NAMES = 3000


def folder_bytes(path: Path) -> int:
    return sum(f.stat().st_size for f in path.iterdir())


def test_random_model_names_add_no_series(tmp_path, demo_csv):
    store = small_model_store(tmp_path, demo_csv)
    metrics_dir = tmp_path / "metrics"
    metrics_dir.mkdir()
    rng = random.Random(5)
    alphabet = string.ascii_letters + string.digits + "-_. %"
    with Gunicorn(store, workers=2, env={"PROMETHEUS_MULTIPROC_DIR": str(metrics_dir)}) as g:
        g.wait_ready()
        s = requests.Session()
        row = {"rows": [list(TYPICAL_ROW.values())]}

        def one_round(names):
            for name in names:
                path = requests.utils.quote(name, safe="")
                s.post(f"{g.base}/models/{path}/predict", json=row, timeout=30)
                s.get(f"{g.base}/models/{path}/versions", timeout=30)
            assert s.post(g.base + "/models/c/predict", json=row, timeout=30).ok
            assert s.post(g.base + "/models/c/predict", json={"rows": [[1]]},
                          timeout=30).status_code == 422

        one_round(["nope", "bad name"])  # every family and label set exists from here on
        before_text = s.get(g.base + "/metrics", timeout=30).text
        before_files = folder_bytes(metrics_dir)
        names = {"".join(rng.choices(alphabet, k=rng.randint(1, 40))) for _ in range(NAMES)}
        one_round(names - {"c", ".", ".."})  # a path of "." or ".." names another route
        after_text = s.get(g.base + "/metrics", timeout=30).text
        after_files = folder_bytes(metrics_dir)

    samples = metric_samples(after_text)
    models = {dict(labels).get("model") for (_, labels) in samples} - {None}
    assert models == {"c", UNKNOWN_MODEL}, sorted(models)[:10]
    # every unknown name was counted, under the one label: 2 per name, 2 rounds' worth
    unknown = metric_count(samples, "kridge_errors_total", model=UNKNOWN_MODEL)
    assert unknown == 2 * (len(names - {"c", ".", ".."}) + 2)
    # only the figures changed: the same lines, a few digits longer
    assert len(after_text.splitlines()) == len(before_text.splitlines())
    assert len(after_text) < len(before_text) + 2000
    assert after_files == before_files  # no new keys in the workers' files
