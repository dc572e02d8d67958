"""Warnings that are right: the holdout judged against baselines that suit its split, a ridge
or width at the edge of its search, constant features and repeated rows, and every warning
in train's output, the manifest, ``kridge inspect`` and the report."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from cli_helpers import run_cli

from service.store import Store


def _write(path, header: list[str], rows) -> None:
    with open(path, "w") as fh:
        fh.write(",".join(header) + "\n")
        for r in rows:
            fh.write(",".join(str(v) if isinstance(v, str) else f"{v:.6g}" for v in r) + "\n")


def _manifest(store_dir, name: str, version: int = 1) -> dict:
    return json.loads((store_dir / name / "versions" / str(version) / "manifest.json")
                      .read_text())


def _codes(manifest: dict) -> list[str]:
    return [w["code"] for w in manifest["warnings"]]


def test_quiet_time_holdout_with_a_small_spread_is_not_warned(tmp_path, store_dir, capsys):
    # Our own synthetic series: y = 3·x + noise (SD 1). x swings widely over the training
    # stretch and only a little over the last fifth, so the holdout's spread is about a
    # third of the series' and R² on it is poor although the model beats both baselines.
    n = 300
    t = np.arange(n)
    amp = np.where(t < 240, 2.0, 1 / 3)
    x = amp * np.sin(2 * np.pi * t / 60)
    y = 3 * x + np.random.default_rng(3).standard_normal(n)
    path = tmp_path / "quiet_end.csv"
    _write(path, ["t", "x", "y"], zip(t, x, y, strict=True))
    code, _, err = run_cli(capsys, "train", path, "--target", "y", "--time", "t", "--name",
                           "q", "--kernel", "linear", "--quiet")
    assert code == 0
    m = _manifest(store_dir, "q")
    hold = y[240:]
    assert 0.25 < hold.std() / y.std() < 0.4  # a third of the series' spread
    assert m["metrics"]["holdout"]["y"]["r2"] < 0.5  # the R² rule this replaces warned here
    assert not [c for c in _codes(m) if c.startswith("not_better")], m["warnings"]
    assert "not beat" not in err
    # the baselines, recomputed outside kridge: scikit-learn's DummyRegressor(strategy=
    # "mean") fitted on the training stretch (scikit-learn ≥ 1.4, as [dev] installs), and
    # persistence (the naive forecast, Hyndman & Athanasopoulos, "Forecasting: Principles
    # and Practice", 3rd ed., §5.2): every holdout row predicted by the last training value
    from sklearn.dummy import DummyRegressor
    from sklearn.metrics import mean_squared_error

    train_y = y[:240]
    dummy = DummyRegressor(strategy="mean").fit(np.zeros((240, 1)), train_y)
    mean_rmse = math.sqrt(mean_squared_error(hold, dummy.predict(np.zeros((60, 1)))))
    last_rmse = math.sqrt(mean_squared_error(hold, np.full(60, train_y[-1])))
    b = m["baselines"]
    assert b["training_mean"]["scores"]["y"]["rmse"] == pytest.approx(mean_rmse, rel=1e-5)
    assert b["last_value"]["scores"]["y"]["rmse"] == pytest.approx(last_rmse, rel=1e-5)
    assert b["last_value"]["value"] == pytest.approx([float(f"{train_y[-1]:.6g}")])
    assert m["metrics"]["holdout"]["y"]["rmse"] < min(mean_rmse, last_rmse)


def test_a_model_worse_than_the_last_value_is_warned_with_the_numbers(tmp_path, store_dir,
                                                                      capsys):
    # a drifting target (our own series: y = 0.1·t + noise) and inputs that say nothing of
    # it: the last known value is far closer than anything the model can learn
    rng = np.random.default_rng(4)
    n = 200
    t = np.arange(n)
    y = 0.1 * t + 0.3 * rng.standard_normal(n)
    path = tmp_path / "drift.csv"
    _write(path, ["t", "a", "b", "y"], zip(t, *rng.standard_normal((2, n)), y, strict=True))
    code, _, err = run_cli(capsys, "train", path, "--target", "y", "--time", "t", "--name",
                           "w", "--quiet")
    assert code == 0
    m = _manifest(store_dir, "w")
    ours = m["metrics"]["holdout"]["y"]["rmse"]
    last = m["baselines"]["last_value"]["scores"]["y"]["rmse"]
    assert ours > last
    (entry,) = [w for w in m["warnings"] if w["code"] == "not_better_than_last"]
    assert entry["message"].startswith(
        f"y: holdout RMSE {ours:.4g} vs {last:.4g} for the last known value "
        f"({ours / last - 1:.0%} higher)")
    assert f"warning: {entry['message']} [not_better_than_last]" in err


def test_ridge_and_width_at_the_edge_of_their_search_are_named(monkeypatch):
    from trainer.cautions import grid_edge_warnings
    from trainer.tuning import search, width_search

    rng = np.random.default_rng(5)
    x = np.sort(rng.uniform(-1, 1, (120, 1)), axis=0)
    y = np.sin(3 * x)  # noise-free: the smallest ridge searched wins
    tuned = search.tune(x, y, quiet=True, log=lambda *a: None)
    chosen = tuned.account["chosen"]
    assert chosen["ridge_edge"]["side"] == "lower" and chosen["ridge_at_grid_edge"]
    (ridge,) = grid_edge_warnings(tuned.account)
    assert ridge["code"] == "ridge_at_edge" and ridge["parameter"] == "ridge"
    assert ridge["message"].startswith(f"ridge {tuned.ridge:.4g} is at the lower end of the "
                                       "range searched (1e-07 to 1e+03)")
    # a width range far below the γ ≈ 30 that sin(30x) takes: on it, a wider and wider
    # kernel with a tiny ridge (close to a polynomial fit) does best, so the search runs
    # to the smallest γ it tries
    monkeypatch.setattr(width_search, "width_range", lambda *a: (1e-3, 1e-2))
    tuned = search.tune(x, np.sin(30 * x), quiet=True, log=lambda *a: None)
    chosen = tuned.account["chosen"]
    assert chosen["width_edge"]["side"] == "lower"
    assert chosen["width_edge"]["value"] == tuned.spec.gamma == chosen["width_edge"]["range"][0]
    (width,) = [w for w in grid_edge_warnings(tuned.account) if w["parameter"] == "gamma"]
    assert width["code"] == "width_at_edge" and width["edge"] == "lower"
    assert width["message"].startswith(f"gamma {tuned.spec.gamma:.4g} is the smallest width "
                                       "scored (widest kernel;")
    # an interior choice: no edge
    monkeypatch.undo()
    noisy = np.sin(3 * x) + 0.2 * rng.standard_normal(x.shape)
    tuned = search.tune(x, noisy, quiet=True, log=lambda *a: None)
    assert tuned.account["chosen"]["width_edge"] is None
    assert tuned.account["chosen"]["ridge_edge"] is None
    assert grid_edge_warnings(tuned.account) == []


def _mixes(tmp_path, n_rows: int = 240, n_mixes: int = 80, seed: int = 6):
    """Our own lab set: every mix measured at least once, some several times (same inputs,
    a new measurement), a constant column and a mix id that is not a feature."""
    rng = np.random.default_rng(seed)
    mixes = rng.uniform(0, 1, (n_mixes, 3))
    which = np.concatenate([np.arange(n_mixes), rng.integers(0, n_mixes, n_rows - n_mixes)])
    rng.shuffle(which)
    a, b, c = mixes[which].T
    y = np.sin(3 * a) + b * c + 0.05 * rng.standard_normal(n_rows)
    path = tmp_path / "mixes.csv"
    _write(path, ["mix", "a", "b", "c", "line", "y"],
           zip([f"M-{w:03d}" for w in which], a, b, c, np.full(n_rows, 7.0), y, strict=True))
    return path, which


def test_constant_feature_and_repeated_rows_are_counted_and_shown(tmp_path, store_dir,
                                                                  capsys):
    path, which = _mixes(tmp_path)
    code, out, err = run_cli(capsys, "train", path, "--target", "y", "--features",
                             "a,b,c,line", "--name", "mix", "--gamma", "0.5", "--ridge",
                             "0.01", "--quiet")
    assert code == 0
    m = _manifest(store_dir, "mix")
    assert m["standardization"]["scale"][3] == 1.0  # the constant column keeps scale 1
    dup = m["training"]["duplicates"]
    # recomputed independently: distinct rows as Python tuples of the file's cells
    cells = [tuple(line.split(",")[1:5]) for line in path.read_text().splitlines()[1:]]
    assert dup["rows"] == 240 and dup["distinct"] == len(set(cells)) == 80
    train = Store(store_dir).read_manifest("mix", 1)["training"]
    assert train["holdout_rows"] == dup["holdout_rows"] == 48
    from trainer.validation.splits import split_holdout

    tr, ho = split_holdout(240, 0.2, 0)
    seen = {cells[i] for i in tr}
    assert dup["holdout_with_copy"] == sum(cells[i] in seen for i in ho) > 0
    assert _codes(m) == ["constant_feature", "duplicate_rows"]
    assert "warning: feature line is 7 on every training row" in err
    assert (f"warning: 80 distinct input rows among 240 rows; {dup['holdout_with_copy']} of "
            "48 holdout rows have an exact copy among the training rows") in err
    # inspect and the report show the same list
    code, out, _ = run_cli(capsys, "inspect", "mix")
    assert code == 0
    lines = [ln for ln in out.splitlines() if ln.startswith("warning ")]
    assert [ln.rsplit("[", 1)[1] for ln in lines] == ["constant_feature]", "duplicate_rows]"]
    page = (store_dir / "mix" / "versions" / "1" / "report.html").read_text()
    cautions = page[page.index("<h2>Cautions</h2>"):page.index("<h2>Data</h2>")]
    assert "Constant feature" in cautions and "Repeated input rows" in cautions
    assert "<code>duplicate_rows</code>" in cautions


def test_group_split_and_folds_follow_scikit_learns_group_semantics():
    # scikit-learn ≥ 1.4 (the [dev] extra): GroupShuffleSplit holds out ⌈test_size·G⌉
    # whole groups; GroupKFold puts every group in exactly one validation fold, balancing
    # fold sizes largest group first
    from sklearn.model_selection import GroupKFold, GroupShuffleSplit

    from trainer.validation.folds import group_folds
    from trainer.validation.splits import split_groups

    rng = np.random.default_rng(7)
    sizes = rng.permutation(np.arange(1, 38))  # 37 groups of distinct sizes 1 … 37
    groups = rng.permutation(np.repeat(np.arange(37), sizes))
    for fraction in (0.1, 0.2, 0.35):
        tr, ho = split_groups(groups, fraction, seed=1)
        _, sk_test = next(GroupShuffleSplit(1, test_size=fraction, random_state=0)
                          .split(groups, groups=groups))
        assert np.unique(groups[ho]).size == np.unique(groups[sk_test]).size
        assert not set(groups[tr]) & set(groups[ho])
        assert np.array_equal(np.sort(np.concatenate([tr, ho])), np.arange(groups.size))
    ours = group_folds(groups, 5)
    theirs = list(GroupKFold(5).split(groups, groups=groups))
    assert sorted(v.size for _, v in ours) == sorted(v.size for _, v in theirs)
    assert sorted(sorted(set(groups[v])) for _, v in ours) == sorted(
        sorted(set(groups[v])) for _, v in theirs)
    for train, valid in ours:
        assert not set(groups[train]) & set(groups[valid])
    assert np.array_equal(np.sort(np.concatenate([v for _, v in ours])), np.arange(groups.size))


def test_group_option_keeps_each_mix_on_one_side(tmp_path, store_dir, capsys):
    path, which = _mixes(tmp_path, n_rows=150, n_mixes=50)
    code, out, err = run_cli(capsys, "train", path, "--target", "y", "--group", "mix",
                             "--name", "g", "--quiet")
    assert code == 0
    m = _manifest(store_dir, "g")
    assert "mix" not in m["features"] and m["features"] == ["a", "b", "c", "line"]
    assert m["training"]["group"]["groups"] == 50
    assert m["training"]["group"]["holdout_groups"] == math.ceil(0.2 * 50)
    assert m["training"]["holdout_kind"] == "seeded random draw of whole groups"
    assert m["training"]["duplicates"]["holdout_with_copy"] == 0
    assert m["tuning"]["error_method"] == "group-fold"
    assert m["tuning"]["group_folds"]["folds"] == 5
    assert m["intervals"]["residuals"] == "holdout"  # no jackknife on repeated rows
    assert "none of the" in " ".join(w["message"] for w in m["warnings"])


@pytest.mark.parametrize("extra, words", [
    (["--time", "t"], "--group and --time together"),
    (["--method", "nystrom"], "--group needs every row in memory"),
])
def test_group_with_time_or_nystrom_is_refused(tmp_path, store_dir, capsys, extra, words):
    path = tmp_path / "g.csv"
    _write(path, ["t", "g", "x", "y"], [(i, f"g{i % 5}", i * 0.1, i) for i in range(30)])
    code, _, err = run_cli(capsys, "train", path, "--target", "y", "--features", "x",
                           "--group", "g", "--name", "g", *extra)
    assert code == 2 and words in err and err.count("\n") == 1
    assert not (store_dir / "g").exists()


def test_exact_is_refused_at_once_when_the_kernel_matrix_cannot_fit(tmp_path, store_dir,
                                                                    capsys, monkeypatch):
    from trainer.memory import EXACT_OVERHEAD, MEMORY_ENV

    path = tmp_path / "big.csv"
    # a text cell in a feature column: refused when the rows are read, so the memory
    # refusal must come first (after only the target column was counted)
    _write(path, ["a", "y"], [*((i * 0.01, i) for i in range(999)), ("oops", 1.0)])
    monkeypatch.setenv(MEMORY_ENV, "1000000")
    code, _, err = run_cli(capsys, "train", path, "--target", "y", "--name", "big",
                           "--method", "exact", "--features", "a")
    need = EXACT_OVERHEAD * 8 * 1000**2
    assert code == 2 and err.count("\n") == 1
    assert (f"an exact fit of 1000 rows needs about {need / 1e6:.3g} MB "
            f"({EXACT_OVERHEAD:g} × 8 bytes × 1000²") in err
    assert f"but 1 MB is available ({MEMORY_ENV})" in err
    assert "use --method nystrom" in err and "Traceback" not in err
    assert not (store_dir / "big").exists()
    monkeypatch.setenv(MEMORY_ENV, "lots")
    code, _, err = run_cli(capsys, "train", path, "--target", "y", "--name", "big",
                           "--method", "exact", "--features", "a")
    assert code == 2 and f"{MEMORY_ENV}='lots' is not a number of bytes" in err


def test_a_collapsed_landmark_rank_is_in_the_manifest_and_inspect(tmp_path, store_dir, capsys):
    rng = np.random.default_rng(8)
    x = rng.standard_normal((1200, 3))
    path = tmp_path / "rank.csv"
    _write(path, ["a", "b", "c", "y"], np.column_stack([x, x[:, 0] + 0.1 * x[:, 1]]))
    code, _, err = run_cli(capsys, "train", path, "--target", "y", "--name", "r", "--method",
                           "nystrom", "--landmarks", "150", "--gamma", "1e-6", "--ridge",
                           "1e-3", "--no-report", "--quiet")
    assert code == 0
    m = _manifest(store_dir, "r")
    check = m["training"]["landmarks"]["rank_check"]
    (entry,) = [w for w in m["warnings"] if w["code"] == "landmark_rank_low"]
    assert entry["message"] == check["warning"]
    assert f"warning: {check['warning']} [landmark_rank_low]" in err
    _, out, _ = run_cli(capsys, "inspect", "r")
    assert f"{check['warning']} [landmark_rank_low]" in out


def test_manifests_from_before_warnings_still_show(capsys, tmp_path):
    import shutil
    from pathlib import Path

    root = tmp_path / "old"
    shutil.copytree(Path(__file__).parent / "fixtures" / "store_schema1", root)
    code, out, _ = run_cli(capsys, "inspect", "coat", "--store", root)
    assert code == 0 and "warnings  " in out and "not recorded" in out
