"""What drift while serving and a shadow version cost the caller: ``http_bench.py --traffic``.

Three configurations of our service on the same 20,000-row exact rbf model, in alternating
rounds under the same single-row load (wrk when installed):

- off: drift sampling off (``KRIDGE_DRIFT_SECONDS=0``), no shadow;
- drift: rows sampled on the request path, a background MMD test every 2 s per worker (a
  test 30 times as often as the default 60 s, so that several fall inside each run);
- shadow: drift off, a second 20,000-row exact version as the shadow: every request is
  predicted twice, the second time after the answer, on the worker's shadow thread.

Printed: each configuration's best figures and the ratios to "off", round by round and as
the median of the rounds. The shadow doubles the CPU per request, so at saturation (more
clients than cores) requests/s falls; its effect on the caller's latency is what the p50 and
p99 ratios at a load below saturation show (``--clients 1``). The shadow works only while
a worker is idle (service/idle.py), so each shadow run also prints how many requests it
scored and how many the full queue left unscored.

    python bench/http_bench.py --traffic [--seconds 8] [--rounds 3] [--clients 1|4]
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
import urllib.request

import numpy as np

from bench.http_bench import (
    N_FEATURES,
    ROOT,
    WORK,
    best_figures,
    ensure_wrk,
    make_model,
    measure,
)
from bench.machine import header, save
from service.store import Store

CONFIGS = {
    "off": {"KRIDGE_DRIFT_SECONDS": "0"},
    "drift": {"KRIDGE_DRIFT_SECONDS": "2"},
    "shadow": {"KRIDGE_DRIFT_SECONDS": "0"},
}


def shadow_version(store) -> int:
    """A second exact version of the bench model (trained once, cached), not live."""
    st = Store(store)
    others = [v for v in st.versions("bench") if v != st.live_version("bench")]
    if others:
        return others[-1]
    print("training the shadow version once ...", flush=True)
    subprocess.run([sys.executable, "-m", "trainer.cli", "train", str(WORK / "bench_train.csv"),
                    "--target", "y", "--name", "bench", "--method", "exact", "--kernel", "rbf",
                    "--gamma", "0.04", "--ridge", "0.5", "--holdout", "0", "--no-report",
                    "--store", str(store)], check=True)
    return shadow_version(store)


def shadow_counts(g) -> dict:
    """Requests the shadow scored (one row each) and dropped, all workers, from /metrics."""
    with urllib.request.urlopen(g.base + "/metrics", timeout=30) as r:
        text = r.read().decode()

    def total(name: str) -> float:
        return sum(float(m.group(1)) for m in re.finditer(
            rf'^{name}{{model="bench"}} (\S+)$', text, re.M))

    return {"shadowed": total("kridge_shadow_rows_total"),
            "dropped": total("kridge_shadow_dropped_total")}


def run_traffic(args) -> None:
    print(header("traffic bench: drift sampling and a shadow version, on and off"))
    WORK.mkdir(parents=True, exist_ok=True)
    store = WORK / "store-exact"
    make_model(store)
    version = shadow_version(store)
    st = Store(store)
    st.end_shadow("bench")
    row = np.random.default_rng(1).uniform(-0.5, 0.5, N_FEATURES).round(4).tolist()
    body = json.dumps({"rows": [row]}).encode()
    use_wrk = ensure_wrk(not args.no_install)
    print(f"load generator: {'wrk' if use_wrk else 'bench/loadgen.py'}, {args.clients} "
          f"concurrent clients, {args.seconds:.0f} s per run, {args.workers} workers, "
          f"{args.rounds} rounds; shadow: version {version}")
    seen: dict[str, list[dict]] = {label: [] for label in CONFIGS}
    try:
        for rnd in range(args.rounds):
            for label, env in CONFIGS.items():
                if label == "shadow":
                    st.set_shadow("bench", version)
                try:
                    res = measure(ROOT, "service.wsgi:app", store, body, args, use_wrk, env,
                                  shadow_counts if label == "shadow" else None)
                finally:
                    st.end_shadow("bench")
                print(f"  round {rnd + 1} {label:7s} {res['rps']:8.0f} req/s  p50 "
                      f"{res['p50_ms']:6.2f} ms  p99 {res['p99_ms']:6.2f} ms  worker CPU "
                      f"{res['cpu_us']:5.0f} µs/req  errors {res['errors']}"
                      + (f"  shadowed {res['shadowed']:.0f}, not shadowed (queue full) "
                         f"{res['dropped']:.0f} requests" if "shadowed" in res else ""),
                      flush=True)
                seen[label].append(res)
    finally:
        st.end_shadow("bench")
    best = {label: best_figures(runs) for label, runs in seen.items()}
    print(f"\n{'config':8s} {'req/s':>8s} {'p50 ms':>8s} {'p99 ms':>8s} {'CPU µs/req':>11s}")
    for label, res in best.items():
        print(f"{label:8s} {res['rps']:8.0f} {res['p50_ms']:8.2f} {res['p99_ms']:8.2f} "
              f"{res['cpu_us']:11.0f}")
    ratios = {}
    for label in ("drift", "shadow"):
        for key in ("rps", "p50_ms", "p99_ms"):
            by_round = [o[key] / b[key] for o, b in zip(seen[label], seen["off"], strict=True)]
            ratios[f"{label}/{key}"] = by_round
        print(f"{label} / off, round by round (median): " + "; ".join(
            f"{key} {', '.join(f'{r:.2f}' for r in ratios[f'{label}/{key}'])} "
            f"({float(np.median(ratios[f'{label}/{key}'])):.2f})"
            for key in ("rps", "p50_ms", "p99_ms")))
    save(args.json, f"traffic-{args.clients}", {
        "clients": args.clients, "workers": args.workers, "seconds": args.seconds,
        "best": best, "ratios_by_round": ratios})
