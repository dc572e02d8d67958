"""Each target tuned for itself: fit, choice, bundle and served answers.

References:
* scikit-learn 1.9 ``StandardScaler`` + ``KernelRidge(alpha=ridge, kernel=...)`` fitted per
  target on the centered target (the same reference as ``tests/test_fit_reference.py``);
  the served answers are compared with it within 1e-9 relative;
* scikit-learn's bundled linnerud set (three targets);
* a synthetic set of our own with one smooth and one wiggly target of the same input, which
  need very different kernel widths: there per-target tuning must beat one shared kernel on
  the wiggly target's held-out RMSE, both runs in this test on the same split.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from service_helpers import Gunicorn
from sklearn.datasets import load_linnerud
from sklearn.kernel_ridge import KernelRidge
from sklearn.preprocessing import StandardScaler
from test_fit_reference import query_rows, write_csv

from bench.tuning_data import smooth_and_wiggly
from service import load_model
from service.kernels import KernelSpec
from trainer.exact.fit import fit_exact, fit_exact_each
from trainer.job import TrainOptions, train
from trainer.validation.splits import split_rows

RTOL = 1e-9


def quiet(*a, **k):
    pass


def sklearn_target(spec: KernelSpec, ridge: float, x, y, q) -> np.ndarray:
    """scikit-learn's prediction of one target (y: (n,)) at raw rows q."""
    scaler = StandardScaler().fit(x)
    model = KernelRidge(alpha=ridge, kernel=spec.name, **spec.params())
    model.fit(scaler.transform(x), y - y.mean())
    return model.predict(scaler.transform(q)) + y.mean()


def linnerud():
    d = load_linnerud()
    return d.data, d.target, list(d.feature_names), [t.lower() for t in d.target_names]


def test_fit_each_equals_sklearn_per_target_on_linnerud():
    x, y, _, _ = linnerud()
    pairs = [(KernelSpec("rbf", gamma=0.1), 0.5), (KernelSpec("laplacian", gamma=0.05), 1.0),
             (KernelSpec("rbf", gamma=0.1), 2.0)]
    fit = fit_exact_each(x, y, pairs, want_loo=True)
    q = query_rows(x)
    got = fit.predict(q)
    for j, (spec, ridge) in enumerate(pairs):
        np.testing.assert_allclose(got[:, j], sklearn_target(spec, ridge, x, y[:, j], q),
                                   rtol=RTOL)
        # each column is the single-target fit, leave-one-out residuals included
        alone = fit_exact(x, y[:, [j]], spec, ridge, want_loo=True)
        np.testing.assert_allclose(fit.dual[:, j], alone.dual[:, 0], rtol=1e-12)
        np.testing.assert_allclose(fit.loo_residuals[:, j], alone.loo_residuals[:, 0],
                                   rtol=1e-10)


def _train(tmp_path, store, x, y, features, targets, name, **kw):
    data = tmp_path / f"{name}.csv"
    write_csv(data, x, y, features, targets)
    opts = TrainOptions(data=str(data), targets=targets, name=name, store=str(store),
                        quiet=True, report=False, **kw)
    return train(opts, log=quiet)


def test_tuned_linnerud_bundle_equals_sklearn_and_single_target_choices(tmp_path, store_dir):
    x, y, features, targets = linnerud()
    summary = _train(tmp_path, store_dir, x, y, features, targets, "lin")
    model = load_model(store_dir, "lin", summary["version"])
    man = model.manifest
    assert man["schema"] == 3 and [e["target"] for e in man["per_target"]] == targets
    q = query_rows(x)
    got = model.predict(q)
    for j, tk in enumerate(model.target_kernels):
        np.testing.assert_allclose(got[:, j], sklearn_target(tk.spec, tk.ridge, x, y[:, j], q),
                                   rtol=RTOL)
        # the same choice as a job given that target alone (same rows, split and seed)
        one = _train(tmp_path, store_dir, x, y[:, [j]], features, [targets[j]], f"lin-{j}")
        alone = load_model(store_dir, f"lin-{j}", one["version"]).manifest
        assert man["per_target"][j]["kernel"] == alone["kernel"]
        assert man["per_target"][j]["ridge"] == alone["ridge"]
        assert alone["per_target"][0]["kernel"] == alone["kernel"]
    own = [e["target"] for e in man["tuning"]["per_target"]]
    assert own == targets and man["tuning"]["each_target"] is True


def test_wiggly_target_gains_from_its_own_width(tmp_path, store_dir):
    x, y, features, targets = smooth_and_wiggly()
    each = _train(tmp_path, store_dir, x, y, features, targets, "each")
    shared = _train(tmp_path, store_dir, x, y, features, targets, "shared",
                    shared_kernel=True)
    m_each = load_model(store_dir, "each", each["version"])
    m_shared = load_model(store_dir, "shared", shared["version"])
    g_smooth, _, g_wiggly = (tk.spec.gamma for tk in m_each.target_kernels)
    assert g_wiggly > 3 * g_smooth  # the fast sine needs the narrower kernel
    assert m_shared.manifest["per_target"][0]["kernel"] == m_shared.manifest["kernel"]
    assert m_shared.manifest["training"]["target_kernels"].startswith("one kernel")
    assert m_each.manifest["kernel"] is None  # targets differ: nothing shared to state
    # the job's own holdout metrics, and the same recomputed from the holdout rows
    rm_each = each["metrics"]["holdout"]["wiggly"]["rmse"]
    rm_shared = shared["metrics"]["holdout"]["wiggly"]["rmse"]
    assert rm_each < rm_shared
    # the job's holdout figure is that of the training-part model with the chosen settings
    split = split_rows(len(x), None, 0.2, 0, True)
    for summary, model in ((each, m_each), (shared, m_shared)):
        pairs = [(tk.spec, tk.ridge) for tk in model.target_kernels]
        part = fit_exact_each(x[split.train], y[split.train], pairs)
        err = part.predict(x[split.holdout]) - y[split.holdout]
        np.testing.assert_allclose(np.sqrt((err ** 2).mean(axis=0)),
                                   [summary["metrics"]["holdout"][t]["rmse"] for t in targets],
                                   rtol=1e-9)
    q = query_rows(x)
    got = m_each.predict(q)
    for j, tk in enumerate(m_each.target_kernels):
        np.testing.assert_allclose(got[:, j], sklearn_target(tk.spec, tk.ridge, x, y[:, j], q),
                                   rtol=RTOL)


def test_given_parameters_hold_for_every_target(tmp_path, store_dir):
    x, y, features, targets = smooth_and_wiggly(80)
    s = _train(tmp_path, store_dir, x, y, features, targets, "given", gamma=0.3, ridge=0.1)
    man = load_model(store_dir, "given", s["version"]).manifest
    assert man["kernel"] == {"name": "rbf", "params": {"gamma": 0.3}} and man["ridge"] == 0.1
    assert all(e["kernel"] == man["kernel"] and e["ridge"] == 0.1 for e in man["per_target"])
    # gamma given, ridge tuned: every target its own ridge, the width as given
    s = _train(tmp_path, store_dir, x, y, features, targets, "half", gamma=0.3)
    man = load_model(store_dir, "half", s["version"]).manifest
    assert all(e["kernel"]["params"] == {"gamma": 0.3} for e in man["per_target"])
    assert man["kernel"] == {"name": "rbf", "params": {"gamma": 0.3}}


def test_float32_check_and_intervals_with_per_target_kernels(tmp_path, store_dir):
    x, y, features, targets = smooth_and_wiggly(120)
    s = _train(tmp_path, store_dir, x, y, features, targets, "f32", precision="float32")
    model = load_model(store_dir, "f32", s["version"])
    assert len({tk.spec for tk in model.target_kernels}) >= 2
    check = model.manifest["precision_check"]
    assert set(check["max_abs_error"]) == set(targets)
    # float32 serving stays close to the float64 reference of each target
    q = query_rows(x)
    got = model.predict(q)
    for j, tk in enumerate(model.target_kernels):
        ref = sklearn_target(tk.spec, tk.ridge, x, y[:, j], q)
        assert np.abs(got[:, j] - ref).max() <= 1e-3 * y[:, j].std() + \
            10 * check["max_abs_error"][targets[j]]
    assert model.half_width(0.8).shape == (3,)


def test_served_two_kernel_model_answers_as_sklearn(tmp_path, store_dir):
    x, y, features, targets = smooth_and_wiggly(150)
    _train(tmp_path, store_dir, x, y, features, targets, "two", release=True)
    model = load_model(store_dir, "two")
    specs = [tk.spec for tk in model.target_kernels]
    assert specs[0] != specs[2]
    q = query_rows(x)
    with Gunicorn(store_dir, workers=1) as g:
        r = g.post("/models/two/predict", json={"rows": q.tolist()})
        assert r.status_code == 200, r.text
        body = r.json()
        summary = g.get("/models/two").json()
    assert body["targets"] == targets
    got = np.array([res["value"] for res in body["results"]])
    for j, tk in enumerate(model.target_kernels):
        np.testing.assert_allclose(got[:, j], sklearn_target(tk.spec, tk.ridge, x, y[:, j], q),
                                   rtol=RTOL)
    assert summary["kernel"] is None
    assert [e["target"] for e in summary["per_target"]] == targets
    assert summary["per_target"][2]["kernel"]["params"]["gamma"] == specs[2].gamma


def test_older_manifests_read_as_one_kernel_for_all(tmp_path, store_dir):
    # a schema-2 manifest has no per_target: its kernel and ridge serve every target
    x, y, features, targets = smooth_and_wiggly(60)
    s = _train(tmp_path, store_dir, x, y, features, targets, "old", gamma=0.3, ridge=0.1)
    path = store_dir / "old" / "versions" / str(s["version"]) / "manifest.json"
    man = json.loads(path.read_text())
    del man["per_target"]
    man["schema"] = 2
    path.write_text(json.dumps(man))
    model = load_model(store_dir, "old", s["version"])
    assert [tk.ridge for tk in model.target_kernels] == [0.1, 0.1, 0.1]
    q = query_rows(x)
    for j in range(3):
        np.testing.assert_allclose(
            model.predict(q)[:, j],
            sklearn_target(KernelSpec("rbf", gamma=0.3), 0.1, x, y[:, j], q), rtol=RTOL)


@pytest.mark.parametrize("precision", ["float64", "float32"])
def test_grouped_engine_matches_one_engine_per_target(precision):
    # reference: scikit-learn 1.9 pairwise kernels (rbf_kernel, laplacian_kernel) times α
    from sklearn.metrics.pairwise import laplacian_kernel, rbf_kernel

    from service.engine import Engine
    from service.engine_groups import GroupedEngine

    tol = 1e-12 if precision == "float64" else 1e-5
    pairwise = {"rbf": rbf_kernel, "laplacian": laplacian_kernel}

    rng = np.random.default_rng(5)
    x = rng.normal(size=(700, 4))
    dual = rng.normal(size=(700, 3))
    specs = [KernelSpec("rbf", gamma=0.2), KernelSpec("laplacian", gamma=0.1),
             KernelSpec("rbf", gamma=0.2)]
    rows = np.arange(0, 700, 3)
    grouped = GroupedEngine(specs, x, dual, dtype=precision, neighbours=(rows, 5),
                            shift=np.zeros(4), scale=np.ones(4), offset=np.arange(3.0))
    assert len(grouped.groups) == 2  # the two rbf targets share one kernel evaluation
    assert grouped.gives_neighbours is (precision == "float64")
    for m in (1, 10, 200):
        q = rng.normal(size=(m, 4))
        near = np.empty(m) if grouped.gives_neighbours else None
        got = grouped.predict(q, near=near, raw=True)
        for j, spec in enumerate(specs):
            one = Engine(spec, x, dual[:, j], dtype=precision).predict(q)[:, 0] + j
            np.testing.assert_allclose(got[:, j], one, rtol=tol, atol=tol)
            ref = pairwise[spec.name](q, x, gamma=spec.gamma) @ dual[:, j] + j
            np.testing.assert_allclose(got[:, j], ref, rtol=max(tol, 1e-9), atol=tol * 10)
        if near is not None:
            ref = np.empty(m)
            Engine(specs[0], x, dual[:, :1], neighbours=(rows, 5), shift=np.zeros(4),
                   scale=np.ones(4)).predict(q, near=ref, raw=True)
            np.testing.assert_allclose(near, ref, rtol=1e-12)


def test_nystrom_keeps_one_kernel_and_gives_each_target_its_ridge(tmp_path, store_dir):
    """Nyström: one kernel tuned for all targets on the sample; each target then takes the
    ridge of least validation MSE among the final ridge's values. Reference: scikit-learn
    1.9 ``Nystroem`` on the bundle's landmarks + ``Ridge(alpha=ridge_j)`` on the training
    part, target by target (the penalty mapping is in ``tests/test_nystrom.py``)."""
    from sklearn.kernel_approximation import Nystroem
    from sklearn.linear_model import Ridge

    from trainer.validation.splits import part_keys

    x, y, features, targets = smooth_and_wiggly(1500, 3)
    s = _train(tmp_path, store_dir, x, y, features, targets, "ny", method="nystrom",
               landmarks=30, solver="direct")
    model = load_model(store_dir, "ny", s["version"])
    man = model.manifest
    # full rank (no eigenvalue of K_mm dropped), as scikit-learn's map keeps every one
    assert man["training"]["landmarks"]["rank_kept"] == 30
    assert man["kernel"] is not None and man["ridge"] is None
    ridges = [tk.ridge for tk in model.target_kernels]
    assert ridges == [man["tuning"]["target_ridges"]["ridges"][t] for t in targets]
    assert ridges[2] < ridges[0]  # the nearly noise-free sine wants the smaller penalty
    assert "each target its own ridge" in man["training"]["target_kernels"]
    # the parts as the job drew them (one block: block index 0), standardized as served
    parts = split_rows(len(x), None, 0.2, 0, False).parts(part_keys(0, 0, len(x)), None)
    xs = model.standardize(x)
    train_rows, val = xs[parts == 0], parts == 1
    landmarks = np.asarray(model.engine.x)
    ny = Nystroem(kernel="rbf", gamma=model.spec.gamma,
                  n_components=landmarks.shape[0]).fit(landmarks)
    yt = y[parts == 0]
    q = query_rows(x)
    got = model.predict(q)
    for j, ridge in enumerate(ridges):
        reg = Ridge(alpha=ridge, fit_intercept=False).fit(ny.transform(train_rows),
                                                          yt[:, j] - yt[:, j].mean())
        want = reg.predict(ny.transform(model.standardize(q))) + yt[:, j].mean()
        np.testing.assert_allclose(got[:, j], want, rtol=1e-7, atol=1e-7)
        # its own ridge is no worse on its validation rows than any other target's ridge
        mse = []
        for r in ridges:
            fit = Ridge(alpha=r, fit_intercept=False).fit(ny.transform(train_rows),
                                                          yt[:, j] - yt[:, j].mean())
            pred = fit.predict(ny.transform(xs[val])) + yt[:, j].mean()
            mse.append(float(np.mean((pred - y[val, j]) ** 2)))
        assert mse[j] <= min(mse) * (1 + 1e-9)


def test_inspect_versions_and_page_name_each_targets_kernel(tmp_path, store_dir, capsys):
    from service.app import create_app
    from service.settings import Settings
    from trainer.cli import main

    x, y, features, targets = smooth_and_wiggly(80)
    _train(tmp_path, store_dir, x, y, features, targets, "show", gamma=0.3, ridge=0.1,
           release=True)
    _train(tmp_path, store_dir, x, y, features, targets, "show", release=True)
    capsys.readouterr()
    assert main(["inspect", "show", "--store", str(store_dir)]) == 0
    out = capsys.readouterr().out
    man = load_model(store_dir, "show").manifest
    for e in man["per_target"]:
        spec = KernelSpec.from_params(e["kernel"]["name"], e["kernel"]["params"])
        assert f"{e['target']}: {spec.describe()}" in out
        assert f"{e['target']}: {e['ridge']:.6g}" in out
    assert main(["inspect", "show", "1", "2", "--store", str(store_dir)]) == 0
    out = capsys.readouterr().out
    assert all(f"kernel and ridge {t}" in out for t in targets)
    assert "rbf(gamma=0.3) → " in out
    assert main(["versions", "show", "--json", "--store", str(store_dir)]) == 0
    details = json.loads(capsys.readouterr().out)["details"]
    assert details[0]["kernel"] == "rbf(gamma=0.3)" and details[0]["ridge"] == "0.1"
    assert details[1]["kernel"].startswith("smooth_a: rbf(")
    app = create_app(Settings(store=str(store_dir)), watch=False)
    page = app.test_client().get("/page/show").get_data(as_text=True)
    assert "wiggly: rbf(gamma=" in page
