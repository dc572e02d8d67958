"""Long-form fuzzing: schemathesis against the served /openapi.json with many cases.

Same setup as tests/test_fuzz.py (a real 2-worker gunicorn on a small coating store, every
check, all phases), once without and once with the admin token; then the access log is
searched for 5xx answers.

    python bench/fuzz.py [--examples 400] [--seed 7]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench.fuzz_harness import (  # noqa: E402
    TOKEN,
    run_schemathesis,
    served_env,
    small_store,
    statuses,
)
from bench.machine import header  # noqa: E402
from service.launch import Gunicorn  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--examples", type=int, default=400, help="max examples per operation")
    ap.add_argument("--seed", type=int, default=7)
    args = ap.parse_args()
    print(header('fuzz: schemathesis against the served OpenAPI document'))
    ok = True
    with tempfile.TemporaryDirectory(prefix="kridge-fuzz-") as tmp:
        root = Path(tmp)
        store = small_store(root, ROOT / "demo_data" / "coating_line.csv")
        log = root / "access.log"
        with open(log, "w") as out, Gunicorn.on_free_port(
                store, 2, env=served_env(root, log), cwd=str(ROOT), output=out) as g:
            for who, token in (("anonymous", None), ("admin", TOKEN)):
                res = run_schemathesis(g.base, root, args.examples, args.seed, token)
                failed = res["generated"] - res["passed"]
                print(f"schemathesis {who}: {res['generated']} cases generated, "
                      f"{failed} failed, exit {res['exit']}")
                ok &= res["exit"] == 0 and res["clean"] and failed == 0
                if not res["clean"]:
                    print(res["output"][-4000:])
        answered = statuses(log)
        errors = sum(s >= 500 for s in answered)
        print(f"requests answered: {len(answered)}, 5xx: {errors}")
        ok &= errors == 0
    print("PASS" if ok else "FAIL")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
