"""``kridge demo``: demo data → train → release → serve, with example calls printed.

``--smoke`` makes the example calls itself, prints the answers and exits 0 (tests use it).
"""

from __future__ import annotations

import importlib.util
import json
import os
import signal
import socket
import sys
import tempfile
import urllib.error
import urllib.request
from pathlib import Path

from service.cautions import BEFORE_ACTING
from service.launch import Gunicorn, free_port
from service.store import store_root
from trainer.demo_story import story_lines
from trainer.errors import UserError

DEMO_DIR = Path(__file__).resolve().parents[1] / "demo_data"
MODEL = "coating"
TARGETS = ["hardness_s", "gloss_gu"]
#: Pendulum seconds and gloss units are never negative; neither has a physical upper bound
#: the demo could state, so only the lower one is given.
TARGET_RANGE = "0:,0:"


def _generator():
    path = DEMO_DIR / "make_coating_data.py"
    if not path.exists():
        raise UserError(f"demo data generator not found at {path}; run from a source checkout")
    spec = importlib.util.spec_from_file_location("make_coating_data", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def port_free(host: str, port: int) -> bool:
    with socket.socket() as s:
        try:
            s.bind((host, port))
        except OSError:
            return False
    return True


def post(base: str, path: str, body: dict) -> tuple[int, dict]:
    req = urllib.request.Request(base + path, data=json.dumps(body).encode(),
                                 headers={"Content-Type": "application/json"})
    try:
        with urllib.request.urlopen(req, timeout=10) as r:
            return r.status, json.loads(r.read())
    except urllib.error.HTTPError as exc:
        return exc.code, json.loads(exc.read())


def run_demo(store: str | None = None, bind: str | None = None, smoke: bool = False) -> int:
    from trainer.job import TrainOptions, train

    gen = _generator()
    store = os.path.abspath(store_root(store))
    if bind is None:
        bind = f"127.0.0.1:{free_port()}" if smoke else (
            os.environ.get("KRIDGE_BIND") or "127.0.0.1:8000")
    host, _, port = bind.rpartition(":")
    if not port.isdigit() or not port_free(host or "127.0.0.1", int(port)):
        raise UserError(f"cannot listen on {bind}: address in use or invalid; "
                        "pass --bind 127.0.0.1:PORT")

    base = f"http://{bind}"
    # the first line: where a person looks once the service is up
    print(f"Page for people: {base}/  (models, versions, history, try a row; up after 3/3)",
          flush=True)
    with tempfile.TemporaryDirectory() as tmp:
        csv_path = Path(tmp) / "coating_line.csv"
        gen.write_csv(csv_path, gen.generate())
        print(f"1/3 demo data: {csv_path.name}, 2000 rows of a coating line's process readings")
        print("2/3 training (kernel parameters tuned by leave-one-out; hardness and gloss "
              "cannot be negative: --target-range 0:,0:) ...", flush=True)
        summary = train(TrainOptions(data=str(csv_path), targets=TARGETS, name=MODEL,
                                     release=True, store=store, quiet=True,
                                     target_range=TARGET_RANGE))
    print(f"    {MODEL} v{summary['version']} is live: {summary['kernel']}, "
          f"ridge {summary['ridge_text']}, {summary['seconds']} s")
    for t, m in summary["metrics"].get("holdout", {}).items():
        print(f"    holdout {t}: RMSE {m['rmse']:.3g}, R² {m['r2']:.3f}")

    server = Gunicorn(bind, 2, store).start()
    try:
        try:
            server.wait_ready()
        except RuntimeError as exc:
            raise UserError(str(exc)) from None
        inside = {"rows": [gen.TYPICAL_ROW], "coverage": 0.9}
        outside = {"rows": [gen.EMPTY_REGION_ROW, dict(gen.TYPICAL_ROW, oven_temp_c=245.0)],
                   "coverage": 0.9}
        print(f"3/3 serving on {base} (store {store})\n")
        print(f"# in a browser: {base}/  and  {base}/page/{MODEL}\n")
        for label, body in (("a typical operating point", inside),
                            ("the never-run region and a too-hot oven: each envelope's "
                             "flagged_by names the checks that flagged it, and "
                             "interval_calibrated is false", outside)):
            print(f"# {label}:")
            print(f"curl -s -X POST {base}/models/{MODEL}/predict "
                  f"-H 'Content-Type: application/json' -d '{json.dumps(body)}'\n")
        print(f"# more: {base}/models/{MODEL}  {base}/metrics  {base}/openapi.json\n")
        print("\n".join(story_lines(DEMO_DIR, MODEL, store, TARGETS)) + "\n")
        print(f"# Caution: {BEFORE_ACTING}\n")
        if smoke:
            with urllib.request.urlopen(base + "/", timeout=10) as r:
                print(f"page {base}/: HTTP {r.status}, {MODEL} listed: "
                      f"{f'>{MODEL}</a>' in r.read().decode()}")
            for body in (inside, outside):
                status, answer = post(base, f"/models/{MODEL}/predict", body)
                print(f"HTTP {status}: {json.dumps(answer)}")
                if status != 200:
                    return 1
            return 0
        print("Serving until Ctrl-C.", flush=True)
        # a service manager stops us with SIGTERM: leave through `finally` so gunicorn ends too
        signal.signal(signal.SIGTERM, lambda *_: sys.exit(0))
        return server.proc.wait() or 0
    except KeyboardInterrupt:
        return 0
    finally:
        server.stop(grace=15)
        sys.stdout.flush()
