"""A Nyström fit draws every row's part once: landmarks, the tuning sample, the fit and the
novelty reference come from the training part, and no validation, holdout or calibration row
ever reaches them."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from service.store import Store
from trainer.cli import main


def _csv(path: Path, n: int) -> Path:
    """Rows whose first feature is their own row number, so every row can be named."""
    rng = np.random.default_rng(4)
    a, b = rng.uniform(-1, 1, n), rng.uniform(-1, 1, n)
    y = np.sin(2 * a) + a * b + 0.1 * rng.standard_normal(n)
    with open(path, "w") as fh:
        fh.write("row,minute,a,b,y\n")
        for i in range(n):
            fh.write(f"{i},{i},{a[i]:.17g},{b[i]:.17g},{y[i]:.17g}\n")
    return path


def _ids(x_s: np.ndarray, mean: np.ndarray, scale: np.ndarray) -> set[int]:
    return set(np.rint(x_s[:, 0] * scale[0] + mean[0]).astype(int).tolist())


@pytest.mark.parametrize("in_time", [False, True])
def test_landmarks_tuning_fit_and_novelty_rows_never_include_held_out_rows(tmp_path, monkeypatch,
                                                                    in_time):
    import trainer.nystrom.solver as job

    seen: dict = {}
    sample_problem, run_pass2 = job.sample_problem, job.run_pass2

    def spy_problem(x_s, *args, **kw):
        seen["tuning"] = x_s.copy()
        return sample_problem(x_s, *args, **kw)

    def spy_pass2(plan, *args, **kw):
        sums, held = run_pass2(plan, *args, **kw)
        seen["held"], seen["train_count"] = held, sums.count
        return sums, held

    monkeypatch.setattr(job, "sample_problem", spy_problem)
    monkeypatch.setattr(job, "run_pass2", spy_pass2)
    n = 3000
    path = _csv(tmp_path / "rows.csv", n)
    store = tmp_path / "st"
    argv = ["train", str(path), "--target", "y", "--features", "row,a,b", "--name", "ids",
            "--method", "nystrom", "--landmarks", "60", "--kernel", "rbf", "--ridge", "0.01",
            "--no-report", "--quiet", "--json", "--store", str(store)]
    assert main(argv + (["--time", "minute"] if in_time else [])) == 0
    man = Store(store).read_manifest("ids", 1)
    mean = np.array(man["standardization"]["mean"])
    scale = np.array(man["standardization"]["scale"])
    held = {part: _ids(rows.x, mean, scale) for part, rows in seen["held"].items()}
    out_of_fit = set().union(*held.values())
    train_rows = set(range(n)) - out_of_fit
    assert len(train_rows) == seen["train_count"]
    assert all(held[p] for p in ("validate", "holdout", "calibrate"))
    assert not held["validate"] & held["holdout"] and not held["holdout"] & held["calibrate"]
    arrays = Store(store).load_arrays("ids", 1, man)
    assert _ids(np.asarray(arrays["x_train"]), mean, scale) <= train_rows
    assert _ids(seen["tuning"], mean, scale) <= train_rows
    # the novelty reference is drawn from the sample's training rows, as its text says
    reference = _ids(np.asarray(arrays["novelty_reference"]), mean, scale)
    assert reference <= train_rows
    assert len(reference) == man["envelope"]["novelty"]["reference_rows"]


def test_final_ridge_minimises_the_stated_criterion():
    # the criterion the manifest states: validation MSE / Var(target), averaged over targets
    from service.kernels import KernelSpec
    from trainer.nystrom import numerics as nystrom
    from trainer.nystrom.parts import HeldRows
    from trainer.nystrom.tune import final_ridge

    rng = np.random.default_rng(11)
    x = rng.uniform(-1.5, 1.5, (1600, 2))
    smooth = np.sin(3 * x[:, 0]) * np.cos(2 * x[:, 1])
    # a large-unit target with little noise beside a small-unit one that is mostly noise:
    # raw MSE summed over targets listens to the first only
    y = np.column_stack([500.0 * smooth + 5.0 * rng.standard_normal(1600),
                         0.2 * smooth + 1.0 * rng.standard_normal(1600)])
    spec, landmarks = KernelSpec("rbf", gamma=2.0), x[:80]
    path = nystrom.ridge_path(spec, landmarks, nystrom.accumulate(spec, landmarks, x[:1200],
                                                                  y[:1200]))
    held = HeldRows(x[1200:], y[1200:], None)
    inv_var = 1.0 / y[:1200].var(axis=0)
    chosen = final_ridge(path, spec, landmarks, held, 0.1, 1.0, inv_var)
    ridges = np.geomspace(0.1 * 1e-2, 0.1 * 1e2, 41)
    mse = np.mean(nystrom.validation_errors(path, spec, landmarks, held.x, held.y,
                                            ridges) ** 2, axis=1)
    assert chosen == ridges[np.argmin((mse * inv_var).mean(axis=1))]
    assert chosen != ridges[np.argmin(mse.sum(axis=1))]  # the two criteria differ here


def test_nystrom_intervals_are_named_and_promise_only_what_holds(tmp_path):
    path = _csv(tmp_path / "rows.csv", 1500)
    store = tmp_path / "st"
    base = ["train", str(path), "--target", "y", "--features", "a,b", "--method", "nystrom",
            "--landmarks", "40", "--kernel", "rbf", "--gamma", "1", "--ridge", "0.01",
            "--no-report", "--quiet", "--json", "--store", str(store)]
    assert main(base + ["--name", "random"]) == 0
    assert main(base + ["--name", "timed", "--time", "minute"]) == 0
    st = Store(store)
    random_iv = st.read_manifest("random", 1)["intervals"]
    timed_iv = st.read_manifest("timed", 1)["intervals"]
    assert random_iv["name"] == timed_iv["name"] == "split-conformal"
    assert "a finite-sample guarantee for rows exchangeable" in random_iv["method"]
    assert "no finite-sample guarantee" in timed_iv["method"]
