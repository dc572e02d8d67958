"""Drift while serving: a sampled window of request rows per model, tested in the background.

The request path only offers rows to a :class:`Reservoir`: a preallocated (size, d) float
array filled by Vitter's Algorithm R (J. S. Vitter, "Random Sampling with a Reservoir",
ACM TOMS 11(1), 1985): the n-th row offered replaces slot j = ⌊U·n⌋ when j < size, so that
after n rows every one of them is in the window with probability size / n. Per row that is
one random number and, for the few rows kept, one row copy, under a lock held only for the
loop (O(1) per row; no allocation once the window exists).

A worker's background thread (:class:`DriftMonitor`) takes each window every
``KRIDGE_DRIFT_SECONDS``, once it holds at least :data:`MIN_ROWS` rows, and tests it against
a uniform sample of the live version's training rows of the same size with the MMD
permutation test of :mod:`service.drift`; taking a window empties it, so each test covers
the rows that arrived since the previous one. Results go to the gauges of
:mod:`service.traffic_metrics`. The test runs in pieces (the kernel matrix, then
:data:`PIECE_PERMUTATIONS` permutations at a time), each under the worker's compute slot
like a request, so that one computation per worker runs at a time (workers × engine threads
≤ cores) and a request waits for one piece at most; its size is bounded by the window
(2·size rows in the joint kernel matrix).
"""

from __future__ import annotations

import contextlib
import logging
import random
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from service import traffic_metrics
from service.answers import COMPUTE_SLOT
from service.drift import mmd_test

log = logging.getLogger("kridge.drift_window")

#: Fewest sampled rows a served drift test runs on (fewer: keep collecting).
MIN_ROWS = 30
#: Permutations per hold of the compute slot (one product of the (2·size)² kernel matrix
#: with this many membership columns).
PIECE_PERMUTATIONS = 20


@contextlib.contextmanager
def compute_piece() -> Iterator[None]:
    """One piece of background work under the worker's compute slot; afterwards the thread
    lets go of the interpreter for a moment, so that a request waiting for the slot takes it
    before the next piece does."""
    with COMPUTE_SLOT:
        yield
    time.sleep(0)


class Reservoir:
    """A uniform sample of at most ``size`` of the rows offered since the last :meth:`take`
    (Algorithm R; module doc)."""

    __slots__ = ("size", "version", "seen", "_rows", "_lock", "_random")

    def __init__(self, size: int, width: int, version: int = 0, seed: int | None = None):
        self.size = size
        self.version = version
        self.seen = 0  # rows offered since the last take
        self._rows = np.empty((size, width))
        self._lock = threading.Lock()
        self._random = random.Random(seed).random

    def offer(self, rows: list, features: list[str]) -> None:
        """Offer request rows (lists in feature order, or dicts keyed by feature)."""
        size, draw, store = self.size, self._random, self._rows
        with self._lock:
            n = self.seen
            for row in rows:
                n += 1
                if n <= size:
                    slot = n - 1
                else:
                    slot = int(draw() * n)
                    if slot >= size:
                        continue
                store[slot] = row if type(row) is list else [row[f] for f in features]
            self.seen = n

    def take(self, least: int = 1) -> tuple[np.ndarray, int] | None:
        """(copy of the sampled rows, rows offered) and an empty window; None while fewer
        than ``least`` rows have been offered (the window is left as it is)."""
        with self._lock:
            if self.seen < least:
                return None
            rows = self._rows[: min(self.seen, self.size)].copy()
            seen, self.seen = self.seen, 0
        return rows, seen


@dataclass
class Reading:
    """One served drift test of a model's window."""

    version: int
    statistic: float
    p_value: float
    rows: int
    offered: int
    kernel: str


class DriftMonitor:
    """Every live model's :class:`Reservoir` in this worker, and the test that reads them."""

    def __init__(self, size: int, permutations: int):
        self.size = size
        self.permutations = permutations
        self.windows: dict[str, Reservoir] = {}
        self.readings: dict[str, Reading] = {}
        self._new = threading.Lock()
        self._checks = 0

    def offer(self, name: str, model, rows: list) -> None:
        """The request path's call: offer a live request's rows to the model's window (a
        new window when the live version changed)."""
        window = self.windows.get(name)
        if window is None or window.version != model.version:
            with self._new:
                window = self.windows.get(name)
                if window is None or window.version != model.version:
                    window = Reservoir(self.size, len(model.features), model.version)
                    self.windows[name] = window
        window.offer(rows, model.features)

    def check(self, name: str, model) -> Reading | None:
        """Test the window of ``name`` when it holds enough rows of ``model``'s version."""
        window = self.windows.get(name)
        if window is None or window.version != model.version:
            return None
        taken = window.take(MIN_ROWS)
        if taken is None:
            return None
        rows, offered = taken
        self._checks += 1
        rng = np.random.default_rng(self._checks)
        ref = np.asarray(model.reference, dtype=np.float64)
        if ref.shape[0] > self.size:
            ref = ref[np.sort(rng.choice(ref.shape[0], self.size, replace=False))]
        spec, statistic, p = mmd_test(model.spec, ref, model.standardize(rows),
                                      self.permutations, rng, PIECE_PERMUTATIONS, compute_piece)
        reading = Reading(model.version, statistic, p, rows.shape[0], offered,
                          spec.describe())
        self.readings[name] = reading
        traffic_metrics.DRIFT_P_VALUE.labels(name).set(p)
        traffic_metrics.DRIFT_STATISTIC.labels(name).set(statistic)
        traffic_metrics.DRIFT_ROWS.labels(name).set(rows.shape[0])
        traffic_metrics.DRIFT_CHECKS.labels(name).inc()
        return reading

    def check_all(self, live) -> None:
        """One pass over the windows; ``live(name)`` is the loaded live model or None."""
        for name in list(self.windows):
            model = live(name)
            if model is None:
                continue
            try:
                self.check(name, model)
            except Exception:  # a test that fails must not stop the others
                log.exception("drift test of model %s failed", name)
