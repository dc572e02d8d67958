"""The conformal quantile rule: one implementation for the trainer and the loaded model.

A prediction interval is ŷ ± h, where h is a quantile of c absolute calibration residuals
|r| — of rows the fitted model never saw (split conformal) or of its exact leave-one-out
fits (the jackknife); the manifest says which. The quantile is the ⌈(c + 1)·coverage⌉-th
smallest |r|, the finite-sample rank of split conformal prediction (Lei, G'Sell, Rinaldo,
Tibshirani & Wasserman, "Distribution-free predictive inference for regression", JASA 2018;
cited from memory).
When that rank exceeds c the interval is unbounded: c residuals cannot support the coverage.
A served model refuses such a coverage (:func:`bounded_half_width`): over HTTP, in
``kridge predict`` and in the OpenAPI document alike, with the words of
:func:`coverage_limit`.
"""

from __future__ import annotations

import math

import numpy as np

from service.errors import UserError


def check_coverage(coverage: float) -> float:
    """``coverage`` if it lies strictly between 0 and 1, else ValueError (a coverage of 0
    would make the quantile rank 0, which silently indexes the largest residual)."""
    if not 0 < coverage < 1:
        raise UserError(f"coverage must be between 0 and 1 (exclusive), got {coverage}")
    return coverage


def conformal_rank(c: int, coverage: float) -> int | None:
    """1-based rank ⌈(c + 1)·coverage⌉ of the half-width among c sorted residuals; None when
    it exceeds c (infinite half-width). Raises ValueError unless 0 < coverage < 1."""
    rank = math.ceil((c + 1) * check_coverage(coverage))
    return rank if rank <= c else None


def half_width(sorted_abs: np.ndarray, coverage: float) -> np.ndarray:
    """Half-width per target from (c, t) absolute residuals sorted along axis 0.

    The loaded model keeps its residuals sorted (the bundle stores them so), so no sort per
    request.
    """
    rank = conformal_rank(sorted_abs.shape[0], coverage)
    if rank is None:
        return np.full(sorted_abs.shape[1], np.inf)
    return np.asarray(sorted_abs[rank - 1], dtype=np.float64)


def largest_coverage(c: int) -> float:
    """Largest coverage with a finite half-width from ``c`` residuals: the rank must not
    exceed c, so coverage ≤ c / (c + 1), rounded down to a float on which
    :func:`conformal_rank` agrees."""
    cov = c / (c + 1)
    while math.ceil((c + 1) * cov) > c:
        cov = math.nextafter(cov, 0.0)
    return cov


class CoverageUnavailable(UserError):
    """A coverage the model's calibration cannot give: no calibration at all
    (``code`` "no_intervals") or too few residuals for it ("coverage_too_high"). The message
    says why and, for the second, the largest coverage the model can give."""

    def __init__(self, code: str, message: str):
        super().__init__(message)
        self.code = code


def coverage_limit(c: int) -> str:
    """The rule in words, for refusals and the OpenAPI document: which coverages ``c``
    residuals can give."""
    return (f"{c} calibration residuals give a finite interval up to coverage "
            f"{largest_coverage(c)!r} (the half-width is the ⌈(c + 1)·coverage⌉-th smallest "
            "residual, so ⌈(c + 1)·coverage⌉ must not exceed c)")


def bounded_half_width(sorted_abs: np.ndarray | None, coverage: float, who: str
                       ) -> np.ndarray:
    """:func:`half_width` of a served model, refusing what it cannot give.

    ValueError unless 0 < coverage < 1; :class:`CoverageUnavailable` when ``sorted_abs`` is
    None (no calibration) or when the rank ⌈(c + 1)·coverage⌉ exceeds c, where the plain rule
    would answer an unbounded interval. ``who`` names the model in the message.
    """
    if sorted_abs is None:
        raise CoverageUnavailable("no_intervals",
                                  f"{who} stores no interval calibration; retrain it with a "
                                  "holdout or leave out coverage")
    c = sorted_abs.shape[0]
    if conformal_rank(c, coverage) is None:
        raise CoverageUnavailable("coverage_too_high",
                                  f"coverage {coverage!r} is more than {who} can give: "
                                  + coverage_limit(c))
    return half_width(sorted_abs, coverage)


def measured_coverage(level: dict) -> list[float] | None:
    """A stored coverage check's measured coverage per target, or None when its half-width
    was unbounded: too few calibration residuals for that coverage (the rule of
    :func:`bounded_half_width`), so nothing was measured. Versions trained before this
    rule stored such a level as a coverage of 1.0 with an infinite half-width; it is
    read as unmeasured too, never as 100 %."""
    empirical, widths = level.get("empirical"), level.get("half_width")
    if empirical is None or widths is None:
        return None
    if not all(isinstance(w, int | float) and math.isfinite(w) for w in widths):
        return None
    return [float(v) for v in empirical]
