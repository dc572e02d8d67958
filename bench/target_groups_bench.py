"""What several targets cost ``load_model(...).predict``: shared kernel against own kernels.

Run: ``.venv/bin/python bench/target_groups_bench.py [--quick] [--json FILE]``

Bundles of n random standardized training rows (d = 16), released in one store, served by
``load_model(...).predict`` on raw rows (checks, standardization, kernel sums, intercept):

* ``one``: one target, rbf — the baseline of every ratio;
* ``two shared``: two targets with the same rbf kernel (two dual columns, one kernel
  evaluation: the path of every multi-target model before targets had kernels of their own,
  and of every model whose targets share one now);
* ``two rbf widths``: two targets, rbf with different γ (two kernel evaluations);
* ``rbf + laplacian``: two targets, different kernel families;
* ``two models``: the two targets of ``two rbf widths`` as two one-target models, called one
  after the other — what a user had to do before, the reference for the grouped engine's
  overhead.

Every figure is a ratio of times measured side by side in this run (fastest call of each
side over alternating rounds: :func:`bench.engine_bench.best_of`).
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench.engine_bench import N_FEATURES, best_of, fmt  # noqa: E402
from bench.machine import add_json_option, header, save  # noqa: E402
from service import load_model  # noqa: E402
from service.kernels import KernelSpec  # noqa: E402
from service.store import Store  # noqa: E402

BATCHES = (1, 10, 1000)


def publish(store: Store, name: str, specs: list[KernelSpec], x_s: np.ndarray,
            rng: np.random.Generator) -> str:
    """A released bundle with one target per spec (random dual, as a fit would store)."""
    n, t = x_s.shape[0], len(specs)
    feats = [f"f{j}" for j in range(N_FEATURES)]
    targets = [f"y{j}" for j in range(t)]
    shared = len(set(specs)) == 1
    manifest = {
        "features": feats, "targets": targets, "intercept": [3.0] * t,
        "standardization": {"mean": [0.0] * N_FEATURES, "scale": [1.0] * N_FEATURES},
        "kernel": ({"name": specs[0].name, "params": specs[0].params()} if shared else None),
        "ridge": 0.1,
        "per_target": [{"target": y, "kernel": {"name": s.name, "params": s.params()},
                        "ridge": 0.1} for y, s in zip(targets, specs, strict=True)],
        "precision": "float64",
        "envelope": {"ranges": {f: {"min": -6.0, "max": 6.0} for f in feats},
                     "novelty": {"k": 5, "threshold_distance": 4.0}},
    }
    reference = x_s[np.sort(rng.choice(n, min(n, 2000), replace=False))]
    version = store.publish(name, manifest, {"x_train": x_s,
                                             "dual": rng.standard_normal((n, t)) / n,
                                             "novelty_reference": reference})
    store.release(name, version)
    return name


def table(n: int, rounds: int, rng: np.random.Generator) -> list[dict]:
    x_s = rng.standard_normal((n, N_FEATURES))
    rbf = KernelSpec("rbf", gamma=1.0 / N_FEATURES)
    rbf2 = KernelSpec("rbf", gamma=4.0 / N_FEATURES)
    lap = KernelSpec("laplacian", gamma=1.0 / N_FEATURES)
    with tempfile.TemporaryDirectory() as tmp:
        store = Store(tmp)
        cases = {"one": [rbf], "two shared": [rbf, rbf], "two rbf widths": [rbf, rbf2],
                 "rbf + laplacian": [rbf, lap], "alone a": [rbf], "alone b": [rbf2]}
        models = {k: load_model(store, publish(store, k.replace(" ", "-").replace("+", "p"),
                                               specs, x_s, rng))
                  for k, specs in cases.items()}
        rows = []
        for m in BATCHES:
            q = rng.uniform(-2, 2, (m, N_FEATURES))
            sides = {k: (lambda mod=mod, q=q: mod.predict(q)) for k, mod in models.items()
                     if not k.startswith("alone")}
            a, b = models["alone a"], models["alone b"]
            sides["two models"] = lambda a=a, b=b, q=q: (a.predict(q), b.predict(q))
            best = best_of(sides, rounds)
            base = best["one"]
            rows.append({"n": n, "rows": m, **{k: v for k, v in best.items()},
                         "ratios": {k: v / base for k, v in best.items() if k != "one"},
                         "grouped_over_two_models": best["two rbf widths"] / best["two models"]})
    return rows


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer rounds, n = 12,000 only")
    parser.add_argument("--sizes", default="12000,20000")
    add_json_option(parser)
    args = parser.parse_args()
    print(header("target groups: one kernel evaluation per distinct kernel"))
    rng = np.random.default_rng(0)
    sizes = [12_000] if args.quick else [int(s) for s in args.sizes.split(",")]
    rounds = 4 if args.quick else 10
    out = []
    cols = ("two shared", "two rbf widths", "rbf + laplacian", "two models")
    print(f"{'n':>6} {'rows':>5} {'one':>10} " + " ".join(f"{c + ' / one':>22}" for c in cols)
          + f" {'widths / two models':>20}")
    for n in sizes:
        for r in table(n, rounds, rng):
            out.append(r)
            print(f"{r['n']:>6} {r['rows']:>5} {fmt(r['one']):>10} "
                  + " ".join(f"{r['ratios'][c]:>22.2f}" for c in cols)
                  + f" {r['grouped_over_two_models']:>20.2f}")
    save(args.json, "target_groups", {"rows": out})
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
