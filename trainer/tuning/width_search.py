"""The width search on one problem: a coarse log grid of γ, then refinement around the best.

* :func:`grid_widths`: :data:`WIDTH_GRID_SIZE` log-spaced widths over the data-driven range
  (:mod:`trainer.tuning.widths`), each scored for the whole ridge grid;
* :func:`refine_widths`: up to :data:`WIDTH_EXTENSIONS` steps outwards while the best lies
  on an edge of what has been tried, then :data:`WIDTH_BISECTIONS` rounds of log-scale
  bisection around the best.

Both run their candidates through a runner (:class:`trainer.tuning.workers.Runner`, or the
Nyström job's own), which scores a list of kernel settings on the problem.
"""

from __future__ import annotations

import math

import numpy as np

from service.kernels import KernelSpec
from trainer.exact.candidates import Curve
from trainer.tuning.widths import width_range

#: Coarse grid of kernel widths, edge extensions and bisection rounds.
WIDTH_GRID_SIZE = 8
WIDTH_EXTENSIONS = 2
WIDTH_BISECTIONS = 2


def _best(curves: list[Curve]) -> Curve:
    return curves[int(np.argmin([c.best_score for c in curves]))]


def grid_widths(problem, base: dict, name: str, runner,
                seed: int) -> tuple[list[Curve], list[float], float]:
    """(curves, [low, high] of the range, log step) of the coarse grid."""
    lo, hi = width_range(name, problem.x_s, seed)
    grid = list(np.geomspace(lo, hi, WIDTH_GRID_SIZE))
    curves = runner(problem, [KernelSpec(name, gamma=float(g), **base) for g in grid])
    return curves, [float(lo), float(hi)], math.log(grid[1] / grid[0])


def refine_widths(problem, curves: list[Curve], base: dict, name: str, runner,
                  step: float) -> list[Curve]:
    """The curves the edge extensions and bisections add to ``curves``."""
    make = lambda g: KernelSpec(name, gamma=float(g), **base)  # noqa: E731
    added: list[Curve] = []
    for _ in range(WIDTH_EXTENSIONS):
        gammas = [c.spec.gamma for c in curves + added]
        best = _best(curves + added)
        if best.spec.gamma == min(gammas):
            new = min(gammas) * math.exp(-step)
        elif best.spec.gamma == max(gammas):
            new = max(gammas) * math.exp(step)
        else:
            break
        added += runner(problem, [make(new)])
    for _ in range(WIDTH_BISECTIONS):
        step /= 2
        g = _best(curves + added).spec.gamma
        added += runner(problem, [make(g * math.exp(-step)), make(g * math.exp(step))])
    return added


def search_widths(problem, base: dict, name: str, runner, seed: int) -> tuple[list[Curve], list]:
    """The whole width search: coarse grid, edge extensions, bisections."""
    curves, span, step = grid_widths(problem, base, name, runner, seed)
    return curves + refine_widths(problem, curves, base, name, runner, step), span
