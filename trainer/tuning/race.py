"""The race between kernel settings: a coarse stage on a subsample, a full-size stage.

Every kernel setting tried (a kernel, and its degree or coef0 where those are searched) is
an :class:`Entry` in one race:

1. coarse grid: each entry's 8 log-spaced widths, scored for the whole ridge grid from one
   eigendecomposition each (:func:`trainer.tuning.width_search.grid_widths`), on a seeded
   subsample of :data:`COARSE_ROWS` rows (exact leave-one-out) or on the problem itself
   when it is no larger;
2. an entry stays in the race while its best error, lowered by the margin that further
   search has been allowed to gain, could still beat the leader's: error × (1 − margin) ≤
   leader's error. The entries left get the edge extensions and bisections;
3. full size (only when the coarse stage ran on a subsample): at most
   :data:`MAX_FINALISTS` entries within :data:`FINAL_MARGIN` of the leader settle their
   ridge on all tuning rows (:mod:`trainer.tuning.full_size`, Cholesky factorizations);
   those within :data:`FULL_MARGIN` of the leader after that also settle their width. The
   best point scored on all rows is the choice, and its error is that point's exact
   closed-form error.

The margins are no bound in the mathematical sense (the error as a function of width has
no known Lipschitz constant): they are safety margins of common practice, held to account by
comparing the race's choice with the full search's (``tests/test_tuning_speed.py``,
``bench/tuning_bench.py --parts table``; DEVELOPERS.md, "Measured limits").
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from service.kernels import KernelSpec
from trainer.exact.candidates import Curve
from trainer.tuning.full_size import STEPS_PER_SEARCH, FullSize, refine, settle_ridge
from trainer.tuning.width_search import grid_widths, refine_widths
from trainer.validation.folds import Problem

#: Rows of the coarse stage's subsample (problems of up to this many rows run in one stage).
COARSE_ROWS = 1000
#: Gains allowed to the steps still to come, as fractions of the error (module notes).
COARSE_MARGIN = 0.15
FINAL_MARGIN = 0.10
FULL_MARGIN = 0.03
#: Entries that go on to the full-size stage.
MAX_FINALISTS = 2

__all__ = ["COARSE_ROWS", "MAX_FINALISTS", "STEPS_PER_SEARCH", "Entry", "coarse_problem",
           "coarse_stage", "full_stage", "race"]


@dataclass
class Entry:
    """One kernel setting in the race and what it has scored."""

    name: str
    base: dict  # fixed non-width parameters (degree, coef0)
    widths: bool  # the width is searched
    curves: list[Curve] = field(default_factory=list)
    fixed: dict = field(default_factory=dict)  # the given width, when it is not searched
    step: float = 0.0  # log spacing of its coarse width grid
    span: list[float] | None = None  # the width range searched
    raced_out: str | None = None  # the stage at which it left the race

    @property
    def best(self) -> Curve:
        return min(self.curves, key=lambda c: c.best_score)

    @property
    def score(self) -> float:
        return self.best.best_score


def coarse_problem(problem: Problem, seed: int) -> Problem | None:
    """The subsample the coarse stage runs on, or None when the problem is small enough to
    be searched whole (or is scored on time or group folds, which keep their own scheme)."""
    n = problem.x_s.shape[0]
    if n <= COARSE_ROWS or problem.raw is not None or problem.grouped:
        return None
    keep = np.sort(np.random.default_rng(seed).choice(n, COARSE_ROWS, replace=False))
    y = problem.y_c[keep]
    return Problem(problem.x_s[keep], y - y.mean(axis=0), problem.inv_var, problem.ridge_fixed)


def race(entries: list[Entry], margin: float, stage: str, scores=None) -> list[Entry]:
    """Mark the entries that can no longer beat the leader; return those still in.

    ``scores`` maps entries to the errors compared (default: each entry's best so far).
    """
    alive = [e for e in entries if e.raced_out is None]
    scores = scores or {id(e): e.score for e in alive}
    lead = min(scores[id(e)] for e in alive)
    if not math.isfinite(lead):
        return alive
    for e in alive:
        if scores[id(e)] * (1.0 - margin) > lead:
            e.raced_out = stage
    return [e for e in alive if e.raced_out is None]


def coarse_stage(problem: Problem, entries: list[Entry], runner, seed: int) -> None:
    """Steps 1 and 2 of the module notes on ``problem``."""
    for e in entries:
        if e.widths:
            e.curves, e.span, e.step = grid_widths(problem, e.base, e.name, runner, seed)
        else:
            e.curves = runner(problem, [KernelSpec(e.name, **e.fixed, **e.base)])
    alive = race(entries, COARSE_MARGIN, "coarse grid")
    runner.raced(len(entries) - len(alive))
    for e in alive:
        if e.widths:
            e.curves += refine_widths(problem, e.curves, e.base, e.name, runner, e.step)


def full_stage(full: FullSize, entries: list[Entry], runner) -> tuple:
    """Step 3 of the module notes; returns (spec, ridge, score) of the best point."""
    alive = sorted((e for e in entries if e.raced_out is None), key=lambda e: e.score)
    lead = alive[0].score
    finalists = []
    for e in alive:
        if len(finalists) < MAX_FINALISTS and e.score * (1.0 - FINAL_MARGIN) <= lead:
            finalists.append(e)
        else:
            e.raced_out = "coarse stage"
    settled = {}
    for e in finalists:
        b = e.best
        settle_ridge(full, b.spec, float(b.ridges[b.best]))
        settled[id(e)] = (b.spec, *full.best(b.spec))
    scores = {i: s[2] for i, s in settled.items()}
    for e in race(finalists, FULL_MARGIN, "all rows, ridge settled", scores):
        spec, ridge, _ = settled[id(e)]
        if e.widths:
            refine(full, spec, ridge)
    runner.raced(len(alive) - len([e for e in alive if e.raced_out is None]))
    return full.best_point()
