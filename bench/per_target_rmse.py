"""Held-out RMSE per target: one kernel for all targets (``--shared-kernel``) against each
target tuned for itself (the default), on the same rows, split and seed.

Run: ``.venv/bin/python bench/per_target_rmse.py [--json FILE]``

Data sets:

* ``linnerud``: scikit-learn's bundled linnerud set (20 rows, 3 exercise features, 3
  physiological targets; tiny: a 4-row holdout);
* ``coating``: the demo scenario's invented coating-line data (``demo_data/coating_line.csv``,
  2,000 rows, targets hardness_s and gloss_gu);
* ``synthetic``: our own scenario (:func:`bench.tuning_data.smooth_and_wiggly`): two noisy
  targets linear in the inputs and one nearly noise-free fast sine, at 150 and 2,000 rows
  (the latter runs the tuning race on a 1,000-row subsample).

Both runs use the exact solver and the job's 20 % seeded holdout; each prints every target's
holdout RMSE, the ratio per-target / shared (below 1: tuning each target for itself did
better on rows neither model saw) and the tuning times.
"""

from __future__ import annotations

import argparse
import csv
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench.machine import add_json_option, header, save  # noqa: E402
from bench.tuning_data import smooth_and_wiggly  # noqa: E402
from trainer.job import TrainOptions, train  # noqa: E402


def _write(path: Path, x, y, features, targets) -> Path:
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(features + targets)
        w.writerows(np.hstack([x, y]).tolist())
    return path


def linnerud(tmp: Path) -> tuple[Path, list[str]]:
    from sklearn.datasets import load_linnerud

    d = load_linnerud()
    targets = [t.lower() for t in d.target_names]
    return _write(tmp / "linnerud.csv", d.data, d.target, list(d.feature_names), targets), \
        targets


def synthetic(tmp: Path, n: int) -> tuple[Path, list[str]]:
    x, y, features, targets = smooth_and_wiggly(n)
    return _write(tmp / f"synthetic{n}.csv", x, y, features, targets), targets


def coating(tmp: Path) -> tuple[Path, list[str]]:
    return ROOT / "demo_data" / "coating_line.csv", ["hardness_s", "gloss_gu"]


SETS = {"linnerud": linnerud, "coating": coating,
        "synthetic-150": lambda tmp: synthetic(tmp, 150),
        "synthetic-2000": lambda tmp: synthetic(tmp, 2000)}


def run(data: Path, targets: list[str], store: Path, shared: bool) -> dict:
    opts = TrainOptions(data=str(data), targets=targets, name="shared" if shared else "each",
                        store=str(store), quiet=True, report=False, method="exact",
                        shared_kernel=shared)
    s = train(opts, log=lambda *a, **k: None)
    return {"rmse": {t: s["metrics"]["holdout"][t]["rmse"] for t in targets},
            "kernel": s["kernel"], "ridge": s["ridge_text"], "seconds": s["seconds"]}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sets", default=",".join(SETS))
    add_json_option(parser)
    args = parser.parse_args()
    print(header("held-out RMSE: shared kernel against each target its own"))
    figures = {}
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        for name in args.sets.split(","):
            data, targets = SETS[name](tmp)
            shared = run(data, targets, tmp / f"store-{name}", True)
            each = run(data, targets, tmp / f"store-{name}", False)
            figures[name] = {"shared": shared, "each": each}
            print(f"\n{name}: train time shared {shared['seconds']} s, each "
                  f"{each['seconds']} s")
            print(f"  shared: {shared['kernel']}, ridge {shared['ridge']}")
            print(f"  each:   {each['kernel']}; ridge {each['ridge']}")
            print(f"  {'target':<12} {'shared RMSE':>12} {'each RMSE':>12} {'each/shared':>12}")
            for t in targets:
                a, b = shared["rmse"][t], each["rmse"][t]
                print(f"  {t:<12} {a:>12.4g} {b:>12.4g} {b / a:>12.3f}")
    save(args.json, "per_target_rmse", figures)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
