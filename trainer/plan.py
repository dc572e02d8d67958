"""The user's options, resolved once at the top of the job into a :class:`Plan`.

:class:`TrainOptions` is what the command line (or a caller) asks for. :func:`resolve`
checks it, opens the source (its dialect detected), names the columns, chooses the solver
and says why, and sorts the kernel parameters into given and to-tune. The stages after it
read the plan's fields, never the options.
"""

from __future__ import annotations

from dataclasses import dataclass

from service.kernels import KERNEL_NAMES, KERNEL_PARAMS, KernelSpec, default_spec
from service.store import Store
from service.target_bounds import parse_target_range
from trainer.errors import UserError
from trainer.memory import exact_shortfall
from trainer.read import columns
from trainer.read.source import Source

#: ``--method auto``: exact KRR up to this many usable rows, Nyström above. An exact fit of
#: 15,000 rows holds a 1.8 GB kernel matrix (8 n² bytes); twice the rows cost four times the
#: memory and eight times the time (timings: DEVELOPERS.md, "Measured limits").
AUTO_EXACT_MAX_ROWS = 15_000
METHODS = ("exact", "nystrom", "auto")


@dataclass
class TrainOptions:
    """What the caller asks for: the public input of :func:`trainer.job.train`."""

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
    time_format: str | None = None  # strptime codes for the time column (trainer.read.dates)
    drop_incomplete: bool = False
    sep: str | None = None
    decimal: str | None = None
    method: str = "auto"
    landmarks: int | None = None
    landmark_scheme: str | None = None
    cluster: str | None = None
    solver: str = "auto"  # Nyström: direct, cg or auto (trainer.nystrom.cg_fit.choose_solver)
    target_range: str | None = None  # "LO:HI[,LO:HI…]", one per target (service.target_bounds)
    shared_kernel: bool = False  # several targets: one kernel and ridge for all, not each its own
    cg_stop: str = "validation"  # CG: validation (and residual) rule, or residual alone
    cg_max_iter: int | None = None  # CG's iteration cap (None: trainer.nystrom.cg.CG_MAX_ITER)
    group: str | None = None  # rows sharing this column's value stay on one side of a split


@dataclass(frozen=True)
class Columns:
    """The columns a fit reads (names checked against the header) and which rows it keeps."""

    features: tuple[str, ...]
    targets: tuple[str, ...]
    time: str | None
    drop_incomplete: bool
    text: tuple[str, ...] = ()  # features whose cells are text: encoded one-hot (exact only)
    group: str | None = None  # --group: holdout and tuning folds keep each group whole


@dataclass(frozen=True)
class Method:
    """The solver, why it was chosen, and the options only Nyström reads."""

    name: str  # "exact" or "nystrom"
    reason: str
    landmarks: int | None = None
    landmark_scheme: str | None = None
    cluster: str | None = None
    solver: str = "auto"
    cg_stop: str = "validation"
    cg_max_iter: int | None = None


@dataclass(frozen=True)
class Splits:
    """How rows are held out: the holdout fraction and the job's one seed (which also draws
    the tuning subsample, the landmarks and the novelty reference)."""

    holdout: float
    seed: int


@dataclass(frozen=True)
class Parameters:
    """The kernel and ridge as given; None (or kernel ``auto``) means "tune it"."""

    kernel: str
    gamma: float | None = None
    degree: float | None = None
    coef0: float | None = None
    ridge: float | None = None
    shared: bool = False  # several targets tuned together: one kernel and ridge for all

    @property
    def to_tune(self) -> tuple[str, ...]:
        """The names left to the search (empty when every parameter the kernel reads is given)."""
        if self.kernel == "auto":
            kernel_reads = ("gamma", "degree", "coef0")
        else:
            kernel_reads = kernel_params(self.kernel)
        names = [p for p in kernel_reads if getattr(self, p) is None]
        names += ["ridge"] if self.ridge is None else []
        return (("kernel",) if self.kernel == "auto" else ()) + tuple(names)

    def explicit(self, n_features: int) -> KernelSpec | None:
        """The kernel when nothing is left to tune; else None."""
        if self.to_tune:
            return None
        return default_spec(self.kernel, n_features, self.gamma, self.degree, self.coef0)


@dataclass(frozen=True)
class Output:
    """What becomes of the fitted model: its name, release, report, precision, chatter."""

    name: str
    release: bool
    report: bool
    precision: str
    quiet: bool
    bounds: dict | None = None  # per target {"low", "high"} from --target-range


@dataclass(frozen=True)
class Plan:
    """Everything the job decided before reading a data row."""

    source: Source  # the input file, opened: format, dialect, header, fingerprint
    columns: Columns
    method: Method
    splits: Splits
    parameters: Parameters
    output: Output


def kernel_params(kernel: str) -> tuple[str, ...]:
    if kernel not in KERNEL_PARAMS:
        raise UserError(
            f"unknown kernel {kernel!r}; choose auto or one of {', '.join(KERNEL_NAMES)}")
    return KERNEL_PARAMS[kernel]


def check_options(opts: TrainOptions) -> Store:
    """Refuse a bad model name, kernel, precision or method before any reading; the store."""
    store = Store(opts.store)
    store.model_dir(opts.name)  # validates the name
    if opts.kernel != "auto":
        kernel_params(opts.kernel)
    if opts.precision not in ("float64", "float32"):
        raise UserError(f"--precision must be float64 or float32, not {opts.precision!r}")
    if opts.method == "exact" and opts.cluster:
        raise UserError("--cluster runs the Nyström accumulation; use --method nystrom")
    if opts.solver not in ("direct", "cg", "auto"):
        raise UserError(f"--solver must be direct, cg or auto, not {opts.solver!r}")
    if opts.cg_stop not in ("validation", "residual"):
        raise UserError(f"--cg-stop must be validation or residual, not {opts.cg_stop!r}")
    if opts.cg_max_iter is not None and opts.cg_max_iter < 1:
        raise UserError(f"--cg-max-iter must be at least 1, not {opts.cg_max_iter}")
    if opts.method == "exact" and opts.solver == "cg":
        raise UserError("--solver cg solves the Nyström system; use --method nystrom")
    if opts.method not in METHODS:
        raise UserError(f"--method must be exact, nystrom or auto, not {opts.method!r}")
    if opts.group and opts.time:
        raise UserError("--group and --time together: the time holdout already keeps the "
                        "latest stretch apart; give one of them")
    if opts.group and (opts.method == "nystrom" or opts.cluster or opts.landmarks
                       or opts.solver == "cg"):
        raise UserError("--group needs every row in memory: it works with the exact method "
                        "only (--method exact or auto)")
    if opts.time_format is not None and opts.time is None:
        raise UserError("--time-format says how the --time column is written; give --time COL")
    target_bounds(opts)  # refused before any reading
    return store


def choose_method(opts: TrainOptions, src: Source) -> tuple[str, str]:
    """(method, reason): exact KRR up to :data:`AUTO_EXACT_MAX_ROWS` usable rows, else Nyström.

    ``auto`` counts the rows that have every target (one streamed pass over the target
    columns only), since sparse lab values can make a large export a small training set,
    and fits exactly only where the kernel matrix fits in memory (:mod:`trainer.memory`);
    ``exact`` is refused, right after that count, where it does not.
    """
    if opts.method == "exact":  # refused at once when the kernel matrix cannot fit
        short = exact_shortfall(columns.count_target_rows(src, opts.targets))
        if short:
            raise UserError(f"--method exact: {short}; use --method nystrom")
        return "exact", "asked for with --method exact"
    if opts.method == "nystrom" or opts.cluster or opts.landmarks or opts.solver == "cg":
        return "nystrom", "asked for with " + ("--method nystrom" if opts.method == "nystrom"
                                               else "--cluster" if opts.cluster
                                               else "--landmarks" if opts.landmarks
                                               else "--solver cg")
    rows = columns.count_target_rows(src, opts.targets)
    short = exact_shortfall(rows) if rows <= AUTO_EXACT_MAX_ROWS else None
    if short:
        if opts.group:
            raise UserError(f"--group needs the exact method, but {short}")
        return "nystrom", f"{short} (--method auto)"
    if opts.group and rows > AUTO_EXACT_MAX_ROWS:
        raise UserError(f"--group needs the exact method, and {rows} rows with a target > "
                        f"{AUTO_EXACT_MAX_ROWS} would go to Nyström; give --method exact "
                        "if they fit in memory")
    if rows <= AUTO_EXACT_MAX_ROWS:
        return "exact", (f"{rows} rows with a target ≤ {AUTO_EXACT_MAX_ROWS}: exact KRR "
                         "(--method auto)")
    return "nystrom", (f"{rows} rows with a target > {AUTO_EXACT_MAX_ROWS}: exact KRR would "
                       f"need an n × n matrix of {rows**2 * 8 / 1e9:.0f} GB (--method auto)")


def resolve(opts: TrainOptions) -> tuple[Plan, Store]:
    """The plan of a job and the store it publishes to; every option error is raised here
    or, for the data's cells, by the reading stage."""
    store = check_options(opts)
    src = Source(opts.data, opts.sep, opts.decimal)
    features = columns.feature_names(src, opts.targets, opts.features, opts.time, opts.group)
    if opts.time:
        src.settle_time(opts.time, opts.time_format)
    text = tuple(columns.text_features(src, features)) if opts.features else ()
    method, reason = choose_method(opts, src)
    if text and method == "nystrom":
        raise UserError(f"text feature(s) {', '.join(map(repr, text))} are encoded one-hot for "
                        f"exact fits only, and this fit would be Nyström ({reason}); train "
                        "with --method exact (at most 15,000 rows) or leave them out")
    return Plan(
        source=src,
        columns=Columns(tuple(features), tuple(opts.targets), opts.time,
                        opts.drop_incomplete, text, opts.group),
        method=Method(method, reason, opts.landmarks, opts.landmark_scheme, opts.cluster,
                      opts.solver, opts.cg_stop, opts.cg_max_iter),
        splits=Splits(opts.holdout, opts.seed),
        parameters=Parameters(opts.kernel, opts.gamma, opts.degree, opts.coef0, opts.ridge,
                              opts.shared_kernel),
        output=Output(opts.name, opts.release, opts.report, opts.precision, opts.quiet,
                      target_bounds(opts)),
    ), store


def target_bounds(opts: TrainOptions) -> dict | None:
    """The bounds ``--target-range`` gives, per target; None without it."""
    if opts.target_range is None:
        return None
    try:
        return parse_target_range(opts.target_range, list(opts.targets))
    except ValueError as exc:
        raise UserError(str(exc)) from None
