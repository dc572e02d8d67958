"""``kridge shadow`` and the shadow pointer in the store (service/store/shadowing.py), and
the shadow queue's bound (service/shadow.py)."""

from __future__ import annotations

import json

import pytest
from cli_helpers import run_cli
from make_coating_data import TYPICAL_ROW
from prometheus_client import REGISTRY
from service_helpers import small_model_store

from service.model import load_model
from service.shadow import ShadowRunner, ShadowSlot
from service.store import Store
from trainer.cli import main


@pytest.fixture
def store(tmp_path, demo_csv):
    path = small_model_store(tmp_path, demo_csv)
    for ridge in ("0.1", "0.05"):  # versions 2 and 3, not live
        assert main(["train", str(tmp_path / "small.csv"), "--name", "c", "--store",
                     str(path), "--target", "hardness_s", "--features", ",".join(TYPICAL_ROW),
                     "--gamma", "0.3", "--ridge", ridge, "--no-report", "--quiet"]) == 0
    return path


def test_shadow_on_status_off(capsys, store):
    code, out, _ = run_cli(capsys, "shadow", "c", "2", "--store", store)
    assert code == 0 and "version 2 is the shadow" in out
    entry = json.loads((store / "c" / "shadow.json").read_text())
    assert (entry["version"], entry["live"]) == (2, 1)
    code, out, _ = run_cli(capsys, "shadow", "c", "3", "--store", store)
    assert code == 0 and "(was version 2)" in out
    code, out, _ = run_cli(capsys, "shadow", "c", "--store", store)
    assert code == 0 and "version 3 is the shadow" in out
    code, out, _ = run_cli(capsys, "shadow", "c", "--off", "--store", store)
    assert code == 0 and "was version 3" in out
    assert not (store / "c" / "shadow.json").exists()
    code, out, _ = run_cli(capsys, "shadow", "c", "--off", "--store", store)
    assert code == 0 and "none was named" in out
    history = Store(store).history("c")  # the shadow records read as a sound history
    assert [(h["action"], h["version"], h["previous"]) for h in history[-3:]] == [
        ("shadow", 2, None), ("shadow", 3, 2), ("shadow_off", 3, None)]
    # rollback's replay ignores them: nothing earlier than version 1 was live
    code, _, err = run_cli(capsys, "rollback", "c", "--store", store)
    assert code == 2 and "nothing earlier" in err


@pytest.mark.parametrize("argv, says", [
    (["shadow", "Bad/Name", "2"], "model name"),
    (["shadow", "nope", "2"], "nope"),
    (["shadow", "c", "9"], "no version 9"),
    (["shadow", "c", "two"], "version"),
    (["shadow", "c", "0"], "version"),
    (["shadow", "c", "1"], "live version"),
    (["shadow", "c", "2", "--off"], "not both"),
])
def test_bad_names_and_versions_exit_2_with_one_line(capsys, store, argv, says):
    code, out, err = run_cli(capsys, *argv, "--store", store)
    assert code == 2, (out, err)
    assert len(err.strip().splitlines()) == 1 and says in err, err
    assert "Traceback" not in err
    assert not (store / "c" / "shadow.json").exists()


def test_a_damaged_version_is_refused_before_it_is_named(capsys, store):
    dual = store / "c" / "versions" / "2" / "arrays" / "dual.npy"
    dual.write_bytes(dual.read_bytes()[:-8] + b"\0" * 8)
    code, _, err = run_cli(capsys, "shadow", "c", "2", "--store", store)
    assert code == 2 and "checksum" in err
    assert not (store / "c" / "shadow.json").exists()


def test_a_full_queue_drops_and_counts_without_waiting(store):
    live, shadow = load_model(store, "c", 1), load_model(store, "c", 2)
    runner = ShadowRunner(Store(store), models=None, queue_size=1)
    runner.slots["c"] = ShadowSlot(wanted=2, model=shadow)

    def dropped() -> float:
        return REGISTRY.get_sample_value("kridge_shadow_dropped_total", {"model": "c"}) or 0

    start = dropped()
    rows = [list(TYPICAL_ROW.values())]
    results = [{"value": float(live.predict(rows)[0])}]
    for _ in range(3):  # no thread takes the queue: the first waits, two are dropped
        runner.offer("c", live, rows, None, results, "r", 0.0)
    assert runner.queue.qsize() == 1 and dropped() == start + 2
    runner.score(runner.queue.get_nowait())  # the one queued is scored as usual
    assert runner.done == 1
