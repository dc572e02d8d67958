"""Several targets, each tuned for itself.

With several target columns, each gets its own search (:func:`trainer.tuning.search.tune`
on that column alone): its own kernel parameters (its width, degree…, and with
``--kernel auto`` its own kernel) and its own ridge, chosen by the same criterion on the
same training rows as a single target would be, scored by its own MSE / Var(target). Given
parameters (``--gamma``, ``--ridge``…) hold for every target.

Why not one search for all: a shared kernel is chosen by the mean of the targets' errors,
so a target whose best width differs from the others' (a wiggly one beside smooth ones)
pays for theirs. What it costs: one search per target, so tuning takes about t times as
long as for one target; serving costs one kernel evaluation per distinct kernel chosen
(:mod:`service.engine_groups`). ``shared=True`` keeps one search for all targets (a single
kernel and ridge, one kernel evaluation when serving).
"""

from __future__ import annotations

import numpy as np

from trainer.solvers import Tuned
from trainer.tuning import search

#: Account entries that add up over the targets' searches.
_SUMMED = ("decompositions", "factorizations", "numerical_failures")


def tune_targets(x_tr: np.ndarray, y_tr: np.ndarray, targets: list[str], *, kernel: str,
                 given: search.Given, seed: int, quiet: bool, log, time_ordered: bool,
                 shared: bool = False, groups=None) -> Tuned:
    """The omitted parameters, per target unless ``shared`` or a single target.

    Parameters are those of :func:`trainer.tuning.search.tune`; ``targets`` names the
    columns of ``y_tr`` (n, t).
    """
    options = {"kernel": kernel, "given": given, "seed": seed, "quiet": quiet, "log": log,
               "time_ordered": time_ordered, "groups": groups}
    if shared or y_tr.shape[1] == 1:
        one = search.tune(x_tr, y_tr, **options)
        return Tuned(one.spec, one.ridge, one.account)
    found = []
    for j, name in enumerate(targets):
        log(f"tuning target {name} ({j + 1} of {len(targets)})")
        found.append(search.tune(x_tr, y_tr[:, [j]], **options))
    pairs = [(f.spec, f.ridge) for f in found]
    return Tuned(pairs[0][0], pairs[0][1], combined_account(targets, found),
                 per_target=pairs)


def combined_account(targets: list[str], found: list[search.Tuned]) -> dict:
    """The manifest's ``tuning`` for targets tuned one by one: what their searches share,
    the counts summed, and each search's own account under ``per_target``."""
    first = found[0].account
    seconds = sum(f.account["seconds"] for f in found)
    counts = {k: sum(int(f.account.get(k) or 0) for f in found) for k in _SUMMED}
    chosen = "; ".join(f"{t}: {f.spec.describe()}, ridge={f.ridge:.4g}"
                       for t, f in zip(targets, found, strict=True))
    return {
        "each_target": True,
        "method": first["method"] + "; each target searched on its own",
        "criterion": f"{first['error_method']} MSE of each target, searched for that target "
                     "alone",
        "error_method": first["error_method"],
        "error_label": first["error_label"],
        "searched": first["searched"],
        "fixed": first["fixed"],
        "kernels": first["kernels"],
        "fallback": first.get("fallback"),
        **counts,
        "parallel": first["parallel"],
        "seconds": round(seconds, 3),
        "summary": (f"each target tuned for itself: {chosen} ({counts['decompositions']} "
                    f"decompositions, {counts['factorizations']} factorizations; "
                    f"{seconds:.1f} s)"),
        "per_target": [{"target": t, **f.account} for t, f in zip(targets, found, strict=True)],
    }


__all__ = ["combined_account", "tune_targets"]
