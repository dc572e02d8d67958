"""Two bench runs side by side: every ratio that both JSON files hold (see bench/machine.py).

    python bench/compare.py bench/results/BEFORE.json bench/results/AFTER.json

Ratios, not seconds: each was measured against its reference in the same run, so they travel
between runs better than raw times do. The machines of both runs are printed first.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench.machine import header  # noqa: E402


def ratios(node, path: str = "") -> dict[str, float]:
    """Flatten to {"bench/row label/key": value} for every number under a key ratio_*."""
    out: dict[str, float] = {}
    if isinstance(node, dict):
        label = "/".join(str(node[k]) for k in ("kernel", "n", "rows") if k in node)
        for key, value in node.items():
            where = f"{path}/{label}" if label else path
            if key.startswith("ratio_") and isinstance(value, int | float):
                out[f"{where}/{key[6:]}"] = float(value)
            elif key != "machine":
                out.update(ratios(value, f"{path}/{key}" if not label else where))
    elif isinstance(node, list):
        for i, item in enumerate(node):
            sub = ratios(item, path)
            out.update(sub if sub and len(sub) == len(set(sub)) else
                       {f"{k}#{i}": v for k, v in sub.items()})
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("before")
    ap.add_argument("after")
    args = ap.parse_args()
    docs = [json.loads(Path(p).read_text()) for p in (args.before, args.after)]
    for name, doc in zip(("before", "after"), docs, strict=True):
        print(header(f"{name}: {doc.get('started')}", doc["machine"]))
    a, b = (ratios(doc.get("benches", {})) for doc in docs)
    print(f"\n{'figure':<60}{'before':>9}{'after':>9}{'after/before':>14}")
    for key in sorted(set(a) & set(b)):
        change = b[key] / a[key] if a[key] else float("nan")
        print(f"{key[1:]:<60}{a[key]:>9.3f}{b[key]:>9.3f}{change:>14.3f}")
    for key in sorted(set(a) ^ set(b)):
        print(f"{key[1:]:<60}  only {'before' if key in a else 'after'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
