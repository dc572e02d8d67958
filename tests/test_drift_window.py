"""The request rows a worker samples for drift while serving (service/drift_window.py):
Algorithm R is uniform, bounded and O(1) per row; the background test reads the window."""

from __future__ import annotations

import tracemalloc

import numpy as np
from scipy.stats import chisquare
from service_helpers import small_model_store

from service.drift_window import MIN_ROWS, DriftMonitor, Reservoir
from service.model import load_model


def test_reservoir_keeps_every_row_with_equal_probability():
    # Reference: Vitter (1985), Algorithm R keeps each of n offered rows with probability
    # size / n; judged by scipy.stats.chisquare (scipy 1.17) on the inclusion counts
    n, size, streams = 20, 5, 4000
    counts = np.zeros(n)
    batches = np.random.default_rng(0)
    for s in range(streams):
        r = Reservoir(size, 1, seed=s)
        items = [[float(i)] for i in range(n)]
        start = 0
        while start < n:  # requests of 1 to 4 rows, as the predict route offers them
            step = int(batches.integers(1, 5))
            r.offer(items[start:start + step], ["x"])
            start += step
        rows, seen = r.take()
        assert seen == n and rows.shape == (size, 1)
        kept = rows[:, 0].astype(int)
        assert len(set(kept.tolist())) == size  # no row twice
        counts[kept] += 1
    assert counts.sum() == streams * size
    result = chisquare(counts)  # expected: streams * size / n = 1000 each
    assert result.pvalue > 1e-3, (result, counts)


def test_a_short_stream_is_kept_whole_and_dict_rows_follow_the_features():
    r = Reservoir(10, 2)
    r.offer([{"b": 2.0, "a": 1.0}, [3.0, 4.0]], ["a", "b"])
    rows, seen = r.take()
    assert seen == 2
    assert rows.tolist() == [[1.0, 2.0], [3.0, 4.0]]
    assert r.take() is None  # taking empties the window


def test_the_window_stays_bounded_and_costs_one_draw_per_row():
    size = 64
    r = Reservoir(size, 3, seed=1)
    buffer = r._rows
    draws = 0
    draw = r._random

    def counted():
        nonlocal draws
        draws += 1
        return draw()

    r._random = counted
    rows = [[1.0, 2.0, 3.0]] * 8
    for _ in range(200):  # warm-up: every slot filled
        r.offer(rows, [])
    tracemalloc.start()
    before = tracemalloc.get_traced_memory()[0]
    for _ in range(20_000):
        r.offer(rows, [])
    grown = tracemalloc.get_traced_memory()[0] - before
    tracemalloc.stop()
    assert grown < 4096, grown  # nothing kept per row offered
    assert r._rows is buffer and buffer.nbytes == size * 3 * 8  # the preallocated ring
    offered = (200 + 20_000) * len(rows)
    assert draws == offered - size  # one draw per row once the window is full, none before
    taken, seen = r.take()
    assert seen == offered and taken.shape == (size, 3)


def test_monitor_tests_the_window_against_the_training_sample(tmp_path, demo_csv):
    store = small_model_store(tmp_path, demo_csv)
    model = load_model(store, "c")
    raw = model.reference * model.scale + model.mean  # training rows in raw units
    monitor = DriftMonitor(size=60, permutations=99)
    monitor.offer("c", model, raw[: MIN_ROWS - 1].tolist())
    assert monitor.check("c", model) is None  # too few rows: keep collecting
    shifted = raw.copy()
    shifted[:, 1] += 3 * model.scale[1]
    monitor.offer("c", model, shifted.tolist())
    reading = monitor.check("c", model)
    assert reading is not None and reading.p_value <= 0.02 and reading.statistic > 0
    assert reading.rows == 60 and reading.offered == MIN_ROWS - 1 + len(raw)
    assert monitor.check("c", model) is None  # the window was emptied
    monitor.offer("c", model, raw.tolist())
    assert monitor.check("c", model).p_value > 0.05  # the training rows themselves


def test_the_served_test_in_pieces_gives_the_offline_result():
    from service.drift import mmd_test
    from service.kernels import KernelSpec

    rng = np.random.default_rng(4)
    a, b = rng.normal(size=(80, 3)), rng.normal(0.3, 1, size=(70, 3))
    pieces = []

    class Piece:
        def __enter__(self):
            pieces.append(1)

        def __exit__(self, *exc):
            return False

    whole = mmd_test(KernelSpec("rbf", gamma=0.3), a, b, 99, np.random.default_rng(1))
    split = mmd_test(KernelSpec("rbf", gamma=0.3), a, b, 99, np.random.default_rng(1), 20, Piece)
    assert split[1:] == whole[1:]
    assert len(pieces) == 1 + 2 + 5  # kernel matrix, diagonal and observed, 5 sets of ≤ 20
