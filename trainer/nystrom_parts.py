"""Pass 2 of a Nyström fit: every row gets a part, and the training part becomes sums.

Parts — train, validate, holdout, calibrate — come from a seeded random draw per block (or,
with ``--time``, from the row's time: the latest rows are held out, the stretch before
calibrates, the one before that validates). Training rows are added into the Nyström sums
(:mod:`trainer.nystrom`); the rows of the other parts (capped in size) are kept in memory.
A block's result depends only on the block, so blocks can be summed here or on Dask workers
(:mod:`trainer.cluster`) and added in block order with the same outcome.
"""

from __future__ import annotations

import os
from collections import deque
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field

import numpy as np

from service.kernels import KernelSpec
from trainer import nystrom
from trainer.data import usable_rows
from trainer.reader import Block, Source

#: Caps on the parts held out of the final fit (their rows are kept in memory).
HOLDOUT_MAX, CALIBRATE_MAX, VALIDATE_MAX = 20_000, 10_000, 10_000
CALIBRATE_FRACTION = VALIDATE_FRACTION = 0.1
PARTS = ("train", "validate", "holdout", "calibrate")


def part_fractions(rows: int, holdout: float) -> tuple[float, float, float]:
    """(validate, holdout, calibrate) fractions of ``rows``, each capped in rows."""
    fh = min(holdout, HOLDOUT_MAX / rows) if holdout > 0 else 0.0
    fc = min(CALIBRATE_FRACTION, CALIBRATE_MAX / rows)
    fv = min(VALIDATE_FRACTION, VALIDATE_MAX / rows)
    return fv, fh, fc


def time_cuts(times: np.ndarray, fv: float, fh: float, fc: float) -> tuple[float, float, float]:
    """Start times of validate, calibrate and holdout parts: the latest stretches in time."""
    q = np.quantile(times, [1 - fh - fc - fv, 1 - fh - fc, 1 - fh])
    return float(q[0]), float(q[1]), float(q[2])


@dataclass
class Plan:
    """What every block needs to know to do its share of pass 2 (sent to Dask workers)."""

    path: str
    sep: str
    decimal: str
    features: list[str]
    targets: list[str]
    time: str | None
    drop_incomplete: bool
    mean: np.ndarray
    scale: np.ndarray
    spec: KernelSpec
    landmarks: np.ndarray
    seed: int
    fractions: tuple[float, float, float]  # validate, holdout, calibrate (random parts)
    time_cuts: tuple[float, float, float] | None = None  # validate, calibrate, holdout starts


@dataclass
class BlockResult:
    sums: nystrom.Sums
    kept: dict = field(default_factory=dict)  # part → (x_s, y, t)


def row_parts(plan: Plan, block: Block, n_rows: int, t: np.ndarray | None) -> np.ndarray:
    """Part index (0 train, 1 validate, 2 holdout, 3 calibrate) of every row of a block."""
    if plan.time_cuts is not None:
        out = np.zeros(n_rows, dtype=np.int8)
        v_cut, c_cut, h_cut = plan.time_cuts
        out[t >= v_cut] = 1
        out[t >= c_cut] = 3
        out[t >= h_cut] = 2
        return out
    return parts_of_keys(part_keys(plan.seed, block.index, n_rows), plan.fractions)


def part_keys(seed: int, block_index: int, n_rows: int) -> np.ndarray:
    """The seeded uniform draw that decides the part of every row of a block.

    Pass 1 keeps the keys of its sample rows and pass 2 draws them again, so both passes put
    a row in the same part: sample rows outside the training part never become landmarks or
    tuning rows.
    """
    return np.random.default_rng([seed, 2, block_index]).random(n_rows)


def parts_of_keys(u: np.ndarray, fractions: tuple[float, float, float]) -> np.ndarray:
    """Part index of rows with keys ``u``: validate, holdout, calibrate below their
    cumulative fractions, train above."""
    fv, fh, fc = fractions
    out = np.zeros(u.shape[0], dtype=np.int8)
    out[u < fv + fh + fc] = 3
    out[u < fv + fh] = 2
    out[u < fv] = 1
    return out


def block_sums(plan: Plan, block: Block, first_row: int) -> BlockResult:
    """Pass 2 for one block: sums of its train rows, and its other parts' rows.

    Runs locally or on a Dask worker (which opens the file itself); the result depends only
    on the block, never on which machine computed it.
    """
    src = Source(plan.path, plan.sep, plan.decimal)
    chunk = src.read_block(block, plan.features + plan.targets, plan.time, first_row)
    d = len(plan.features)
    keep = usable_rows(src, chunk, plan.features, plan.time, first_row,
                       plan.drop_incomplete)[0]
    t_all = chunk.time
    part = row_parts(plan, block, keep.size, t_all)[keep]
    v = chunk.values[keep]
    x_s = (v[:, :d] - plan.mean) / plan.scale
    y = v[:, d:]
    t = t_all[keep] if t_all is not None else None
    train = part == 0
    sums = nystrom.accumulate(plan.spec, plan.landmarks, x_s[train], y[train])
    kept = {}
    for i, name in enumerate(PARTS[1:], start=1):
        sel = part == i
        if sel.any():
            kept[name] = (x_s[sel], y[sel], None if t is None else t[sel])
    return BlockResult(sums, kept)


@dataclass
class HeldRows:
    """Standardized rows of one held-out part (empty arrays when the part has none)."""

    x: np.ndarray
    y: np.ndarray
    t: np.ndarray | None

    @classmethod
    def stack(cls, rows: list, d: int, t: int) -> HeldRows:
        if not rows:
            return cls(np.empty((0, d)), np.empty((0, t)), None)
        times = None if rows[0][2] is None else np.concatenate([r[2] for r in rows])
        return cls(np.concatenate([r[0] for r in rows]), np.concatenate([r[1] for r in rows]),
                   times)


def cores() -> int:
    """CPU cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def in_threads(work: Callable, items: Iterable) -> Iterator:
    """``work(item)`` for every item, one thread per core, results in the items' order.

    Each thread runs single-threaded BLAS on its own items: two independent dsyrk calls keep
    both cores busy without the synchronization of one two-thread call, which stalls whenever
    another process takes a core, and the elementwise kernel work (one core per numpy call)
    runs on both cores too. At most one item per thread is in flight, so memory stays that of
    ``cores()`` items however many there are.
    """
    workers = cores()
    if workers < 2:
        yield from map(work, items)
        return
    from concurrent.futures import ThreadPoolExecutor

    from threadpoolctl import threadpool_limits

    with threadpool_limits(1, user_api="blas"), ThreadPoolExecutor(workers) as pool:
        pending: deque = deque()
        for item in items:
            pending.append(pool.submit(work, item))
            if len(pending) >= workers:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


def run_pass2(plan: Plan, blocks: list, cluster: str | None, progress
              ) -> tuple[nystrom.Sums, dict[str, HeldRows]]:
    """The training sums and the held-out parts, from this process or a Dask cluster.

    Block results are added in block order: the same sums whoever computed them.
    """
    m, t = plan.landmarks.shape[0], len(plan.targets)
    sums = nystrom.Sums.zeros(m, t)
    held: dict[str, list] = {p: [] for p in PARTS[1:]}

    def add(res: BlockResult) -> None:
        sums.add(res.sums)
        for part, rows in res.kept.items():
            held[part].append(rows)

    if cluster:
        from trainer.cluster import map_blocks

        for res in progress(map_blocks(cluster, plan, blocks), "fitting on the cluster"):
            add(res)
    else:
        for res in in_threads(lambda item: block_sums(plan, *item),
                              progress(blocks, "fitting")):
            add(res)
    d = len(plan.features)
    return sums, {p: HeldRows.stack(v, d, t) for p, v in held.items()}
