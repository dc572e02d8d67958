"""The fuzzing set-up shared by ``bench/fuzz.py`` (many cases) and ``tests/test_fuzz.py``
(few): a small coating store, the fuzzed service's settings, schemathesis with every check,
and the statuses of the JSON-lines access log."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

from trainer.job import TrainOptions, train

TOKEN = "fuzz-token-2e77a1"
ST = str(Path(sys.executable).with_name("st"))

#: The status codes a refused request may get. negative_data_rejection's default list lacks
#: 413, the status RFC 9110 §15.5.14 gives to a body over the limit (our row limit, which
#: the document states as maxItems).
CONFIG = """\
[checks.negative_data_rejection]
expected-statuses = ["400", "401", "403", "404", "405", "409", "413", "415", "422"]
"""


def run_schemathesis(base: str, workdir: Path, max_examples: int, seed: int,
                     token: str | None = None) -> dict:
    """``st run`` with every check; returns counts parsed from its summary."""
    config = workdir / "schemathesis.toml"
    config.write_text(CONFIG)
    # one worker: st 4.32 on Python 3.11 can trip over its own AST cache with several
    argv = [ST, "--config-file", str(config), "run", f"{base}/openapi.json", "--checks", "all",
            "--max-examples", str(max_examples), "--seed", str(seed), "--workers", "1",
            "--no-color", "--generation-database", "none"]
    if token:
        argv += ["--header", f"Authorization: Bearer {token}"]
    root = str(Path(__file__).resolve().parents[1])
    env = {**os.environ, "SCHEMATHESIS_HOOKS": "bench.fuzz_hooks",
           "PYTHONPATH": os.pathsep.join(filter(None, [root, os.environ.get("PYTHONPATH")]))}
    r = subprocess.run(argv, capture_output=True, text=True, cwd=workdir, timeout=900,
                       env=env)
    out = r.stdout + r.stderr
    found = re.search(r"(\d+) generated, (\d+) passed", out)
    return {"exit": r.returncode, "generated": int(found[1]) if found else 0,
            "passed": int(found[2]) if found else 0,
            "clean": not re.search(r"\d+ (failures?|errors?)\b", out), "output": out}


def small_store(root: Path, csv_src: Path, versions: int = 2) -> Path:
    """coating v1 … vN (the first 60 demo rows), v1 live."""
    csv = root / "small.csv"
    csv.write_text("\n".join(csv_src.read_text().splitlines()[:61]) + "\n")
    store = root / "store"
    for i in range(versions):
        opts = TrainOptions(data=str(csv), targets=["hardness_s", "gloss_gu"], name="coating",
                            kernel="rbf", gamma=0.2, ridge=0.1 * (i + 1), store=str(store),
                            quiet=True, report=False, release=(i == 0))
        train(opts, log=lambda *a, **k: None)
    return store


def served_env(root: Path, log: Path) -> dict[str, str]:
    """The fuzzed service's settings: admin on, small limits, the access log in ``log``."""
    return {"KRIDGE_ADMIN_TOKEN": TOKEN, "KRIDGE_MAX_ROWS": "50",
            "KRIDGE_MAX_BODY_BYTES": str(64 * 1024), "KRIDGE_POLL_SECONDS": "0.1",
            "PROMETHEUS_MULTIPROC_DIR": str(root / "metrics"), "KRIDGE_ACCESS_LOG": "-",
            "KRIDGE_TEST_LOG": str(log)}


def statuses(log: Path) -> list[int]:
    """Statuses from the JSON-lines access log (one object per request)."""
    return [int(m[1]) for m in re.finditer(r'"status":\s*(\d{3})', log.read_text())]
