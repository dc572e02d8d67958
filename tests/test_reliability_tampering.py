"""Tampered versions are refused at verify, release and load; the service keeps serving.

Each forgery starts from a good published version copied under a new number, then changes
it the way someone with write access to the store could: an array altered, the manifest
edited to point elsewhere, an array of dtype object (a pickle in disguise), a symbolic link
leading out of the store. The same run checks that neither logs nor error bodies show the
store's location or the admin token.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from make_coating_data import TYPICAL_ROW
from service_helpers import Gunicorn, metric_count, metric_samples, wait_for

from service import load_model
from service.store import Store, StoreError
from trainer.cli import main
from trainer.job import TrainOptions, train

TOKEN = "tamper-token-93be0c"
AUTH = {"Authorization": f"Bearer {TOKEN}"}


def _manifest(vdir: Path) -> dict:
    return json.loads((vdir / "manifest.json").read_text())


def _write_manifest(vdir: Path, m: dict) -> None:
    (vdir / "manifest.json").write_text(json.dumps(m))


def altered_array(vdir: Path, outside: Path) -> None:
    path = vdir / "arrays" / "dual.npy"
    raw = bytearray(path.read_bytes())
    raw[-5] ^= 0x40  # one bit of one coefficient
    path.write_bytes(bytes(raw))


def manifest_points_to_another_version(vdir: Path, outside: Path) -> None:
    m = _manifest(vdir)
    m["version"] = 1  # "I am version 1": a copy passed off under another number
    _write_manifest(vdir, m)


def manifest_points_outside(vdir: Path, outside: Path) -> None:
    target = outside / "dual.npy"
    shutil.copy(vdir / "arrays" / "dual.npy", target)
    m = _manifest(vdir)
    m["arrays"]["../../../../../" + str(outside.name) + "/dual"] = m["arrays"].pop("dual")
    _write_manifest(vdir, m)


class Canary:
    """Unpickling this creates ``path``: proof that a load ran pickle."""

    def __init__(self, path):
        self.path = str(path)

    def __reduce__(self):
        return (open, (self.path, "w"))


def object_array(vdir: Path, outside: Path) -> None:
    path = vdir / "arrays" / "dual.npy"
    shape = np.load(path).shape
    payload = np.empty(shape, dtype=object)
    payload[:] = Canary(outside / "pickle-ran")
    np.save(path, payload)  # numpy's default writes the objects as a pickle: the forgery
    m = _manifest(vdir)  # a forger who also fixes the checksum
    m["arrays"]["dual"]["sha256"] = hashlib.sha256(path.read_bytes()).hexdigest()
    _write_manifest(vdir, m)


def symlink_out_of_store(vdir: Path, outside: Path) -> None:
    # the same bytes, so the checksum holds: only the link itself gives it away
    target = outside / "x_train.npy"
    shutil.copy(vdir / "arrays" / "x_train.npy", target)
    (vdir / "arrays" / "x_train.npy").unlink()
    (vdir / "arrays" / "x_train.npy").symlink_to(target)


def version_dir_is_a_symlink(vdir: Path, outside: Path) -> None:
    copy = outside / "whole-version"
    shutil.copytree(vdir, copy)
    shutil.rmtree(vdir)
    vdir.symlink_to(copy, target_is_directory=True)


FORGERIES = {
    "altered array": (altered_array, "'dual' fails its checksum"),
    "manifest names another version": (manifest_points_to_another_version,
                                       "names another model or version"),
    "manifest points outside": (manifest_points_outside, "invalid array name"),
    "object array": (object_array, "'dual'"),
    "array symlinked outside": (symlink_out_of_store, "symbolic link"),
    "version symlinked outside": (version_dir_is_a_symlink, "symbolic link"),
}


@pytest.fixture(scope="module")
def forged(tmp_path_factory, demo_csv):
    """coat v1 (good, live) and one forged version per kind, v2 … v7."""
    base = tmp_path_factory.mktemp("tamper")
    root, outside = base / "store", base / "outside"
    outside.mkdir()
    csv = base / "small.csv"
    csv.write_text("\n".join(demo_csv.read_text().splitlines()[:61]) + "\n")
    opts = TrainOptions(data=str(csv), targets=["hardness_s", "gloss_gu"], name="coat",
                        kernel="rbf", gamma=0.2, ridge=0.5, store=str(root), quiet=True,
                        report=False)
    assert train(opts, log=lambda *a, **k: None)["version"] == 1
    st = Store(root)
    st.release("coat", 1)
    numbers = {}
    for number, (kind, (forge, _)) in enumerate(FORGERIES.items(), start=2):
        vdir = root / "coat" / "versions" / str(number)
        shutil.copytree(root / "coat" / "versions" / "1", vdir)
        m = _manifest(vdir)
        m["version"] = number
        _write_manifest(vdir, m)
        forge(vdir, outside)
        numbers[kind] = number
    return root, outside, numbers


def _cli(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


@pytest.mark.parametrize("kind", FORGERIES)
def test_forgery_is_refused_at_verify_release_and_load(forged, kind, capsys):
    root, outside, numbers = forged
    v, message = numbers[kind], FORGERIES[kind][1]
    code, out, err = _cli(capsys, "verify", "coat", v, "--store", root)
    assert code == 1 and f"coat v{v}: FAULT" in err and message in err, err
    code, out, err = _cli(capsys, "release", "coat", v, "--store", root)
    assert code == 2 and message in err and len(err.strip().splitlines()) == 1
    assert Store(root).live_version("coat") == 1
    with pytest.raises(StoreError, match=message.replace("'", ".")):
        load_model(root, "coat", v)
    assert not (outside / "pickle-ran").exists()


def every_worker_serving(g, metrics_dir: Path, workers: int, row=TYPICAL_ROW,
                         model="coat", seconds: float = 60.0) -> None:
    """Predict until every worker has answered one (each writes its own metrics file)."""
    def all_answered() -> bool:
        r = g.post(f"/models/{model}/predict", json={"rows": [row]})
        pids = {p.stem.rsplit("_", 1)[-1] for p in metrics_dir.glob("counter_*.db")}
        return r.status_code == 200 and len(pids) >= workers

    wait_for(all_answered, seconds, f"every one of {workers} workers serving {model}",
             interval=0.05)


def test_service_keeps_serving_counts_and_logs_every_refusal(forged, tmp_path):
    root, outside, numbers = forged
    log_path = tmp_path / "service.log"
    env = {"KRIDGE_ADMIN_TOKEN": TOKEN, "KRIDGE_POLL_SECONDS": "0.1",
           "PROMETHEUS_MULTIPROC_DIR": str(tmp_path / "metrics"),
           "KRIDGE_TEST_LOG": str(log_path), "KRIDGE_ACCESS_LOG": "-"}
    live = root / "coat" / "live.json"
    good = live.read_bytes()
    bodies = []
    with Gunicorn(root, workers=2, env=env) as g:
        every_worker_serving(g, tmp_path / "metrics", 2)
        for kind, v in numbers.items():
            # the admin route refuses it: 409, the store untouched
            r = g.post("/models/coat/release", json={"version": v}, headers=AUTH)
            assert r.status_code == 409, (kind, r.text)
            bodies.append(r.text)
            assert Store(root).live_version("coat") == 1
            # another tool points live.json at it anyway: every worker keeps version 1
            tmp = live.with_name(".live.forged")
            tmp.write_text(json.dumps({"version": v, "since": "now", "previous": 1}))
            tmp.replace(live)
            # both workers have acted on the forged pointer once each has refused it
            wait_for(lambda v=v: metric_count(metric_samples(g.get("/metrics").text),
                                              "kridge_load_failures_total", version=str(v)) >= 2,
                     what=f"both workers to refuse version {v}")
            for _ in range(12):
                p = g.post("/models/coat/predict", json={"rows": [TYPICAL_ROW]})
                assert p.status_code == 200 and p.headers["X-Model-Version"] == "1", (kind, p.text)
            ready = g.get("/readyz")
            assert ready.status_code == 503 and f"version {v}" in ready.json()["problems"]["coat"]
            bodies.append(ready.text)
            tmp.write_bytes(good)
            tmp.replace(live)
        wait_for(lambda: all(g.get("/readyz").status_code == 200 for _ in range(8)),
                 what="every worker ready on version 1 again")
        samples = metric_samples(g.get("/metrics").text)
        for v in numbers.values():
            # both workers refused it (each loads on its own)
            assert metric_count(samples, "kridge_load_failures_total", version=str(v)) == 2, v
        assert metric_count(samples, "kridge_errors_total", code="version_refused") == len(numbers)
        bodies += [g.post("/models/coat/rollback", headers={"Authorization": "Bearer x"}).text,
                   g.post("/models/nosuch/predict", json={"rows": [[1]]}).text,
                   g.get("/models/nosuch/versions").text,
                   g.post("/models/coat/predict", data=b"{", headers={
                       "Content-Type": "application/json"}).text]
    log = log_path.read_text()
    for kind, v in numbers.items():
        assert f"model coat: live version {v} refused: " in log, kind
    # no secrets, no store location anywhere a client or a log reader sees
    for text in [log, *bodies]:
        assert TOKEN not in text
        assert str(root) not in text and str(root.resolve()) not in text
        assert str(outside) not in text
