"""``kridge drift``: read a file of new inputs, run the kernel two-sample test, word it.

The numbers come from :mod:`service.drift`; this module reads the file through the trainer's
reader (any CSV dialect, Parquet, Excel) and turns the result into text or JSON.
"""

from __future__ import annotations

import numpy as np

from service.cautions import DRIFT_ALARM
from service.drift import PERMUTATIONS, DriftResult, check_drift
from service.text_safety import visible
from trainer.errors import UserError
from trainer.read.columns import iter_chunks


def read_rows(path, features: list[str]) -> np.ndarray:
    """All rows of ``features`` in ``path``, raw units; UserError naming the fault (the reader
    refuses missing and non-finite cells with their line and column)."""
    blocks = [x for _start, x in iter_chunks(path, features) if x.shape[0]]
    rows = np.vstack(blocks) if blocks else np.empty((0, len(features)))
    if rows.shape[0] < 2:
        raise UserError(f"{path}: {rows.shape[0]} data row(s); the drift test needs at least 2")
    return rows


def check_level(level: float | None) -> float | None:
    """``--fail-on-drift``: a level strictly between 0 and 1, or None."""
    if level is not None and not 0.0 < level < 1.0:
        raise UserError(f"--fail-on-drift must lie between 0 and 1, not {level:g}")
    return level


def run(model, path, permutations: int | None = None, seed: int = 0) -> DriftResult:
    """The drift check of the file at ``path`` against the loaded version ``model``
    (:data:`~service.drift.PERMUTATIONS` permutations unless given)."""
    permutations = PERMUTATIONS if permutations is None else permutations
    if permutations < 1:
        raise UserError(f"--permutations must be at least 1, not {permutations}")
    if model.encoding.any:  # the per-feature account is of number columns
        raise UserError(f"{model.name} v{model.version} has text features "
                        f"({', '.join(model.encoding.categories)}); the drift test takes "
                        "models of number features only")
    return check_drift(model, read_rows(path, model.features), permutations, seed)


def as_json(model, result: DriftResult, level: float | None) -> dict:
    """The ``--json`` document: the result, the model it was checked against, the caution."""
    out = {"model": model.name, "version": model.version, **result.as_dict()}
    out["fail_on_drift"] = level
    out["caution"] = DRIFT_ALARM
    return out


def as_text(model, result: DriftResult, level: float | None) -> str:
    """Plain-words summary: the test, the verdict at the level, the feature table, the caution."""
    judged = 0.05 if level is None else level
    verdict = ("drift: the new rows differ from the training rows" if result.p_value < judged
               else "no drift detected")
    lines = [
        f"{model.name} v{model.version}: kernel two-sample test (MMD) of {result.new_rows_used} "
        f"new rows (of {result.new_rows}) against {result.reference_rows} training rows",
        f"kernel       {result.kernel} ({result.kernel_source})",
        f"MMD² (unbiased)  {result.statistic:.6g}",
        f"p-value      {result.p_value:.4g} ({result.permutations} permutations, seed "
        f"{result.seed})",
        f"verdict at level {judged:g}: {verdict}",
        "",
        f"{'feature':<20} {'mean shift':>11} {'outside range':>14} {'MMD² drop':>11}",
    ]
    ranked = sorted(result.features, key=lambda f: -f["mmd_drop"])
    for f in ranked:
        lines.append(f"{visible(f['feature'])[:20]:<20} {f['mean_shift']:>+11.3f} "
                     f"{100 * f['outside_range']:>13.1f}% {f['mmd_drop']:>11.3g}")
    lines += ["",
              "mean shift: (new mean − training mean) / training scale; MMD² drop: MMD² minus "
              "MMD² without that feature (largest first: the features driving the difference)",
              f"Caution: {DRIFT_ALARM}"]
    return "\n".join(lines)
