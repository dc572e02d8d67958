"""Cautions where people act on predictions: a poor holdout score, the envelope, review.

A holdout R² below :data:`R2_POOR` is reported as a warning by ``kridge train`` and in
``report.html``. R² = 1 − 1/RPD², where RPD = SD(target) / RMSE is the "ratio of performance
to deviation" used to judge calibrations in chemometrics; a common reading there is that
RPD below about 1.4 is not reliable for quantitative prediction (Chang, Laird, Mausbach &
Hurburgh, Soil Sci. Soc. Am. J. 2001, from memory). RPD 1.41 is R² 0.5: below it the model's
holdout error is more than 71 % of the target's own spread — it explains less than half the
variance, and predictions are little better than the target's mean for decisions.
"""

from __future__ import annotations

import math

#: Holdout R² below this draws a warning (RPD = 1/√(1 − R²) below about 1.41).
R2_POOR = 0.5



def poor_holdout(metrics: dict) -> list[str]:
    """One warning per target whose holdout R² is below :data:`R2_POOR` (none without a
    holdout)."""
    out = []
    for target, m in (metrics.get("holdout") or {}).items():
        r2 = m.get("r2")
        if r2 is None or not math.isfinite(r2) or r2 >= R2_POOR:
            continue
        rpd = 1.0 / math.sqrt(1.0 - r2) if r2 < 1 else math.inf
        out.append(f"{target}: holdout R² {r2:.3g} is below {R2_POOR} (RMSE {m['rmse']:.4g} "
                   f"is {1 / rpd:.0%} of the target's spread): the model explains less than "
                   "half of the variance on rows it did not see; check the features and the "
                   "data before relying on its predictions")
    return out
