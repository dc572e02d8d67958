"""The model store: round trip, faults, no pickle, concurrent publishing, release/rollback.

Reference for the layout and rules: service/store/ and the README, "Concepts". The fault
tests damage a published version the way a disk, a crash or a hostile file would, then check that
``kridge verify`` names the fault and that ``load_model`` refuses it, while the neighbouring
version stays usable.
"""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
from pathlib import Path

import numpy as np
import pytest
from cli_helpers import KRIDGE, run_cli

from service import load_model
from service.kernels import KernelSpec
from service.model import verify
from service.store import SCHEMA, NotFound, Store, StoreError, check_name, check_version
from trainer.exact.fit import fit_exact
from trainer.job import TrainOptions, train
from trainer.read.columns import read_table, split_columns

TARGETS = ["hardness_s", "gloss_gu"]



def publish(store_dir, data, name="coat", targets=TARGETS, **kw):
    opts = TrainOptions(data=str(data), targets=targets, name=name, kernel="rbf", gamma=0.2,
                        ridge=0.5, store=str(store_dir), quiet=True, report=False, **kw)
    return train(opts, log=lambda *a, **k: None)["version"]


def vdir(store_dir, version, name="coat"):
    return store_dir / name / "versions" / str(version)


# -- round trip -----------------------------------------------------------------------------

def test_round_trip_predictions_are_identical(store_dir, small_csv):
    table = read_table(small_csv)
    features, x, y = split_columns(table, TARGETS, None)
    in_memory = fit_exact(x, y, KernelSpec("rbf", gamma=0.2), 0.5)
    version = publish(store_dir, small_csv)
    model = load_model(store_dir, "coat", version)
    q = x[:20] * 1.01
    # the bundle stores the very numbers the fit produced (exact equality of the arrays
    # below); serving folds the standardization, the distance terms and the intercept into
    # its matrix products, so its predictions agree with the fit's to rounding
    want = in_memory.predict(q)
    np.testing.assert_allclose(model.predict(q), want, rtol=1e-13,
                               atol=1e-13 * np.max(np.abs(want)))
    assert model.features == features
    st = Store(store_dir)
    arrays = st.load_arrays("coat", version, st.read_manifest("coat", version))
    assert np.array_equal(arrays["dual"], in_memory.dual)
    assert np.array_equal(arrays["x_train"], in_memory.x_s)
    # read into the process, not mapped: a file changed in place cannot reach it
    assert not isinstance(arrays["x_train"], np.memmap)
    assert not arrays["x_train"].flags.writeable


def test_manifest_holds_what_the_readme_describes(store_dir, small_csv):
    version = publish(store_dir, small_csv)
    m = json.loads((vdir(store_dir, version) / "manifest.json").read_text())
    for key in ("schema", "model", "version", "created", "features", "targets", "kernel",
                "ridge", "standardization", "intercept", "training", "metrics", "envelope",
                "libraries", "arrays"):
        assert key in m, key
    assert m["schema"] == SCHEMA and m["model"] == "coat" and m["version"] == version
    assert m["training"]["data_sha256"] == hashlib.sha256(small_csv.read_bytes()).hexdigest()
    assert m["training"]["rows"] == 60
    for name, meta in m["arrays"].items():
        path = vdir(store_dir, version) / "arrays" / f"{name}.npy"
        assert meta["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()


# -- faults ---------------------------------------------------------------------------------

@pytest.fixture
def two_versions(store_dir, small_csv):
    assert publish(store_dir, small_csv) == 1
    assert publish(store_dir, small_csv) == 2
    return store_dir


def flip_last_byte(path: Path) -> None:
    raw = bytearray(path.read_bytes())
    raw[-1] ^= 0x01
    path.write_bytes(bytes(raw))


def _rewrite_manifest(store_dir, version, change):
    path = vdir(store_dir, version) / "manifest.json"
    m = json.loads(path.read_text())
    change(m)
    path.write_text(json.dumps(m))


def damage_flip(store_dir, array):
    flip_last_byte(vdir(store_dir, 2) / "arrays" / f"{array}.npy")


def damage_missing(store_dir):
    os.unlink(vdir(store_dir, 2) / "arrays" / "dual.npy")


def damage_schema(store_dir):
    _rewrite_manifest(store_dir, 2, lambda m: m.update(schema=99))


def damage_half_written(store_dir):
    # a crash between writing arrays and the manifest
    os.unlink(vdir(store_dir, 2) / "manifest.json")


def damage_not_json(store_dir):
    (vdir(store_dir, 2) / "manifest.json").write_text('{"schema": 1, "model": ')


FAULTS = {
    "flip-x_train": (lambda s: damage_flip(s, "x_train"), "'x_train' fails its checksum"),
    "flip-dual": (lambda s: damage_flip(s, "dual"), "'dual' fails its checksum"),
    "flip-novelty": (lambda s: damage_flip(s, "novelty_reference"),
                     "'novelty_reference' fails its checksum"),
    "flip-residuals": (lambda s: damage_flip(s, "abs_residuals"),
                       "'abs_residuals' fails its checksum"),
    "missing-array": (damage_missing, "'dual' is missing"),
    "unknown-schema": (damage_schema, "schema 99 is not supported"),
    "half-written": (damage_half_written, "manifest.json is missing"),
    "manifest-not-json": (damage_not_json, "not valid JSON"),
}


@pytest.mark.parametrize("fault", FAULTS)
def test_damaged_version_is_named_refused_and_isolated(fault, two_versions, capsys):
    store_dir = two_versions
    damage, message = FAULTS[fault]
    damage(store_dir)

    code, out, err = run_cli(capsys, "verify", "coat", "2")
    assert code != 0
    assert message in err and "v2" in err
    assert len(err.strip().splitlines()) == 1

    with pytest.raises(StoreError, match=message.replace("'", ".")):
        load_model(store_dir, "coat", 2)

    # the neighbour is untouched
    code, out, err = run_cli(capsys, "verify", "coat", "1")
    assert code == 0 and "coat v1: ok" in out and err == ""
    assert load_model(store_dir, "coat", 1).version == 1

    # verifying every version reports both, fails overall
    code, out, err = run_cli(capsys, "verify", "coat")
    assert code != 0 and "coat v1: ok" in out and "coat v2: FAULT" in err

    # a damaged version cannot be released
    code, out, err = run_cli(capsys, "release", "coat", "2")
    assert code != 0 and message in err
    assert Store(store_dir).live(name="coat") is None


def test_half_written_version_number_is_never_reused(store_dir, small_csv):
    # arrays but no manifest, as a crash during a hand copy would leave
    (vdir(store_dir, 1) / "arrays").mkdir(parents=True)
    np.save(vdir(store_dir, 1) / "arrays" / "x_train.npy", np.zeros((3, 2)))
    assert publish(store_dir, small_csv) == 2
    verify(Store(store_dir), "coat", 2)
    with pytest.raises(StoreError, match="manifest.json is missing"):
        load_model(store_dir, "coat", 1)


class Canary:
    """Unpickling this object would create ``path``: proof that a load ran pickle."""

    def __init__(self, path):
        self.path = str(path)

    def __reduce__(self):
        return (open, (self.path, "w"))


def test_object_array_is_refused_without_unpickling(two_versions, tmp_path, capsys):
    store_dir = two_versions
    marker = tmp_path / "pickle-ran"
    path = vdir(store_dir, 2) / "arrays" / "dual.npy"
    n_rows = np.load(path).shape[0]
    payload = np.empty((n_rows, 2), dtype=object)
    payload[:] = Canary(marker)
    np.save(path, payload)  # numpy's default writes the objects as a pickle: the forgery

    def fix(m):  # a forger who also fixes the checksum and shape
        m["arrays"]["dual"]["sha256"] = hashlib.sha256(path.read_bytes()).hexdigest()
        m["arrays"]["dual"]["shape"] = [n_rows, 2]

    _rewrite_manifest(store_dir, 2, fix)
    with pytest.raises(StoreError, match="'dual'"):
        load_model(store_dir, "coat", 2)
    code, _, err = run_cli(capsys, "verify", "coat", "2")
    assert code != 0 and "'dual'" in err
    assert not marker.exists()
    assert load_model(store_dir, "coat", 1).version == 1


def test_publish_refuses_object_arrays(store_dir):
    bad = np.array([1.0, "x"], dtype=object)
    with pytest.raises(StoreError, match="object array"):
        Store(store_dir).publish("coat", {}, {"x_train": bad})
    assert not (store_dir / "coat").exists()  # a failed first publish leaves no folder


def test_manifest_naming_another_version_is_refused(two_versions):
    _rewrite_manifest(two_versions, 2, lambda m: m.update(version=1))
    with pytest.raises(StoreError, match="another model or version"):
        load_model(two_versions, "coat", 2)


def test_array_names_cannot_leave_the_version(two_versions):
    # A manifest naming a (valid, correctly checksummed) file outside arrays/ must not make
    # the loader open it: no path ever leaves the version directory.
    outside = two_versions / "outside.npy"  # arrays/../../../../outside.npy
    outside.write_bytes((vdir(two_versions, 2) / "arrays" / "dual.npy").read_bytes())

    def point_outside(m):
        m["arrays"]["../../../../outside"] = dict(m["arrays"]["dual"])

    _rewrite_manifest(two_versions, 2, point_outside)
    with pytest.raises(StoreError, match="array name"):
        load_model(two_versions, "coat", 2)


# -- names ----------------------------------------------------------------------------------

@pytest.mark.parametrize("name", ["../x", "x/y", "", ".", "..", "-x", "UPPER", "a" * 65, "a b"])
def test_bad_model_names_are_refused(name):
    with pytest.raises(StoreError, match="invalid model name"):
        check_name(name)


@pytest.mark.parametrize("version", ["0", "-1", "1.5", "1/../2", "", "x", "1" * 10])
def test_bad_versions_are_refused(version):
    with pytest.raises(StoreError, match="invalid version"):
        check_version(version)


def test_good_names_pass():
    assert check_name("coating-line_2.v1") == "coating-line_2.v1"
    assert check_version("12") == 12


# -- concurrency ----------------------------------------------------------------------------

def test_a_sweep_never_takes_a_folder_another_publisher_is_still_claiming(store_dir):
    # A publisher's new work folder is unlocked between its mkdir and its flock. Another
    # publisher's sweep must wait for that claim (the staging folder's own lock), or it would
    # delete the folder as litter and the first publisher would fail with ENOENT.
    import fcntl
    import threading

    from service_helpers import holds_for

    from service.store import STAGING

    st = Store(store_dir)
    assert st.publish("m", {"created": "x"}, {"dual": np.zeros(3)}) == 1
    staging = store_dir / "m" / STAGING
    guard = os.open(staging, os.O_RDONLY)
    fcntl.flock(guard, fcntl.LOCK_EX)  # the other publisher, mid-claim
    claiming = staging / "claimed-but-not-yet-locked"
    claiming.mkdir()
    done: list[int] = []
    worker = threading.Thread(target=lambda: done.append(
        st.publish("m", {"created": "y"}, {"dual": np.ones(3)})))
    worker.start()
    try:
        holds_for(lambda: claiming.is_dir() and not done, 0.5, "the claimed folder")
    finally:
        os.close(guard)
    worker.join(timeout=60)
    assert done == [2]
    # once the claim is over, a folder nobody holds is litter: that publish swept it
    assert not claiming.exists()


def test_four_trainers_publishing_at_once_get_four_versions(store_dir, small_csv):
    cmd = [*KRIDGE, "train", str(small_csv), "--target", "hardness_s", "--name", "same",
           "--features", "oven_temp_c,line_speed_m_min,wet_film_um,humidity_pct,viscosity_mpas",
           "--kernel", "rbf", "--gamma", "0.2", "--ridge", "0.5", "--no-report", "--quiet",
           "--store", str(store_dir)]
    procs = [subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for _ in range(4)]
    results = [p.communicate(timeout=300) for p in procs]
    assert [p.returncode for p in procs] == [0, 0, 0, 0], [err for _, err in results]

    st = Store(store_dir)
    assert st.versions("same") == [1, 2, 3, 4]
    reported = sorted(int(out.split(" v", 1)[1].split()[0]) for out, _ in results)
    assert reported == [1, 2, 3, 4]
    for v in (1, 2, 3, 4):
        assert verify(st, "same", v).version == v
    assert not any((store_dir / "same" / ".staging").iterdir())  # no leftovers


# -- release and rollback -------------------------------------------------------------------

def test_release_and_rollback_walk_back_through_history(store_dir, small_csv, capsys):
    for _ in range(3):
        publish(store_dir, small_csv)
    live_path = store_dir / "coat" / "live.json"
    history_path = store_dir / "coat" / "history.jsonl"
    assert not live_path.exists()

    for v in ("1", "2", "3"):
        code, out, err = run_cli(capsys, "release", "coat", v)
        assert code == 0, err
    assert json.loads(live_path.read_text())["version"] == 3
    assert json.loads(live_path.read_text())["previous"] == 2
    assert load_model(store_dir, "coat").version == 3  # live version by default

    code, out, _ = run_cli(capsys, "rollback", "coat")
    assert code == 0 and "version 2" in out
    assert json.loads(live_path.read_text())["version"] == 2
    code, out, _ = run_cli(capsys, "rollback", "coat")
    assert code == 0 and "version 1" in out
    assert json.loads(live_path.read_text())["version"] == 1
    assert load_model(store_dir, "coat").version == 1

    code, out, err = run_cli(capsys, "rollback", "coat")
    assert code != 0 and out == ""
    assert "cannot roll back" in err and len(err.strip().splitlines()) == 1
    assert json.loads(live_path.read_text())["version"] == 1  # unchanged by the failure

    history = [json.loads(line) for line in history_path.read_text().splitlines()]
    assert [(h["action"], h["version"], h["previous"]) for h in history] == [
        ("release", 1, None), ("release", 2, 1), ("release", 3, 2),
        ("rollback", 2, 3), ("rollback", 1, 2),
    ]
    assert all("time" in h for h in history)


def test_release_after_rollback_starts_a_new_branch(store_dir, small_csv):
    for _ in range(3):
        publish(store_dir, small_csv)
    st = Store(store_dir)
    st.release("coat", 1)
    st.release("coat", 3)
    st.rollback("coat")  # back to 1
    st.release("coat", 2)
    assert st.rollback("coat")["version"] == 1
    with pytest.raises(StoreError, match="cannot roll back"):
        st.rollback("coat")


def test_release_of_a_missing_version_is_a_clear_error(store_dir, small_csv, capsys):
    publish(store_dir, small_csv)
    code, out, err = run_cli(capsys, "release", "coat", "7")
    assert code == 2 and "no version 7" in err and len(err.strip().splitlines()) == 1
    code, out, err = run_cli(capsys, "release", "nosuch", "1")
    assert code == 2 and "no model named 'nosuch'" in err
    code, out, err = run_cli(capsys, "release", "coat", "0")
    assert code == 2 and "invalid version" in err
    assert not (store_dir / "coat" / "live.json").exists()
    with pytest.raises(NotFound):
        Store(store_dir).release("coat", 7)


def test_rollback_with_nothing_released(store_dir, small_csv, capsys):
    publish(store_dir, small_csv)
    code, _, err = run_cli(capsys, "rollback", "coat")
    assert code == 2 and "nothing was released yet" in err
    with pytest.raises(StoreError, match="no live version"):
        load_model(store_dir, "coat")
