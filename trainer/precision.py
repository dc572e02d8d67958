"""What single precision costs a model, measured at training time (``--precision float32``)."""

from __future__ import annotations

import numpy as np

#: Largest float32 − float64 difference, relative to a target's SD, that passes unremarked.
WARN_RELATIVE = 1e-3


def precision_check(precision: str, specs, x_train: np.ndarray, dual: np.ndarray,
                    rows_s: np.ndarray, targets: list[str], y: np.ndarray,
                    log) -> dict | None:
    """Largest |float32 − float64| prediction difference on standardized rows ``rows_s``.

    ``specs``: every target's kernel. None unless ``precision`` is float32; then the check
    runs, so the manifest states what single precision costs this model (it can be large
    when α is large and cancels, e.g. for a wide kernel with a tiny ridge); above
    :data:`WARN_RELATIVE` target SD the job warns (``float32_difference``,
    :mod:`trainer.cautions`). ``log`` is unused (kept for callers).
    """
    if precision != "float32":
        return None
    from service.engine_groups import engine_for

    exact = engine_for(specs, x_train, dual).predict(rows_s)
    single = engine_for(specs, x_train, dual, dtype=np.float32).predict(rows_s)
    diff = np.abs(single - exact).max(axis=0)
    sd = y.std(axis=0)
    return {
        "rows": int(rows_s.shape[0]),
        "max_abs_error": {t: float(diff[j]) for j, t in enumerate(targets)},
        "relative_to_target_sd": {t: float(diff[j] / sd[j]) for j, t in enumerate(targets)},
        "how": "float32 engine against float64 engine on training rows",
    }
