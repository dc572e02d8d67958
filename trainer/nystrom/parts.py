"""Pass 2 of a Nyström fit: every row gets a part, and the training part becomes sums.

Parts — train, validate, holdout, calibrate — come from a seeded random draw per block (or,
with ``--time``, from the row's time: the latest rows are held out, the stretch before
calibrates, the one before that validates). Training rows are added into the Nyström sums
(:mod:`trainer.nystrom.numerics`); the rows of the other parts (capped in size) are kept in memory.
A block's result depends only on the block, so blocks can be summed here or on Dask workers
(:mod:`trainer.nystrom.cluster`) and added in block order with the same outcome.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from service.kernels import KernelSpec
from trainer.nystrom import numerics
from trainer.read.columns import usable_rows
from trainer.read.dates import TimeRule
from trainer.read.source import Block, Source
from trainer.validation.splits import PartSplit, part_keys

PARTS = ("train", "validate", "holdout", "calibrate")


@dataclass
class BlockPlan:
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
    split: PartSplit  # the job's split: the rule that gives each row its part
    keep_train: bool = False  # CG: return the training rows themselves, no sums
    time_rule: TimeRule = field(default_factory=TimeRule)  # how the time column reads


@dataclass
class BlockResult:
    sums: numerics.Sums | None  # None when the plan keeps the training rows instead
    kept: dict = field(default_factory=dict)  # part → (x_s, y, t)


def block_sums(plan: BlockPlan, block: Block, first_row: int) -> BlockResult:
    """Pass 2 for one block: sums of its train rows, and its other parts' rows.

    Runs locally or on a Dask worker (which opens the file itself); the result depends only
    on the block, never on which machine computed it.
    """
    src = Source(plan.path, plan.sep, plan.decimal, plan.time_rule)
    chunk = src.read_block(block, plan.features + plan.targets, plan.time, first_row)
    d = len(plan.features)
    keep = usable_rows(src, chunk, plan.features, plan.time, first_row,
                       plan.drop_incomplete)[0]
    t_all = chunk.time
    keys = part_keys(plan.seed, block.index, keep.size)
    part = plan.split.parts(keys, t_all)[keep]
    v = chunk.values[keep]
    x_s = (v[:, :d] - plan.mean) / plan.scale
    y = v[:, d:]
    t = t_all[keep] if t_all is not None else None
    train = part == 0
    kept = {}
    if plan.keep_train:
        sums = None
        kept["train"] = (x_s[train], y[train], None)
    else:
        sums = numerics.accumulate(plan.spec, plan.landmarks, x_s[train], y[train])
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
    block_rows: list[int] = field(default_factory=list)  # rows from each block, in order

    @classmethod
    def stack(cls, rows: list, d: int, t: int) -> HeldRows:
        if not rows:
            return cls(np.empty((0, d)), np.empty((0, t)), None)
        times = None if rows[0][2] is None else np.concatenate([r[2] for r in rows])
        return cls(np.concatenate([r[0] for r in rows]), np.concatenate([r[1] for r in rows]),
                   times, [r[0].shape[0] for r in rows])
