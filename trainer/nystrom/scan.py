"""Pass 1 of a Nyström fit: one streamed read of the file before any fitting work.

Every row is checked (a missing input is refused by line, or left out with
``--drop-incomplete``) and counted; the standardization (mean and population SD merged across
blocks: Chan, Golub & LeVeque, "Algorithms for computing the sample variance", 1983), the
per-feature ranges, the time column and a seeded uniform sample of rows (the rows with the
smallest random keys) are gathered block by block, so the file is never held whole.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from trainer.errors import UserError
from trainer.read.columns import usable_rows
from trainer.read.source import Source
from trainer.validation.splits import part_keys

#: Rows kept in memory from pass 1 for landmarks, tuning and the novelty reference.
SAMPLE_ROWS = 50_000


@dataclass
class Scan:
    """What pass 1 found: counts, moments, ranges, times, the sample and the blocks."""

    rows_read: int = 0
    with_target: int = 0
    dropped: int = 0
    count: int = 0
    mean: np.ndarray | None = None
    m2: np.ndarray | None = None
    lo: np.ndarray | None = None
    hi: np.ndarray | None = None
    times: list = field(default_factory=list)
    sample_keys: np.ndarray | None = None
    sample: np.ndarray | None = None  # (s, d + t) raw values
    sample_time: np.ndarray | None = None
    sample_part_key: np.ndarray | None = None  # each sample row's part draw (pass 2's too)
    blocks: list = field(default_factory=list)  # (block, first data row)

    def add(self, x: np.ndarray) -> None:
        """Merge a block's mean and M2 (Chan, Golub & LeVeque 1983)."""
        nb = x.shape[0]
        if nb == 0:
            return
        mb = x.mean(axis=0)
        m2b = ((x - mb) ** 2).sum(axis=0)
        if self.count == 0:
            self.mean, self.m2 = mb, m2b
            self.lo, self.hi = x.min(axis=0), x.max(axis=0)
        else:
            n = self.count + nb
            delta = mb - self.mean
            self.mean = self.mean + delta * (nb / n)
            self.m2 = self.m2 + m2b + delta**2 * (self.count * nb / n)
            self.lo, self.hi = np.minimum(self.lo, x.min(axis=0)), np.maximum(self.hi,
                                                                              x.max(axis=0))
        self.count += nb

    def keep_sample(self, keys: np.ndarray, rows: np.ndarray, t: np.ndarray | None,
                    part_key: np.ndarray) -> None:
        """Keep the rows with the SAMPLE_ROWS smallest keys seen so far (a uniform sample),
        with their time and their part draw."""
        if self.sample is None:
            self.sample_keys, self.sample, self.sample_time = keys, rows, t
            self.sample_part_key = part_key
        else:
            self.sample_keys = np.concatenate([self.sample_keys, keys])
            self.sample = np.concatenate([self.sample, rows])
            self.sample_part_key = np.concatenate([self.sample_part_key, part_key])
            if t is not None:
                self.sample_time = np.concatenate([self.sample_time, t])
        if self.sample_keys.size > SAMPLE_ROWS:
            top = np.argpartition(self.sample_keys, SAMPLE_ROWS - 1)[:SAMPLE_ROWS]
            top.sort()
            self.sample_keys, self.sample = self.sample_keys[top], self.sample[top]
            self.sample_part_key = self.sample_part_key[top]
            if self.sample_time is not None:
                self.sample_time = self.sample_time[top]


def scan(src: Source, features, targets, time_col, drop: bool, seed: int,
         block_bytes: int, progress) -> Scan:
    """Pass 1 (see the module notes); refuses a bad file before any fitting work."""
    d = len(features)
    out = Scan()
    if src.kind == "excel":
        raise UserError(f"{src.path}: Nyström training streams CSV or Parquet; convert the "
                        "spreadsheet, or train it exactly with --method exact")
    first_row = 0
    blocks = src.blocks(block_bytes)
    for block in progress(blocks, "scanning"):
        chunk = src.read_block(block, features + targets, time_col, first_row)
        v = chunk.values
        keep, has_target, bad = usable_rows(src, chunk, features, time_col, first_row, drop)
        out.blocks.append((block, first_row))
        out.rows_read += v.shape[0]
        out.with_target += int(has_target.sum())
        out.dropped += int(bad.sum())
        first_row += v.shape[0]
        rows = v[keep]
        out.add(rows[:, :d])
        t = chunk.time[keep] if chunk.time is not None else None
        if t is not None:
            out.times.append(t)
        keys = np.random.default_rng([seed, 1, block.index]).random(v.shape[0])[keep]
        out.keep_sample(keys, rows, t, part_keys(seed, block.index, v.shape[0])[keep])
    return out
