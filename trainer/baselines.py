"""Baselines the holdout score is judged against, chosen to suit the split.

* **training mean** (always): every holdout row predicted by the mean target of the rows
  the holdout's model was fitted on (scikit-learn's ``DummyRegressor(strategy="mean")``);
* **last known value** (``--time`` only; persistence, the naive forecast): every holdout
  row predicted by the target of the latest row before the holdout stretch that is not in
  it. The holdout is the most recent stretch, so that is one value for all its rows: for an
  exact model the latest training-part row, for a Nyström model the latest row of the parts
  held out before the holdout (validation, calibration), which follow the training part in
  time.

A model that does not beat them has learnt nothing usable on rows it did not see, whatever
its R² (:mod:`trainer.cautions`).
"""

from __future__ import annotations

import numpy as np

from trainer.metrics import per_target
from trainer.solvers import Evidence

HOW = {
    "training_mean": "each holdout row predicted by the mean target of the rows the "
                     "holdout's model was fitted on",
    "last_value": "each holdout row predicted by the target of the latest row before the "
                  "holdout stretch (the last value known when the holdout begins)",
}


def last_known(evidence: Evidence) -> np.ndarray | None:
    """The solver's own last known value, else the target of the latest row of the parts
    held out before the holdout in time (None without times)."""
    if evidence.last_known is not None:
        return evidence.last_known
    best = None
    for part in (evidence.validation, evidence.calibration):
        if part is None or part.time is None or not part.rows:
            continue
        i = int(np.argmax(part.time))
        if best is None or part.time[i] > best[0]:
            best = (part.time[i], part.actual[i])
    return None if best is None else np.asarray(best[1], dtype=np.float64)


def holdout_baselines(targets: list[str], evidence: Evidence, train_mean: np.ndarray,
                      by_time: bool) -> dict | None:
    """The manifest's ``baselines``: per baseline its rule, its values and its holdout
    scores (RMSE, MAE, R² per target); None without a holdout."""
    ho = evidence.holdout
    if ho is None or not ho.rows:
        return None
    values = {"training_mean": np.asarray(train_mean, dtype=np.float64)}
    last = last_known(evidence) if by_time else None
    if last is not None:
        values["last_value"] = last
    return {kind: {"how": HOW[kind], "value": v.tolist(),
                   "scores": per_target(targets, ho.actual,
                                        np.broadcast_to(v, ho.actual.shape))}
            for kind, v in values.items()}
