"""Generate the demo scenario: a coating line's soft sensor (invented data, fixed seed).

A lacquer is applied to steel coil and cured in a 30 m convection oven. Lab tests of cured film
hardness (König pendulum, seconds) and 60° gloss (gloss units) take an hour; the soft sensor
estimates them from five process readings taken every minute.

Model (our own, for the demo only):

    residence time     t   = 30 m / line speed                     [min]
    cure rate          k   = 2.4e7 · exp(-8200 / (T + 273.15))     [1/min]  (Arrhenius form)
    degree of cure     c   = 1 − exp(−k t)
    hardness [s]       = 45 + 140 c − 0.25 (film − 60) − 0.35 (humidity − 50)
                         − 0.004 (viscosity − 600) + N(0, 3²)
    gloss [GU]         = 93 − 18 (1 − c)² − 0.012 (viscosity − 600) − 0.04 (film − 60)
                         + N(0, 0.8²)

Operators run faster when the oven is hotter, so temperature and line speed are correlated:
a hot oven at a slow speed (a corner inside both ranges) is never seen. The plant also never
runs thick films in humid weather: rows with film above 65 µm and humidity 35-75 % are removed,
leaving an empty operating region inside every per-feature range for the novelty flag.

Usage: ``python demo_data/make_coating_data.py [OUT.csv] [--rows N] [--seed S]``
"""

from __future__ import annotations

import argparse
import csv
from pathlib import Path

import numpy as np

COLUMNS = [
    "oven_temp_c", "line_speed_m_min", "wet_film_um", "humidity_pct", "viscosity_mpas",
    "hardness_s", "gloss_gu",
]
#: A point inside every per-feature range but in the empty region (for examples and tests).
EMPTY_REGION_ROW = {"oven_temp_c": 190.0, "line_speed_m_min": 22.0, "wet_film_um": 105.0,
                    "humidity_pct": 55.0, "viscosity_mpas": 600.0}
#: A typical operating point.
TYPICAL_ROW = {"oven_temp_c": 190.0, "line_speed_m_min": 22.0, "wet_film_um": 60.0,
               "humidity_pct": 45.0, "viscosity_mpas": 600.0}


def generate(rows: int = 2000, seed: int = 20261201) -> np.ndarray:
    """Return an array of ``rows`` rows in COLUMNS order."""
    rng = np.random.default_rng(seed)
    out = []
    while sum(len(o) for o in out) < rows:
        m = rows
        temp = rng.uniform(160.0, 220.0, m)
        speed = 8.0 + (temp - 160.0) * 0.45 + rng.normal(0.0, 2.5, m)
        film = rng.uniform(30.0, 110.0, m)
        hum = np.clip(rng.normal(50.0, 12.0, m), 20.0, 85.0)
        visc = rng.lognormal(np.log(600.0), 0.25, m)
        keep = ~((film > 65.0) & (hum > 35.0) & (hum < 75.0)) & (speed > 4.0)
        t = 30.0 / speed
        k = 2.4e7 * np.exp(-8200.0 / (temp + 273.15))
        c = 1.0 - np.exp(-k * t)
        hard = (45.0 + 140.0 * c - 0.25 * (film - 60.0) - 0.35 * (hum - 50.0)
                - 0.004 * (visc - 600.0) + rng.normal(0.0, 3.0, m))
        gloss = (93.0 - 18.0 * (1.0 - c) ** 2 - 0.012 * (visc - 600.0) - 0.04 * (film - 60.0)
                 + rng.normal(0.0, 0.8, m))
        block = np.column_stack([temp, speed, film, hum, visc, hard, gloss])[keep]
        out.append(block)
    return np.vstack(out)[:rows]


def write_csv(path: Path, values: np.ndarray) -> None:
    decimals = [1, 2, 1, 1, 0, 1, 1]
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(COLUMNS)
        for row in values:
            w.writerow([f"{v:.{d}f}" for v, d in zip(row, decimals, strict=True)])


def main(argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("out", nargs="?", default=str(Path(__file__).with_name("coating_line.csv")))
    p.add_argument("--rows", type=int, default=2000)
    p.add_argument("--seed", type=int, default=20261201)
    args = p.parse_args(argv)
    write_csv(Path(args.out), generate(args.rows, args.seed))
    print(f"wrote {args.rows} rows to {args.out}")


if __name__ == "__main__":
    main()
