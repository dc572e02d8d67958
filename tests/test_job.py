"""The one training job: both solvers run through the same stages, each shared stage once
per job, and the options are resolved into a plan before any data row is read."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from service.store import Store
from trainer import calibration, manifest, publish
from trainer.job import TrainOptions, train
from trainer.plan import resolve

SHARED_STAGES = ((calibration, "calibrate"), (manifest, "build_manifest"),
                 (publish, "publish"))


def _csv(path: Path, n: int = 600) -> Path:
    rng = np.random.default_rng(21)
    a, b = rng.uniform(-1, 1, n), rng.uniform(-1, 1, n)
    y = np.sin(2 * a) + a * b + 0.1 * rng.standard_normal(n)
    table = np.column_stack([np.arange(n), a, b, np.arange(n) % 7, y])
    np.savetxt(path, table, fmt="%.17g", delimiter=",", header="minute,a,b,note,y",
               comments="")
    return path


def _options(data: Path, store: Path, name: str, **kw) -> TrainOptions:
    return TrainOptions(data=str(data), targets=["y"], name=name, features=["a", "b"],
                        kernel="rbf", gamma=1.0, ridge=0.01, store=str(store), quiet=True,
                        **kw)


@pytest.fixture
def stage_calls(monkeypatch) -> dict[str, int]:
    """Counts of every call of the shared stages (the real stage runs each time)."""
    calls = {name: 0 for _, name in SHARED_STAGES}
    for module, name in SHARED_STAGES:
        real = getattr(module, name)

        def spy(*args, _real=real, _name=name, **kw):
            calls[_name] += 1
            return _real(*args, **kw)

        monkeypatch.setattr(module, name, spy)
    return calls


def test_both_solvers_run_the_same_stages_once_each(tmp_path, stage_calls):
    data, store = _csv(tmp_path / "rows.csv"), tmp_path / "st"
    got = {}
    for method, extra in (("exact", {}), ("nystrom", {"landmarks": 40})):
        before = dict(stage_calls)
        summary = train(_options(data, store, method, method=method, **extra),
                        log=lambda *_: None)
        assert {k: stage_calls[k] - before[k] for k in stage_calls} == {
            "calibrate": 1, "build_manifest": 1, "publish": 1}, method
        got[method] = Store(store).read_manifest(method, summary["version"])
    exact, nystrom = got["exact"], got["nystrom"]
    assert exact["training"]["method"] == "exact"
    assert nystrom["training"]["method"] == "nystrom"
    assert set(exact) == set(nystrom)
    # the shared part of the training section is written by one builder for both
    shared = set(exact["training"]) & set(nystrom["training"])
    assert {"rows", "data_sha256", "data_format", "row_counts", "holdout_kind",
            "holdout_rows", "seed", "solver", "final_fit"} <= shared
    assert exact["training"]["data_sha256"] == nystrom["training"]["data_sha256"]
    assert set(nystrom["training"]) - shared == {"landmarks", "parts", "cluster", "solve"}
    # only the exact solver holds every row, so only it counts repeated input rows
    assert set(exact["training"]) - shared == {"duplicates"}
    assert exact["intervals"]["residuals"] == "LOO"
    assert nystrom["intervals"]["residuals"] == "calibration"
    assert set(exact["metrics"]) == {"holdout", "loo"}
    assert set(nystrom["metrics"]) == {"holdout", "validation"}


def test_options_are_resolved_into_a_frozen_plan_before_any_row_is_read(tmp_path):
    data = _csv(tmp_path / "rows.csv")
    opts = TrainOptions(data=str(data), targets=["y"], name="m", store=str(tmp_path / "st"),
                        time="minute", holdout=0.25, seed=3)
    plan, _ = resolve(opts)
    # without --features every column besides targets and time is an input
    assert plan.columns.features == ("a", "b", "note")
    assert plan.columns.time == "minute"
    assert plan.source.dialect() == {"format": "csv", "separator": ",", "decimal": "."}
    assert (plan.method.name, plan.method.reason) == (
        "exact", "600 rows with a target ≤ 15000: exact KRR (--method auto)")
    assert (plan.splits.holdout, plan.splits.seed) == (0.25, 3)
    assert plan.parameters.to_tune == ("gamma", "ridge")
    assert plan.parameters.explicit(3) is None
    with pytest.raises(dataclasses.FrozenInstanceError):
        plan.splits = None  # type: ignore[misc]
    given = resolve(dataclasses.replace(opts, kernel="polynomial", gamma=0.5, degree=2,
                                        coef0=1, ridge=0.1, method="nystrom"))[0]
    assert given.parameters.to_tune == ()
    assert given.parameters.explicit(3).params() == {"gamma": 0.5, "degree": 2.0,
                                                      "coef0": 1.0}
    assert given.method.reason == "asked for with --method nystrom"
    assert resolve(dataclasses.replace(opts, kernel="auto"))[0].parameters.to_tune[0] == \
        "kernel"
