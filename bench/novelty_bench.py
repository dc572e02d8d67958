"""The novelty score's cost per row beside the kernel sum's (``trainer.envelope_stats``'s
``REFERENCE_ROWS``): one query row against a 2,000 × 16 novelty reference and against a
20,000 × 16 rbf model, best of 300 calls each.

    python bench/novelty_bench.py
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench.machine import fastest_call  # noqa: E402
from service.engine import Engine  # noqa: E402
from service.envelope import NOVELTY_K, NeighbourIndex  # noqa: E402
from service.kernels import KernelSpec  # noqa: E402


def best_of(call, repeats: int = 300) -> float:
    return fastest_call(call, repeats)


def main() -> None:
    rng = np.random.default_rng(0)
    query = rng.standard_normal((1, 16))
    index = NeighbourIndex(rng.standard_normal((2000, 16)), NOVELTY_K)
    x = rng.standard_normal((20_000, 16))
    engine = Engine(KernelSpec("rbf", gamma=0.1), x, rng.standard_normal((20_000, 1)))
    novelty = best_of(lambda: index.distances(query))
    kernel = best_of(lambda: engine.predict(query))
    print(f"novelty, 2,000 x 16 reference: {novelty * 1e6:.0f} µs per row")
    print(f"kernel sum, 20,000 x 16 rbf:   {kernel * 1e6:.0f} µs per row")
    print(f"ratio novelty / kernel: {novelty / kernel:.2f}")


if __name__ == "__main__":
    main()
