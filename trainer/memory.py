"""Memory an exact fit needs, and the memory the machine offers it.

An exact fit holds the n × n kernel matrix and factorizes it in place (LAPACK's Cholesky
and its inverse need only O(n) workspace beyond it), so its peak is
:data:`EXACT_OVERHEAD` × 8·n² bytes. The factor is measured: peak resident memory of
1,981 MB at 15,000 rows (1.10 × 8n²) and 3,366 MB at 20,000 rows (1.05 × 8n²), from
``bench/scale_bench.py`` (figures in the README); the kernel's computation blocks, the rows
themselves and the interpreter make the rest.
"""

from __future__ import annotations

import os

from trainer.errors import UserError

#: Peak memory of an exact fit over the 8·n² bytes of its kernel matrix (module notes).
EXACT_OVERHEAD = 1.15
#: Env setting: the bytes an exact fit may use (default: MemAvailable of /proc/meminfo).
MEMORY_ENV = "KRIDGE_TRAIN_MEMORY_BYTES"


def exact_need(rows: int) -> int:
    """Bytes an exact fit of ``rows`` rows needs: :data:`EXACT_OVERHEAD` · 8 · rows²."""
    return int(EXACT_OVERHEAD * 8 * rows * rows)


def available() -> tuple[int | None, str]:
    """(bytes, where the figure comes from): :data:`MEMORY_ENV`, else MemAvailable."""
    raw = os.environ.get(MEMORY_ENV)
    if raw is not None and raw.strip():
        try:
            value = int(float(raw))
        except ValueError:
            raise UserError(f"{MEMORY_ENV}={raw!r} is not a number of bytes") from None
        if value <= 0:
            raise UserError(f"{MEMORY_ENV} must be a positive number of bytes, got {raw!r}")
        return value, MEMORY_ENV
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024, "MemAvailable in /proc/meminfo"
    except OSError:
        pass
    return None, "unknown"


def size_text(value: int) -> str:
    """Bytes in GB, MB or kB (decimal units), three significant digits."""
    for unit, scale in (("GB", 1e9), ("MB", 1e6)):
        if value >= scale:
            return f"{value / scale:.3g} {unit}"
    return f"{value / 1e3:.3g} kB"


def exact_shortfall(rows: int) -> str | None:
    """Why an exact fit of ``rows`` rows cannot fit in memory, or None when it can (or the
    memory is unknown)."""
    need = exact_need(rows)
    have, source = available()
    if have is None or need <= have:
        return None
    return (f"an exact fit of {rows} rows needs about {size_text(need)} "
            f"({EXACT_OVERHEAD:g} × 8 bytes × {rows}², the kernel matrix factorized in place), "
            f"but {size_text(have)} is available ({source})")
