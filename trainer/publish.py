"""The last stage of every training job: publish the version, release it when asked, and
summarize the run."""

from __future__ import annotations

import time

import numpy as np

from service.model import verifier
from service.store import Store
from trainer import cautions
from trainer.plan import TrainOptions


def bundle_arrays(spec, x_train: np.ndarray, dual: np.ndarray, reference: np.ndarray,
                  calib: np.ndarray | None) -> dict[str, np.ndarray]:
    """The arrays a bundle stores, for either solver (``x_train``: training or landmark rows,
    standardized; ``calib``: absolute calibration residuals, stored sorted)."""
    # The laplacian's per-feature passes read X one feature at a time: store it column-major
    # so that serving processes read it from the shared memory map without a private copy.
    x_store = np.asfortranarray(x_train) if spec.uses == "l1" else x_train
    arrays = {"x_train": x_store, "dual": dual, "novelty_reference": reference}
    if calib is not None:
        arrays["abs_residuals"] = np.sort(calib, axis=0)
    return arrays


def publish_and_summarize(opts: TrainOptions, store: Store, manifest: dict, arrays: dict,
                          report_args: tuple, t0: float, *, spec, ridge: float,
                          features: list[str], rows: int, metrics: dict, tuning_info,
                          check, counts: dict, method: str,
                          warnings: list[str] = ()) -> dict:
    """Publish the version (with its report), release it when asked; the train summary."""
    extra = None
    if opts.report:
        from trainer import report

        def extra(folder, version):
            report.write_report(folder / "report.html", dict(manifest, version=version,
                                model=opts.name), *report_args)
    warnings = list(warnings) + cautions.poor_holdout(metrics)
    version = store.publish(opts.name, manifest, arrays, extra_files=extra)
    live = False
    if opts.release:
        store.release(opts.name, version, check=verifier(store, opts.name))
        live = True
    return {
        "name": opts.name,
        "version": version,
        "live": live,
        "rows": int(rows),
        "data": counts["summary"],
        "method": method,
        "features": features,
        "targets": list(opts.targets),
        "kernel": spec.describe(),
        "ridge": ridge,
        "metrics": metrics,
        "tuning": tuning_info["summary"] if tuning_info else None,
        "precision": opts.precision,
        "precision_check": check,
        "report": (str(store.version_dir(opts.name, version) / "report.html")
                   if extra is not None else None),
        "seconds": round(time.perf_counter() - t0, 2),
        "store": str(store.root),
        "warnings": warnings,
    }
