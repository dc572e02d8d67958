"""Prediction-interval calibration for every solver, and its honest check on the holdout.

:func:`calibrate` is the job's calibration stage: it picks the method from the residuals the
solver offers (:class:`trainer.solvers.Evidence`) and writes the manifest's ``intervals``.

What the intervals are
----------------------
Every interval is ŷ ± h with h a quantile of absolute calibration residuals
(:mod:`service.intervals`: the ⌈(c + 1)·coverage⌉-th smallest of c). Which residuals:

* up to :data:`LOO_MAX_ROWS` rows (no ``--time``): the exact leave-one-out residuals of the
  final model. This is the **jackknife**. It has no finite-sample coverage guarantee — the
  leave-one-out models are not the served model, and the served model has seen every row
  (Barber, Candès, Ramdas & Tibshirani, "Predictive inference with the jackknife+",
  Ann. Statist. 2021, from memory) — so its coverage is *measured*: the training-part model's own
  jackknife half-widths are applied to its predictions on the holdout, rows that neither
  the fit nor the calibration saw, and the manifest stores what came out;
* larger models and ``--time`` models: the holdout residuals of the model fitted on the
  training part (split conformal, Lei et al., JASA 2018, from memory). The guarantee holds
  for that model; the served model is refitted on all rows, holdout included, so for it
  the guarantee is approximate.

Why not a method with a guarantee for the exact models
------------------------------------------------------
* jackknife+ needs every leave-one-out model's prediction at each query point. For kernel
  ridge they follow from the full fit: μ₋ᵢ(x) = μ(x) − αᵢ [G⁻¹k(x)]ᵢ / [G⁻¹]ᵢᵢ with
  G = K + λI. But G⁻¹k(x) is a pair of n × n triangular solves per query row: O(n²) work and
  an n × n factor in the bundle (512 MB at 8,000 rows), against O(n·d) work and n·d numbers
  today — about n/d times the serving cost (500× for 8,000 rows of 16 features). Not
  affordable at serving time, and its guarantee is 1 − 2α, not 1 − α;
* CV+ (K folds) costs K kernel evaluations per query and K dual vectors: affordable, but it
  also guarantees only 1 − 2α, and it changes the bundle and the serving path;
* split conformal on a calibration part withheld from the final fit (what the Nyström job
  does, where rows are plentiful) costs the exact models a tenth or more of their rows —
  for lab data sets of a few hundred rows a visible loss of accuracy in every prediction.

So the exact models keep the jackknife, named as such, with its measured holdout coverage.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from service.intervals import CoverageUnavailable, bounded_half_width, half_width
from trainer.solvers import Evidence, Predicted

#: Nominal coverages reported on the holdout.
COVERAGE_LEVELS = (0.8, 0.9, 0.95)
#: Above this many rows the bundle's exact LOO residuals (an O(n³) inverse) are skipped and
#: intervals are calibrated on the holdout residuals instead (split conformal).
LOO_MAX_ROWS = 8000


def uses_jackknife(rows: int, timed: bool) -> bool:
    """Whether a model of ``rows`` rows is calibrated by the jackknife (else split conformal).

    Decided once from the served model's rows, so that the training-part model, whose
    intervals are checked on the holdout, uses the same method as the served one.
    """
    return rows <= LOO_MAX_ROWS and not timed


def conformal_half_width(abs_residuals: np.ndarray, coverage: float) -> np.ndarray:
    """Half-width per target from (c, t) absolute residuals in any order: the
    ⌈(c + 1)·coverage⌉-th smallest (:func:`service.intervals.half_width`)."""
    return half_width(np.sort(np.asarray(abs_residuals, dtype=np.float64), axis=0), coverage)


def interval_coverage(abs_residuals: np.ndarray, actual: np.ndarray, predicted: np.ndarray,
                      levels=COVERAGE_LEVELS) -> list[dict]:
    """Empirical coverage of ``predicted ± half-width`` on (m, t) points, per nominal level.

    A level the c residuals cannot give (the served model refuses it,
    :func:`service.intervals.bounded_half_width`) is not measured: an unbounded interval
    covers every row, and "100 %" would say nothing. Its entry has ``empirical`` and
    ``half_width`` None and says why in ``unavailable``."""
    out = []
    sorted_abs = np.sort(np.asarray(abs_residuals, dtype=np.float64), axis=0)
    for level in levels:
        try:
            hw = bounded_half_width(sorted_abs, level, "the calibration")
        except CoverageUnavailable as exc:
            out.append({"nominal": float(level), "empirical": None, "half_width": None,
                        "rows": int(np.shape(actual)[0]), "unavailable": str(exc)})
            continue
        inside = np.abs(np.asarray(actual) - np.asarray(predicted)) <= hw[None, :]
        out.append({
            "nominal": float(level),
            "empirical": [float(v) for v in inside.mean(axis=0)],
            "half_width": [float(v) for v in hw],
            "rows": int(inside.shape[0]),
        })
    return out


@dataclass
class HoldoutCheck:
    """Interval coverage measured on the holdout, and how."""

    coverage: list[dict] | None
    how: str | None


def check_on_holdout(scorer_loo: np.ndarray | None, held: Predicted | None,
                     timed: bool) -> HoldoutCheck:
    """Coverage of an exact model's interval method on the holdout ``held``, predicted by
    the training-part model (``scorer_loo``: its exact LOO residuals, for the jackknife)."""
    if held is None:
        return HoldoutCheck(None, None)
    actual, predicted = held.actual, held.predicted
    if scorer_loo is not None:
        return HoldoutCheck(
            interval_coverage(np.abs(scorer_loo), actual, predicted),
            "jackknife half-widths from the training-part model's exact leave-one-out "
            "residuals, applied to its predictions on the holdout rows (which neither the fit "
            "nor the calibration saw)")
    if actual.shape[0] >= 4:
        half = actual.shape[0] // 2
        abs_res = held.abs_residuals()
        order = "earlier half of the holdout" if timed else "first half of the holdout rows"
        return HoldoutCheck(
            interval_coverage(abs_res[:half], actual[half:], predicted[half:]),
            f"split-conformal half-widths from the {order} (residuals of the training-part "
            "model), applied to its predictions on the other half")
    return HoldoutCheck(None, None)


def calibrate(evidence: Evidence, timed: bool) -> tuple[np.ndarray | None, dict | None]:
    """(absolute calibration residuals, the manifest's ``intervals``) of any model; (None,
    None) when there is nothing to calibrate on.

    The residuals, in order of preference: the served model's exact leave-one-out
    residuals (the jackknife, asked for only where :func:`uses_jackknife`); a calibration
    part the served model never saw (split conformal); the holdout residuals of the
    training-part model (split conformal, approximate for the refitted served model).
    """
    if evidence.calibration is not None:  # held out for calibration, even when empty
        if not evidence.calibration.rows:
            return None, None
        calib = evidence.calibration.abs_residuals()
        hold = evidence.holdout
        coverage = None if hold is None else interval_coverage(calib, hold.actual,
                                                               hold.predicted)
        return calib, split_conformal_section(calib, coverage, timed)
    check = check_on_holdout(evidence.scorer_loo, evidence.holdout, timed)
    if evidence.loo is not None:
        calib = evidence.loo.abs_residuals()
        name, source = "jackknife", "LOO"
        how = ("jackknife: final model ± the ⌈(c+1)·coverage⌉-th smallest absolute exact "
               "leave-one-out residual of the final model. No finite-sample coverage "
               "guarantee (Barber, Candès, Ramdas & Tibshirani, Ann. Statist. 2021): the "
               "coverage measured on the holdout (when there is one) is stored beside it")
    elif evidence.holdout is not None:
        calib = evidence.holdout.abs_residuals()
        name, source = "split-conformal", "holdout"
        how = ("split-conformal quantile of the holdout residuals of the model fitted on the "
               "training part (Lei et al. 2018); the served model is refitted on all rows, "
               "holdout included, so the finite-sample guarantee is approximate for it"
               + ("; the holdout is the most recent stretch in time" if timed else ""))
    else:
        return None, None
    return calib, {
        "name": name,
        "method": how,
        "residuals": source,
        "calibration_rows": int(calib.shape[0]),
        "holdout_coverage": check.coverage,
        "holdout_coverage_method": check.how,
    }


def split_conformal_section(calib: np.ndarray | None, coverage: list | None,
                            by_time: bool) -> dict | None:
    """The ``intervals`` entry of a model calibrated on a part it never saw (the Nyström
    job's calibration part); None without one.

    The split-conformal guarantee needs exchangeable rows; rows in time order are not (the
    calibration stretch precedes the rows served), so there it is not claimed.
    """
    if calib is None:
        return None
    promise = ("no finite-sample guarantee: rows in time order are not exchangeable, so "
               "read the coverage measured on the later holdout stretch" if by_time else
               "a finite-sample guarantee for rows exchangeable with the training data")
    return {
        "name": "split-conformal",
        "residuals": "calibration",
        "method": ("split-conformal: the ⌈(c+1)·coverage⌉-th smallest absolute residual "
                   "of the final model on a calibration part it never saw (Lei, G'Sell, "
                   f"Rinaldo, Tibshirani & Wasserman 2018): {promise}"),
        "calibration_rows": int(calib.shape[0]),
        "holdout_coverage": coverage,
        "holdout_coverage_method": None if coverage is None else
        "calibration-part half-widths applied to the final model's holdout predictions",
    }
