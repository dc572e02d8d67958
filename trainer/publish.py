"""The last stage of every training job: the bundle's arrays, publish the version (with its
report), release it when asked, and summarize the run."""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from service.model import verifier
from service.store import Store
from service.target_kernels import kernel_text, ridge_text, shared_entries
from trainer.plan import Output, Plan
from trainer.solvers import Fitted, Predicted

#: Holdout rows kept for the report's actual-against-predicted plot.
PLOT_ROWS = 5000


def bundle_arrays(specs, x_train: np.ndarray, dual: np.ndarray,
                  envelope: dict[str, np.ndarray],
                  calib: np.ndarray | None) -> dict[str, np.ndarray]:
    """The arrays a bundle stores, for either solver (``x_train``: training or landmark rows,
    standardized; ``envelope``: the envelope's arrays, the novelty reference and the PCA
    model when fitted; ``calib``: absolute calibration residuals, stored sorted)."""
    # The laplacian's L1 loop reads X one feature at a time: store it column-major, the
    # layout the engine serves from, so a loaded model needs no second, transposed copy.
    # ``specs``: every target's kernel (the others read either layout).
    x_store = (np.asfortranarray(x_train) if any(s.uses == "l1" for s in specs)
               else x_train)
    arrays = {"x_train": x_store, "dual": dual, **envelope}
    if calib is not None:
        arrays["abs_residuals"] = np.sort(calib, axis=0)
    return arrays


def report_points(holdout: Predicted | None, seed: int) -> dict | None:
    """The holdout points the report plots: every row up to :data:`PLOT_ROWS`, else a seeded
    draw of that many, in row order (so in time order with ``--time``)."""
    if holdout is None:
        return None
    keep = np.arange(holdout.rows)
    if holdout.rows > PLOT_ROWS:
        keep = np.sort(np.random.default_rng([seed, 5]).permutation(holdout.rows)[:PLOT_ROWS])
    points = {"actual": holdout.actual[keep].tolist(),
              "predicted": holdout.predicted[keep].tolist()}
    if holdout.time is not None:
        points["time"] = holdout.time[keep].tolist()
    return points


@dataclass(frozen=True)
class Published:
    version: int
    live: bool
    report: str | None  # the report's path


def publish(store: Store, out: Output, manifest: dict, arrays: dict,
            report_args: tuple) -> Published:
    """Publish the version (with its report when asked), release it when asked."""
    extra = None
    if out.report:
        from trainer import report

        def extra(folder, version):
            report.write_report(folder / "report.html", dict(manifest, version=version,
                                model=out.name), *report_args)
    version = store.publish(out.name, manifest, arrays, extra_files=extra)
    if out.release:
        store.release(out.name, version, check=verifier(store, out.name))
    return Published(version, out.release, str(store.version_dir(out.name, version) /
                                               "report.html") if extra is not None else None)


def summary(plan: Plan, store: Store, published: Published, fitted: Fitted, manifest: dict,
            counts: dict, t0: float) -> dict:
    """The train summary (printed by ``kridge train``, returned by :func:`trainer.job.train`).

    ``kernel`` and ``ridge_text`` name each target's where they differ; ``ridge`` is None
    when the targets' ridges differ."""
    metrics, check = manifest["metrics"], manifest["precision_check"]
    settings = fitted.settings(list(plan.columns.targets))
    shared = shared_entries(settings)
    return {
        "name": plan.output.name,
        "version": published.version,
        "live": published.live,
        "rows": int(fitted.rows),
        "data": counts["summary"],
        "method": f"{fitted.described} ({plan.method.reason})",
        "features": list(plan.columns.features),
        "targets": list(plan.columns.targets),
        "kernel": kernel_text(settings),
        "ridge": shared["ridge"],
        "ridge_text": ridge_text(settings),
        "per_target": shared["per_target"],
        "metrics": metrics,
        "tuning": fitted.tuning["summary"] if fitted.tuning else None,
        "precision": plan.output.precision,
        "precision_check": check,
        "report": published.report,
        "seconds": round(time.perf_counter() - t0, 2),
        "store": str(store.root),
        "baselines": manifest["baselines"],
        "warnings": manifest["warnings"],
    }
