"""Several independent service instances on one store behave as one.

Each instance is its own gunicorn (own port, own master, one worker) as separate replicas
would be; they share nothing but the store directory. Waits poll with a deadline.
"""

from __future__ import annotations

import json
import time
from contextlib import ExitStack

from cli_helpers import kridge
from make_coating_data import TYPICAL_ROW
from service_helpers import Gunicorn

from service.store import Store
from trainer.cli import main

ARGS = ["--target", "hardness_s", "--features", ",".join(TYPICAL_ROW), "--gamma", "0.2",
        "--no-report", "--quiet"]
#: The service's promise: every replica follows a change of live.json within a second.
FOLLOW_SECONDS = 1.0


def version_served(g: Gunicorn) -> int:
    r = g.post("/models/c/predict", json={"rows": [TYPICAL_ROW]})
    assert r.status_code == 200, r.text
    return int(r.headers["X-Model-Version"])


def all_follow(replicas, check, seconds: float = FOLLOW_SECONDS) -> dict[int, float]:
    """Poll every replica until ``check(replica)`` holds; seconds each took (or fail)."""
    start = time.monotonic()
    took: dict[int, float] = {}
    while len(took) < len(replicas):
        for i, g in enumerate(replicas):
            if i not in took and check(g):
                took[i] = time.monotonic() - start
        late = time.monotonic() - start > seconds
        assert not late or len(took) == len(replicas), (
            f"replicas {sorted(set(range(len(replicas))) - set(took))} did not follow within "
            f"{seconds} s (the others took {took})")
        time.sleep(0.01)
    return took


def not_ready_because_of_c(g: Gunicorn) -> bool:
    r = g.get("/readyz")
    return r.status_code == 503 and "c" in r.json()["problems"]


def test_replicas_sharing_a_store_follow_rollback_refuse_corruption_and_join(tmp_path,
                                                                            small_csv):
    store_dir = tmp_path / "store"
    for ridge in ("0.5", "1.0"):  # v1, then v2 live
        assert main(["train", str(small_csv), "--name", "c", "--release", "--ridge", ridge,
                     "--store", str(store_dir), *ARGS]) == 0
    store = Store(store_dir)
    with ExitStack() as stack:
        replicas = [stack.enter_context(Gunicorn(store_dir, workers=1)) for _ in range(2)]
        assert [version_served(g) for g in replicas] == [2, 2]

        # `kridge rollback` from another process: every replica follows
        r = kridge("rollback", "c", store=store_dir, timeout=120)
        assert r.returncode == 0, r.stderr
        assert store.live_version("c") == 1
        all_follow(replicas, lambda g: version_served(g) == 1)

        # a replica started mid-way serves the live version (not the newest) at once
        late = stack.enter_context(Gunicorn(store_dir, workers=1))
        first = late.get("/readyz")
        assert first.status_code == 200 and first.json()["models"] == {"c": 1}
        assert version_served(late) == 1
        replicas.append(late)

        # a corrupt version: the command line refuses to release it ...
        assert main(["train", str(small_csv), "--name", "c", "--ridge", "2.0",
                     "--store", str(store_dir), *ARGS]) == 0
        bad = 3
        arr = store.version_dir("c", bad) / "arrays" / "dual.npy"
        raw = bytearray(arr.read_bytes())
        raw[-1] ^= 0x01
        arr.write_bytes(bytes(raw))
        r = kridge("release", "c", bad, store=store_dir, timeout=120)
        assert r.returncode != 0 and store.live_version("c") == 1
        # ... and when another tool points live.json at it anyway, every replica refuses it,
        # says so on /readyz and keeps serving the last good version
        live = store.model_dir("c") / "live.json"
        good = live.read_text()
        tmp = live.with_name("live.json.edit")
        tmp.write_text(json.dumps({**json.loads(good), "version": bad}))
        tmp.replace(live)
        all_follow(replicas, not_ready_because_of_c)
        assert [version_served(g) for g in replicas] == [1, 1, 1]

        # the operator repairs the pointer: all ready again, on the good version
        tmp.write_text(good)
        tmp.replace(live)
        all_follow(replicas, lambda g: g.get("/readyz").status_code == 200)
        assert [version_served(g) for g in replicas] == [1, 1, 1]
