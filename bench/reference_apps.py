"""The two reference servers the HTTP bench runs beside ours, on the same bundle.

(a) ``bare``: a Flask handler that parses the row and computes k(x, X)·α for the rbf kernel
    with plain numpy (squared norms precomputed) — the least a hand-written service would do;
(b) ``sklearn``: a Flask handler calling scikit-learn's ``KernelRidge.predict`` on the same
    model (``X_fit_`` and ``dual_coef_`` set from the bundle).

Run as ``gunicorn 'bench.reference_apps:make("bare")'`` with env KRIDGE_STORE and
BENCH_MODEL set. Neither reports envelope flags or latency: they are floors, not products.
"""

from __future__ import annotations

import os

import numpy as np
from flask import Flask, jsonify, request


def _bundle():
    from service.store import Store

    store = Store(os.environ["KRIDGE_STORE"])
    name = os.environ.get("BENCH_MODEL", "bench")
    version = store.live_version(name)
    man = store.read_manifest(name, version)
    arrays = store.load_arrays(name, version, man)
    return man, arrays


def make(kind: str) -> Flask:
    man, arrays = _bundle()
    mean = np.asarray(man["standardization"]["mean"])
    scale = np.asarray(man["standardization"]["scale"])
    intercept = float(man["intercept"][0])
    gamma = float(man["kernel"]["params"]["gamma"])
    x_train = np.asarray(arrays["x_train"])
    dual = np.asarray(arrays["dual"])[:, 0]
    app = Flask(__name__)

    if kind == "bare":
        x_sq = np.einsum("ij,ij->i", x_train, x_train)

        def compute(row: np.ndarray) -> float:
            xs = (row - mean) / scale
            d2 = x_sq - 2.0 * (x_train @ xs) + xs @ xs
            return float(np.exp(-gamma * np.maximum(d2, 0.0)) @ dual + intercept)
    else:
        from sklearn.kernel_ridge import KernelRidge

        kr = KernelRidge(kernel="rbf", gamma=gamma)
        kr.X_fit_ = x_train
        kr.dual_coef_ = dual
        kr.n_features_in_ = x_train.shape[1]

        def compute(row: np.ndarray) -> float:
            xs = ((row - mean) / scale)[None, :]
            return float(kr.predict(xs)[0] + intercept)

    @app.post("/models/<name>/predict")
    def predict(name: str):
        rows = request.get_json()["rows"]
        return jsonify({"value": compute(np.asarray(rows[0], dtype=np.float64))})

    return app
