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

A second period (:func:`generate_after_change`, also our own) follows the first: eight weeks
of lab samples every two hours, stamped ``sampled_at`` (UTC). In weeks 3–4 the plant phases in
a new resin lot; from week 5 on only the new resin runs. The new resin is more viscous
(viscosity centred on 1000 instead of 600 mPa·s) and its hardness falls faster with viscosity:

    hardness [s]       = … − (0.004 + 0.026 s) (viscosity − 600)      s = share of new resin
    gloss [GU]         = … − (0.012 + 0.004 s) (viscosity − 600)

so a model of the first period drifts off as the share rises. Hardness takes a day in the lab
and is missing for about a quarter of the samples (empty cells); gloss is always there.

Files (all written by ``main``):
    coating_line.csv                the first period (the demo's training data)
    coating_line_after_change.csv   the second period, with ``sampled_at``
    coating_line_retrain.csv        the first period and weeks 1–6 of the second (no time
                                    column): the data a retrained version is fitted on, so
                                    weeks 7–8 stay fresh for ``kridge compare --since``

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


#: Start of the second period (UTC), its sampling interval and length.
CHANGE_START = np.datetime64("2026-10-05T06:00:00")
SAMPLE_HOURS = 2
AFTER_CHANGE_ROWS = 8 * 7 * 24 // SAMPLE_HOURS
#: The new resin's share ramps from 0 to 1 over weeks 3–4 (days since CHANGE_START).
RAMP_DAYS = (14.0, 28.0)
#: Rows of the second period that go into the retraining file (weeks 1–6).
RETRAIN_DAYS = 42.0


def _cure(temp: np.ndarray, speed: np.ndarray) -> np.ndarray:
    """Degree of cure c = 1 − exp(−k t) of the module docstring's Arrhenius model."""
    k = 2.4e7 * np.exp(-8200.0 / (temp + 273.15))
    return 1.0 - np.exp(-k * 30.0 / speed)


def generate_after_change(rows: int = AFTER_CHANGE_ROWS, seed: int = 20261205
                          ) -> tuple[np.ndarray, np.ndarray]:
    """The second period: (days since :data:`CHANGE_START` (rows,), values (rows, 7) in
    COLUMNS order, NaN where hardness was not measured)."""
    rng = np.random.default_rng(seed)
    days = np.arange(rows) * SAMPLE_HOURS / 24.0
    share = np.clip((days - RAMP_DAYS[0]) / (RAMP_DAYS[1] - RAMP_DAYS[0]), 0.0, 1.0)
    temp = rng.uniform(160.0, 220.0, rows)
    speed = np.maximum(8.0 + (temp - 160.0) * 0.45 + rng.normal(0.0, 2.5, rows), 4.5)
    film = rng.uniform(30.0, 65.0, rows)  # still no thick films in humid weather: thin only
    hum = np.clip(rng.normal(50.0, 12.0, rows), 20.0, 85.0)
    new = rng.random(rows) < share  # each sample runs one lot or the other
    visc = np.where(new, rng.lognormal(np.log(1000.0), 0.12, rows),
                    rng.lognormal(np.log(600.0), 0.25, rows))
    c = _cure(temp, speed)
    slope_h = np.where(new, 0.030, 0.004)
    slope_g = np.where(new, 0.016, 0.012)
    hard = (45.0 + 140.0 * c - 0.25 * (film - 60.0) - 0.35 * (hum - 50.0)
            - slope_h * (visc - 600.0) + rng.normal(0.0, 3.0, rows))
    gloss = (93.0 - 18.0 * (1.0 - c) ** 2 - slope_g * (visc - 600.0) - 0.04 * (film - 60.0)
             + rng.normal(0.0, 0.8, rows))
    hard[rng.random(rows) < 0.25] = np.nan
    return days, np.column_stack([temp, speed, film, hum, visc, hard, gloss])


def write_csv(path: Path, values: np.ndarray, days: np.ndarray | None = None) -> None:
    """The rows as CSV (fixed decimals per column; an empty cell for NaN); with ``days``, a
    first column ``sampled_at`` of ISO 8601 UTC stamps :data:`CHANGE_START` + days."""
    decimals = [1, 2, 1, 1, 0, 1, 1]
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow((["sampled_at"] if days is not None else []) + COLUMNS)
        for i, row in enumerate(values):
            cells = ["" if np.isnan(v) else f"{v:.{d}f}"
                     for v, d in zip(row, decimals, strict=True)]
            if days is not None:
                stamp = CHANGE_START + np.timedelta64(int(round(days[i] * 86400)), "s")
                cells.insert(0, f"{stamp}Z")
            w.writerow(cells)


def write_all(folder: Path, rows: int = 2000, seed: int = 20261201,
              after_rows: int = AFTER_CHANGE_ROWS) -> None:
    """Write the three demo files of the module docstring into ``folder``."""
    first = generate(rows, seed)
    days, after = generate_after_change(after_rows)
    write_csv(folder / "coating_line.csv", first)
    write_csv(folder / "coating_line_after_change.csv", after, days)
    write_csv(folder / "coating_line_retrain.csv",
              np.vstack([first, after[days < RETRAIN_DAYS]]))


def main(argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("out", nargs="?", help="write only the first period to this CSV "
                   "(default: all three files into demo_data/)")
    p.add_argument("--rows", type=int, default=2000)
    p.add_argument("--seed", type=int, default=20261201)
    args = p.parse_args(argv)
    if args.out:
        write_csv(Path(args.out), generate(args.rows, args.seed))
        print(f"wrote {args.rows} rows to {args.out}")
        return
    folder = Path(__file__).parent
    write_all(folder, args.rows, args.seed)
    print(f"wrote coating_line.csv ({args.rows} rows), coating_line_after_change.csv and "
          f"coating_line_retrain.csv to {folder}")


if __name__ == "__main__":
    main()
