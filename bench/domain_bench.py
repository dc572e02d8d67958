"""The PCA shape check's cost per request beside the rest of a prediction.

For a trained spectra-like model (bench/spectra_data.py: 2,000 rows × 100 columns, rbf) it
times, best of many calls each: the T² and Q ratios of one row and of a 100-row batch
(``service.pca_domain``), the same statistics by scikit-learn's PCA (``transform`` and
``inverse_transform``, the reference), and ``Model.score`` of the row (kernel sum, novelty,
ranges, T², Q, target range). Prints the ratios.

    python bench/domain_bench.py [--json FILE]
"""

from __future__ import annotations

import argparse
import contextlib
import io
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench.machine import add_json_option, fastest_call, header, save  # noqa: E402
from bench.spectra_data import TARGETS, spectra, write_csv  # noqa: E402
from service import load_model  # noqa: E402


def best_of(call, repeats: int = 2000) -> float:
    return fastest_call(call, repeats)


def flag_rates(model, x: np.ndarray, fresh_rows: int = 20_000) -> dict:
    """Share of fresh rows drawn like the training rows that each check flags (stated rate
    0.01 for T² and Q), with a normal-approximation 95 % binomial interval, and the checks
    that flag a reversed and a ramped row held inside every feature's range."""
    from bench.spectra_data import ramp_row, reversed_row

    fresh, _ = spectra(fresh_rows, seed=11)
    _, env = model.score(fresh)
    out = {}
    for check in ("range", "novelty", "t2", "q", "target_range"):
        p = float(np.mean([check in e["flagged_by"] for e in env]))
        half = 1.96 * (p * (1 - p) / fresh_rows) ** 0.5
        out[check] = p
        print(f"fresh rows flagged by {check:<12} {p:.4f} ± {half:.4f} (of {fresh_rows})")
    for label, row in (("reversed row", reversed_row(x, 0)), ("ramp row", ramp_row(x))):
        _, e = model.score(np.clip(row, model.lo, model.hi)[None, :])
        out[label] = e[0]["flagged_by"]
        print(f"{label}, held inside every range: flagged by {e[0]['flagged_by']} "
              f"(t2 {e[0]['t2']}, q {e[0]['q']})")
    return out


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=2000, help="training rows (default 2000)")
    add_json_option(parser)
    args = parser.parse_args()
    import sklearn
    from sklearn.decomposition import PCA

    from trainer.cli import main as kridge

    print(header("domain bench: T² and Q per request vs scikit-learn PCA and Model.score"))
    with tempfile.TemporaryDirectory() as tmp:
        x, y = spectra(args.rows, seed=1)
        write_csv(Path(tmp) / "t.csv", x, y)
        with contextlib.redirect_stdout(io.StringIO()):  # the train summary
            assert kridge(["train", str(Path(tmp) / "t.csv"), "--target", ",".join(TARGETS),
                           "--name", "nir", "--gamma", "1e-5", "--ridge", "1e-3",
                           "--quiet", "--no-report", "--release",
                           "--store", str(Path(tmp) / "s")]) == 0
        model = load_model(str(Path(tmp) / "s"), "nir")
    pca, k = model.pca, model.pca.k
    x_s = (x - model.mean) / model.scale
    ref = PCA(n_components=k, svd_solver="full").fit(x_s)

    def sklearn_stats(q):
        z = (q - model.mean) / model.scale
        t = ref.transform(z)
        return (t**2 / ref.explained_variance_).sum(1), ((z - ref.inverse_transform(t))**2).sum(1)

    fresh, _ = spectra(100, seed=9)
    one = np.ascontiguousarray(fresh[:1])
    figures = {"scikit_learn": sklearn.__version__, "training_rows": args.rows,
               "features": x.shape[1], "components": k}
    for label, q in (("1 row", one), ("100 rows", fresh)):
        ours = best_of(lambda q=q: pca.ratios(q))
        theirs = best_of(lambda q=q: sklearn_stats(q))
        figures[label] = {"ours_us": ours * 1e6, "sklearn_us": theirs * 1e6}
        print(f"T² and Q, {label}: kridge {ours * 1e6:.1f} µs, scikit-learn PCA "
              f"{theirs * 1e6:.1f} µs, ratio scikit-learn / kridge {theirs / ours:.1f}")
    score = best_of(lambda: model.score(one), repeats=1000)
    kept = model.pca, model.y_lo
    model.pca = model.y_lo = None  # as a version without the new checks
    bare = best_of(lambda: model.score(one), repeats=1000)
    model.pca, model.y_lo = kept
    figures["score_1_row_us"], figures["score_1_row_without_us"] = score * 1e6, bare * 1e6
    print(f"Model.score of 1 row: {score * 1e6:.1f} µs with T², Q and the target range, "
          f"{bare * 1e6:.1f} µs without; ratio {score / bare:.2f}")
    figures["rates"] = flag_rates(model, x)
    save(args.json, "domain", figures)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
