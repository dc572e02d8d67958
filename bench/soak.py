"""Release churn under load: clients predict without pause while the live version changes.

Changes alternate between the command line and the admin route, releases and rollbacks.
Every response is checked against the timeline of changes:

- failed: anything but a 200 (including a reset or refused connection);
- stale: a response naming a version that was not live at any moment between ``follow``
  seconds before the request started and its end (so: never a version that was not live,
  and after ``follow`` seconds only the new one);
- follow lag per change: from the start of the change to the start of the last request that
  still got an older version; its maximum must stay below ``follow``.

    python bench/soak.py [--clients 16] [--seconds 20] [--changes 20] [--workers 2]

The short form runs in ``make test`` (tests/test_reliability_churn.py). The machine may be
shared: the figures are counts and lags, not speeds.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import requests

ROOT = Path(__file__).resolve().parents[1]
ROW = {"oven_temp_c": 190.0, "line_speed_m_min": 22.0, "wet_film_um": 60.0,
       "humidity_pct": 45.0, "viscosity_mpas": 600.0}


@dataclass
class Change:
    how: str  # "cli release", "admin rollback", ...
    start: float
    end: float
    version: int


@dataclass
class Churn:
    requests: int = 0
    failed: int = 0
    stale: int = 0
    changes: list[Change] = field(default_factory=list)
    max_lag: float = 0.0
    versions_seen: set = field(default_factory=set)
    failures: list[str] = field(default_factory=list)

    def figures(self) -> dict:
        return {"requests": self.requests, "failed": self.failed, "stale": self.stale,
                "changes": len(self.changes),
                "by": sorted({c.how for c in self.changes}),
                "max_follow_lag_s": round(self.max_lag, 3),
                "versions_seen": sorted(self.versions_seen)}


def _client(base: str, model: str, stop: threading.Event, out: list) -> None:
    session = requests.Session()
    body = json.dumps({"rows": [ROW]})
    headers = {"Content-Type": "application/json"}
    while not stop.is_set():
        t0 = time.monotonic()
        try:
            r = session.post(f"{base}/models/{model}/predict", data=body, headers=headers,
                             timeout=30)
            version = int(r.headers.get("X-Model-Version", 0))
            out.append((t0, time.monotonic(), r.status_code, version, "" if r.ok else r.text))
        except requests.RequestException as exc:
            out.append((t0, time.monotonic(), 0, 0, repr(exc)))


def _cli(store: Path, *argv: str, in_process: bool) -> dict:
    """A change through the command line; returns the new live version."""
    if in_process:
        from trainer.cli import main

        assert main([*argv, "--store", str(store)]) == 0
    else:
        r = subprocess.run([sys.executable, "-m", "trainer.cli", *argv, "--store", str(store)],
                           capture_output=True, text=True, timeout=120, cwd=ROOT)
        assert r.returncode == 0, r.stderr
    from service.store import Store

    return {"version": Store(store).live_version(argv[1])}


def _admin(base: str, token: str, model: str, action: str, version: int | None) -> dict:
    r = requests.post(f"{base}/models/{model}/{action}", timeout=30,
                      json=None if version is None else {"version": version},
                      headers={"Authorization": f"Bearer {token}"})
    assert r.status_code == 200, r.text
    return r.json()


def run_churn(base: str, store: Path, token: str, model: str, versions: list[int],
              clients: int, seconds: float, changes: int, follow: float = 1.0,
              cli_in_process: bool = False) -> Churn:
    """Load ``base`` with ``clients`` for ``seconds`` while making ``changes`` live changes.

    ``versions`` must all be released-able; the first is assumed live at the start.
    """
    from service.store import Store

    live = Store(store).live_version(model)
    stop = threading.Event()
    results: list[list] = [[] for _ in range(clients)]
    threads = [threading.Thread(target=_client, args=(base, model, stop, results[i]),
                                daemon=True) for i in range(clients)]
    t_begin = time.monotonic()
    timeline = [Change("initial", t_begin - 3600, t_begin - 3600, live)]
    for t in threads:
        t.start()
    spacing = seconds / (changes + 1)
    others = [v for v in versions if v != live]
    for k in range(changes):
        time.sleep(max(0.0, t_begin + (k + 1) * spacing - time.monotonic()))
        via_cli = k % 2 == 0
        rollback = k % 4 in (2, 3)  # two releases, then two rollbacks (CLI and admin)
        if not rollback:
            target = others[k % len(others)] if others else live
            if target == timeline[-1].version:
                target = next(v for v in versions if v != target)
        start = time.monotonic()
        if rollback:
            rec = (_cli(store, "rollback", model, in_process=cli_in_process) if via_cli
                   else _admin(base, token, model, "rollback", None))
        else:
            rec = (_cli(store, "release", model, str(target), in_process=cli_in_process)
                   if via_cli else _admin(base, token, model, "release", target))
        how = f"{'cli' if via_cli else 'admin'} {'rollback' if rollback else 'release'}"
        timeline.append(Change(how, start, time.monotonic(), int(rec["version"])))
    time.sleep(max(0.0, t_begin + seconds - time.monotonic()))
    stop.set()
    for t in threads:
        t.join(timeout=60)
    return judge([r for rs in results for r in rs], timeline, follow)


def judge(responses: list, timeline: list[Change], follow: float) -> Churn:
    """Check every response against the timeline (see the module notes)."""
    out = Churn(changes=timeline[1:])
    # version k may be live from the start of its change to the end of the next one
    windows = [(c.version, c.start, timeline[i + 1].end if i + 1 < len(timeline) else
                float("inf")) for i, c in enumerate(timeline)]
    lags = [0.0] * len(timeline)
    for t0, t1, status, version, err in responses:
        out.requests += 1
        if status != 200:
            out.failed += 1
            if len(out.failures) < 5:
                out.failures.append(f"{status}: {err[:200]}")
            continue
        out.versions_seen.add(version)
        if not any(v == version and s <= t1 and t0 - follow <= e for v, s, e in windows):
            out.stale += 1
            if len(out.failures) < 5:
                out.failures.append(f"stale: version {version} for a request at {t0:.3f}")
        # the change in force when this request started: was it followed, or is the answer
        # from a change made during the request (ahead, which is fine)?
        k = max(i for i, c in enumerate(timeline) if c.end <= t0)
        ahead = any(c.version == version and c.start <= t1 for c in timeline[k + 1:])
        if k > 0 and version != timeline[k].version and not ahead:
            lags[k] = max(lags[k], t0 - timeline[k].start)
    out.max_lag = max(lags)
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--clients", type=int, default=16)
    ap.add_argument("--seconds", type=float, default=20.0)
    ap.add_argument("--changes", type=int, default=20)
    ap.add_argument("--workers", type=int, default=2)
    args = ap.parse_args()
    sys.path.insert(0, str(ROOT))
    import tempfile

    from bench.machine import header

    print(header("soak: release churn under load"))

    from service.launch import Gunicorn
    from trainer.job import TrainOptions, train

    token = "soak-token"
    with tempfile.TemporaryDirectory(prefix="kridge-soak-") as tmp:
        store = Path(tmp) / "store"
        csv = Path(tmp) / "small.csv"
        lines = (ROOT / "demo_data" / "coating_line.csv").read_text().splitlines()[:121]
        csv.write_text("\n".join(lines) + "\n")
        for i in range(4):
            train(TrainOptions(data=str(csv), targets=["hardness_s", "gloss_gu"],
                               name="coating", kernel="rbf", gamma=0.2, ridge=0.1 * (i + 1),
                               store=str(store), quiet=True, report=False, release=(i == 0)),
                  log=lambda *a, **k: None)
        env = {"KRIDGE_ADMIN_TOKEN": token, "PROMETHEUS_MULTIPROC_DIR": str(Path(tmp) / "m")}
        with Gunicorn.on_free_port(store, args.workers, cwd=str(ROOT), env=env) as g:
            time.sleep(2.0)  # every worker up
            res = run_churn(g.base, store, token, "coating", [1, 2, 3, 4], args.clients,
                            args.seconds, args.changes)
    figures = res.figures()
    print(f"soak: {args.clients} clients x {args.seconds:g} s, {args.workers} workers, "
          f"poll 0.25 s (default), shared machine")
    print(json.dumps(figures, indent=2))
    for f in res.failures:
        print("  ", f)
    ok = res.failed == 0 and res.stale == 0 and res.max_lag < 1.0
    print("PASS" if ok else "FAIL")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
