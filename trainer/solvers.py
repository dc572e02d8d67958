"""The seam between the one training job (:mod:`trainer.job`) and its solvers.

A solver is a strategy with three stages — read, tune, fit — and what it hands the shared
stages is the data below: the rows it read (:class:`Rows`), the parameters it chose
(:class:`Tuned`) and the fitted model with everything the later stages need
(:class:`Fitted`: held-out predictions and the residuals that calibrate, training or
landmark rows, dual, intercept, standardization, envelope rows and its own section of the
manifest). Splitting, scoring, calibration, the envelope, the precision check, the manifest
and publishing are the job's; a solver never does them itself, and no module under
``trainer/exact`` or ``trainer/nystrom`` imports the calibration, manifest or publish modules
(``tests/test_import_graph.py`` reads the imports).

The solvers are :class:`trainer.exact.solver.ExactSolver` (every row in memory, Cholesky)
and :class:`trainer.nystrom.solver.NystromSolver` (two streamed passes, landmark rows,
normal equations). A new solver is one class: an iterative preconditioned-CG Nyström
solver would subclass ``NystromSolver``, keep its read (pass 1's scan) and tune (landmarks
and the sample search), and replace only the solve in its fit, reusing the pass-2 parts of
:mod:`trainer.nystrom.parts`.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Protocol

import numpy as np

from service.categories import Categories
from service.kernels import KernelSpec
from service.target_kernels import TargetKernel

if TYPE_CHECKING:
    from trainer.plan import Plan
    from trainer.validation.splits import HoldoutSplit, PartSplit

Log = Callable[[str], None]


@dataclass
class Rows:
    """What the read stage found, as the shared stages need it."""

    count: int  # usable rows (every target present, inputs complete)
    counts: dict  # the row account (read, with a target, left out, used)
    times: np.ndarray | None  # every usable row's time, in the solver's row order
    clock: bool  # the time column held timestamps, not plain numbers
    #: text features' encoding (service.categories): the rows' columns are its ``columns``
    encoding: Categories | None = field(default=None, kw_only=True)


@dataclass
class Tuned:
    """The kernel and ridge a solver's tune stage settled on, and its account (None when
    every parameter was given). ``per_target``: each target's own (kernel, ridge), in target
    order, when the targets were tuned one by one; ``spec`` and ``ridge`` are then the first
    target's. None: ``spec`` and ``ridge`` serve every target."""

    spec: KernelSpec
    ridge: float
    account: dict | None
    per_target: list[tuple[KernelSpec, float]] | None = field(default=None, kw_only=True)


@dataclass(frozen=True)
class Predicted:
    """Actual and predicted targets of some rows, (m, t) each."""

    actual: np.ndarray
    predicted: np.ndarray
    time: np.ndarray | None = None
    residuals: np.ndarray | None = None  # actual − predicted as the solver computed them

    @classmethod
    def from_residuals(cls, actual: np.ndarray, residuals: np.ndarray) -> Predicted:
        return cls(actual, actual - residuals, None, residuals)

    @property
    def rows(self) -> int:
        return int(self.actual.shape[0])

    def abs_residuals(self) -> np.ndarray:
        return np.abs(self.residuals if self.residuals is not None
                      else self.actual - self.predicted)


@dataclass(frozen=True)
class Evidence:
    """Held-out predictions a fitted solver offers scoring and calibration (None: none)."""

    holdout: Predicted | None = None  # by the model whose holdout score is reported
    validation: Predicted | None = None  # rows that chose the final ridge
    calibration: Predicted | None = None  # a part the served model never saw (when
    # held out at all, even with no rows: then nothing calibrates, not the holdout)
    loo: Predicted | None = None  # the served model's exact leave-one-out predictions
    scorer_loo: np.ndarray | None = None  # exact LOO residuals of the holdout's model
    # the holdout's baselines (trainer.baselines): the target mean of the rows the holdout's
    # model was fitted on (None: the served model's intercept, fitted on those rows), and
    # with --time the target of the latest such row (None: taken from the held-out parts)
    train_mean: np.ndarray | None = None
    last_known: np.ndarray | None = None


@dataclass(frozen=True)
class EnvelopeRows:
    """Training rows the novelty reference and the PCA check are drawn from; ``ranges``
    (from every row) when they are a sample; ``y``: those rows' targets, (rows, t), whose
    ranges the envelope keeps."""

    x_raw: np.ndarray
    x_s: np.ndarray
    ranges: dict | None = None
    ranges_from: str | None = None
    y: np.ndarray | None = None


@dataclass
class Fitted:
    """The served model and what it offers the shared stages."""

    spec: KernelSpec
    ridge: float
    x_train: np.ndarray  # standardized training rows (exact) or landmark rows (Nyström)
    dual: np.ndarray  # (rows of x_train, t)
    intercept: np.ndarray  # (t,)
    standardization: dict  # the manifest's section
    rows: int  # rows the served model was fitted on
    fit_seconds: float
    evidence: Evidence
    envelope: EnvelopeRows
    check_rows: tuple[np.ndarray, np.ndarray]  # standardized rows and targets, float32 check
    training: dict  # the solver's own entries of the manifest's ``training``
    tuning: dict | None  # the tuning account as the fit leaves it
    described: str  # the solver as the train summary names it
    warnings: list[str] = field(default_factory=list)  # the fit's own (train prints them)
    #: each target's (kernel, ridge) when they are its own; None: ``spec``, ``ridge`` for all
    per_target: list[tuple[KernelSpec, float]] | None = None

    def settings(self, targets: list[str]) -> list[TargetKernel]:
        """Every target's kernel and ridge, in target order."""
        pairs = self.per_target or [(self.spec, self.ridge)] * len(targets)
        return [TargetKernel(t, spec, float(r))
                for t, (spec, r) in zip(targets, pairs, strict=True)]


class Solver(Protocol):
    """What differs between solvers; everything else is the job's (module notes)."""

    name: str  # the manifest's ``training.method``
    rows_in_memory: bool  # in memory the split is a set of indices; streamed, a rule per row
    offers_loo: bool  # can give the served model's exact leave-one-out residuals

    def read(self, plan: Plan, log: Log) -> Rows:
        """Read the source and choose the rows (every target, complete inputs)."""

    def tune(self, plan: Plan, rows: Rows, split: HoldoutSplit | PartSplit,
             log: Log) -> Tuned:
        """The given parameters, or the omitted ones chosen on training rows only."""

    def fit(self, plan: Plan, rows: Rows, split: HoldoutSplit | PartSplit, tuned: Tuned,
            want_loo: bool, log: Log) -> Fitted:
        """Fit the served model; ``want_loo``: calibration will use its exact LOO residuals."""
