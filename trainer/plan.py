"""The user's options, resolved before any work: the method and why, the kernel as given.

:class:`TrainOptions` is what the command line (or a caller) asks for; the job checks it
here once (:func:`check_options`), chooses the solver (:func:`choose_method`) and hands the
deeper stages only what they use.
"""

from __future__ import annotations

from dataclasses import dataclass

from service.kernels import KERNEL_NAMES, KERNEL_PARAMS, KernelSpec, default_spec
from service.store import Store
from trainer.errors import UserError
from trainer.read import columns

#: ``--method auto``: exact KRR up to this many usable rows, Nyström above. An exact fit of
#: 15,000 rows holds a 1.8 GB kernel matrix (8 n² bytes); twice the rows cost four times the
#: memory and eight times the time (timings: DEVELOPERS.md, "Measured limits").
AUTO_EXACT_MAX_ROWS = 15_000


@dataclass
class TrainOptions:
    data: str
    targets: list[str]
    name: str
    features: list[str] | None = None
    kernel: str = "rbf"
    gamma: float | None = None
    degree: float | None = None
    coef0: float | None = None
    ridge: float | None = None
    holdout: float = 0.2
    seed: int = 0
    release: bool = False
    store: str | None = None
    quiet: bool = False
    report: bool = True
    precision: str = "float64"
    time: str | None = None
    drop_incomplete: bool = False
    sep: str | None = None
    decimal: str | None = None
    method: str = "auto"
    landmarks: int | None = None
    landmark_scheme: str | None = None
    cluster: str | None = None
    solver: str = "auto"  # Nyström: direct, cg or auto (trainer.nystrom.cg_fit.choose_solver)


def explicit_spec(opts: TrainOptions, n_features: int) -> KernelSpec | None:
    """The kernel when the user gave it, every parameter it reads and the ridge; else None
    (something is left to tune)."""
    if opts.kernel == "auto" or opts.ridge is None or any(
            getattr(opts, p) is None for p in ("gamma", "degree", "coef0")
            if p in kernel_params(opts.kernel)):
        return None
    return default_spec(opts.kernel, n_features, opts.gamma, opts.degree, opts.coef0)


def kernel_params(kernel: str) -> tuple[str, ...]:
    if kernel not in KERNEL_PARAMS:
        raise UserError(
            f"unknown kernel {kernel!r}; choose auto or one of {', '.join(KERNEL_NAMES)}")
    return KERNEL_PARAMS[kernel]


def choose_method(opts: TrainOptions) -> tuple[str, str]:
    """(method, reason): exact KRR up to :data:`AUTO_EXACT_MAX_ROWS` usable rows, else Nyström.

    ``auto`` counts the rows that have every target (one streamed pass over the target
    columns only), since sparse lab values can make a large export a small training set.
    """
    if opts.method == "exact":
        if opts.solver == "cg":
            raise UserError("--solver cg solves the Nyström system; use --method nystrom")
        if opts.cluster:
            raise UserError("--cluster runs the Nyström accumulation; use --method nystrom")
        return "exact", "asked for with --method exact"
    if opts.method == "nystrom" or opts.cluster or opts.landmarks or opts.solver == "cg":
        return "nystrom", "asked for with " + ("--method nystrom" if opts.method == "nystrom"
                                               else "--cluster" if opts.cluster
                                               else "--landmarks" if opts.landmarks
                                               else "--solver cg")
    if opts.method != "auto":
        raise UserError(f"--method must be exact, nystrom or auto, not {opts.method!r}")
    rows = columns.count_target_rows(opts.data, opts.targets, opts.sep, opts.decimal)
    if rows <= AUTO_EXACT_MAX_ROWS:
        return "exact", (f"{rows} rows with a target ≤ {AUTO_EXACT_MAX_ROWS}: exact KRR "
                         "(--method auto)")
    return "nystrom", (f"{rows} rows with a target > {AUTO_EXACT_MAX_ROWS}: exact KRR would "
                       f"need an n × n matrix of {rows**2 * 8 / 1e9:.0f} GB (--method auto)")


def check_options(opts: TrainOptions) -> Store:
    """Refuse a bad model name, kernel or precision before any reading; the store."""
    store = Store(opts.store)
    store.model_dir(opts.name)  # validates the name
    if opts.kernel != "auto":
        kernel_params(opts.kernel)
    if opts.solver not in ("direct", "cg", "auto"):
        raise UserError(f"--solver must be direct, cg or auto, not {opts.solver!r}")
    if opts.precision not in ("float64", "float32"):
        raise UserError(f"--precision must be float64 or float32, not {opts.precision!r}")
    return store
