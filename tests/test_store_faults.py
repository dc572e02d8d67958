"""Store faults are refused versions, never crashes or hangs; files are made for the accounts
that use them; versions are ASCII digits everywhere; nothing names the store's location.

Each fault is made the way a person or a tool with write access could leave it: a symbolic
link loop, a FIFO where a file belongs, an array cut short in place, a folder without
versions, a store this process cannot write.
"""

from __future__ import annotations

import errno
import json
import os
import pwd
import stat
import subprocess
import threading
from pathlib import Path

import numpy as np
import pytest
from cli_helpers import kridge, run_cli
from make_coating_data import TYPICAL_ROW
from service_helpers import Gunicorn

import service.store.reading as reading
from service.app import create_app
from service.live_models import LiveModels
from service.settings import Settings
from service.store import Store, StoreError, check_version
from trainer.job import TrainOptions, train

TOKEN = "faults-token-5d1c"
AUTH = {"Authorization": f"Bearer {TOKEN}"}


def _train(root: Path, csv: Path, kernel: str = "rbf") -> int:
    opts = TrainOptions(data=str(csv), targets=["hardness_s", "gloss_gu"], name="coat",
                        kernel=kernel, gamma=0.2, ridge=0.5, store=str(root), quiet=True,
                        report=True)
    return train(opts, log=lambda *a, **k: None)["version"]


@pytest.fixture(scope="module")
def bundle(tmp_path_factory, demo_csv):
    """A trained version's manifest and arrays, to publish into fresh stores quickly."""
    base = tmp_path_factory.mktemp("faults")
    csv = base / "small.csv"
    csv.write_text("\n".join(demo_csv.read_text().splitlines()[:61]) + "\n")
    root = base / "store"
    _train(root, csv)
    st = Store(root)
    manifest = st.read_manifest("coat", 1)
    arrays = {k: np.array(v) for k, v in st.load_arrays("coat", 1, manifest).items()}
    return {"csv": csv, "manifest": manifest, "arrays": arrays}


def _publish(root: Path, bundle, times: int = 2, name: str = "coat") -> Store:
    """``times`` versions of the bundle under ``name``, version 1 live."""
    st = Store(root)
    report = lambda work, v: (work / "report.html").write_text("<p>report</p>")  # noqa: E731
    for _ in range(times):
        st.publish(name, bundle["manifest"], bundle["arrays"], extra_files=report)
    st.release(name, 1)
    return st


def _client(root: Path):
    app = create_app(Settings.from_env(store=str(root), admin_token=TOKEN), watch=False)
    return app, app.test_client()


# -- 1. file modes --------------------------------------------------------------------------
@pytest.mark.parametrize("umask", [0o022, 0o027])
def test_every_file_a_publish_and_release_write_is_0644_less_the_umask(tmp_path, bundle, umask):
    old = os.umask(umask)
    try:
        st = _publish(tmp_path / "store", bundle)
        st.release("coat", 2)
    finally:
        os.umask(old)
    mdir = tmp_path / "store" / "coat"
    written = [mdir / "live.json", mdir / "history.jsonl", mdir / "versions",
               *(mdir / "versions").rglob("*")]
    for path in written:
        mode = stat.S_IMODE(path.stat().st_mode)
        want = (0o755 if path.is_dir() else 0o644) & ~umask
        assert mode == want, f"{path.relative_to(mdir)}: {oct(mode)}, expected {oct(want)}"


def test_another_account_reads_every_file_root_released(bundle):
    """Released as root, read as ``nobody`` (the README's separate serving account)."""
    if os.geteuid() != 0:
        pytest.skip("needs root to act as a second account")
    nobody = pwd.getpwnam("nobody")
    base = Path(os.path.realpath("/tmp")) / f"kridge-accounts-{os.getpid()}"
    base.mkdir(mode=0o755)
    os.chmod(base, 0o755)  # mkdir's mode is cut by the umask
    old = os.umask(0o022)
    try:
        _publish(base / "store", bundle)
    finally:
        os.umask(old)
    files = [p for p in (base / "store").rglob("*") if p.is_file() and p.name != ".lock"]
    assert any(p.name == "live.json" for p in files)
    as_nobody = subprocess.run(  # cat reads each file as nobody; no interpreter needed
        ["cat", *map(str, files)], capture_output=True, timeout=30,
        preexec_fn=lambda: (os.setgid(nobody.pw_gid), os.setuid(nobody.pw_uid)))
    subprocess.run(["rm", "-rf", str(base)], check=True)
    assert as_nobody.returncode == 0, as_nobody.stderr.decode()


# -- 2. faults are refused versions ---------------------------------------------------------
def symlink_loop(vdir: Path) -> None:
    (vdir / "arrays" / "dual.npy").unlink()
    (vdir / "arrays" / "dual.npy").symlink_to("dual.npy")


def manifest_loop(vdir: Path) -> None:
    (vdir / "manifest.json").unlink()
    (vdir / "manifest.json").symlink_to("manifest.json")


def fifo_array(vdir: Path) -> None:
    (vdir / "arrays" / "dual.npy").unlink()
    os.mkfifo(vdir / "arrays" / "dual.npy")


def fifo_manifest(vdir: Path) -> None:
    (vdir / "manifest.json").unlink()
    os.mkfifo(vdir / "manifest.json")


def truncated_array(vdir: Path) -> None:
    os.truncate(vdir / "arrays" / "x_train.npy", 200)


FAULTS = {  # fault → (damage, reason class the pages show)
    "array symlink loop": (symlink_loop, "symbolic link"),
    "manifest symlink loop": (manifest_loop, "symbolic link"),
    "array is a FIFO": (fifo_array, "not a regular file"),
    "manifest is a FIFO": (fifo_manifest, "not a regular file"),
    "array truncated": (truncated_array, "checksum"),
}


def _bounded(fn, seconds: float = 20.0):
    """Run ``fn`` on a thread; fail (instead of hanging the suite) when it blocks."""
    out: dict = {}
    thread = threading.Thread(target=lambda: out.setdefault("value", fn()), daemon=True)
    thread.start()
    thread.join(seconds)
    assert not thread.is_alive(), f"blocked for {seconds} s"
    return out.get("value")


@pytest.mark.parametrize("fault", FAULTS)
def test_a_store_fault_is_a_refused_version_everywhere(tmp_path, bundle, fault):
    damage, kind = FAULTS[fault]
    root = tmp_path / "store"
    st = _publish(root, bundle)
    damage(root / "coat" / "versions" / "2")
    # the command line: a fault (exit 1) naming the version, never a bug (70) or a hang
    done = kridge("verify", "coat", store=root, timeout=60)
    assert done.returncode == 1, done.stderr
    assert "coat v2: FAULT" in done.stderr and "coat v1: ok" in done.stdout
    assert str(root) not in done.stderr
    assert kridge("versions", "coat", store=root, timeout=60).returncode == 0
    # the service: v2 forced live is refused with its reason class, v1 keeps serving
    models = LiveModels(st)
    models.refresh()
    (root / "coat" / "live.json").write_text(json.dumps({"version": 2}))
    _bounded(models.refresh)
    assert models.live("coat").version == 1
    assert models.refused("coat", 2) == kind
    ready, _, problems = models.readiness()
    assert not ready and "version 2 was not loaded" in problems["coat"]
    app, client = _client(root)
    page = _bounded(lambda: client.get("/page/coat"))
    assert page.status_code == 200
    assert f"refused ({kind})" in page.text and "loading" not in page.text
    assert f"refused ({kind})" in client.get("/").text


def test_a_fifo_as_live_json_blocks_nothing(tmp_path, bundle):
    root = tmp_path / "store"
    st = _publish(root, bundle)
    (root / "coat" / "live.json").unlink()
    os.mkfifo(root / "coat" / "live.json")
    models = LiveModels(st)
    _bounded(models.refresh)
    assert "not a regular file" in models.readiness()[2]["coat"]
    done = kridge("versions", "coat", store=root, timeout=60)
    assert done.returncode == 2 and "live.json is not a regular file" in done.stderr
    _, client = _client(root)
    assert _bounded(lambda: client.get("/page/coat")).status_code == 503
    assert _bounded(lambda: client.get("/readyz")).status_code == 503


def test_an_array_truncated_in_place_under_a_live_laplacian_model(tmp_path, bundle):
    """The worker holds what it verified: cutting the file short changes nothing it serves
    (with the arrays memory-mapped, the next request died of SIGBUS)."""
    root = tmp_path / "store"
    _train(root, bundle["csv"], kernel="laplacian")
    Store(root).release("coat", 1)
    with Gunicorn(root, workers=1) as svc:
        svc.wait_ready()
        before = svc.post("/models/coat/predict", {"rows": [TYPICAL_ROW]})
        assert before.status_code == 200
        for array in (root / "coat" / "versions" / "1" / "arrays").iterdir():
            os.truncate(array, 128)
        for _ in range(5):
            after = svc.post("/models/coat/predict", {"rows": [TYPICAL_ROW]})
            assert after.status_code == 200
            assert after.json()["results"] == before.json()["results"]
        assert svc.proc.poll() is None
    done = kridge("verify", "coat", store=root, timeout=60)
    assert done.returncode == 1 and "fails its checksum" in done.stderr


def test_admin_on_a_store_it_cannot_write_answers_503(tmp_path, bundle, monkeypatch):
    root = tmp_path / "store"
    _publish(root, bundle)
    _, client = _client(root)

    def read_only(*_a, **_k):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS))

    monkeypatch.setattr(reading, "open", read_only, raising=False)  # the lock file's open
    for path, body in (("release", {"version": 2}), ("rollback", None)):
        r = client.post(f"/models/coat/{path}", json=body, headers=AUTH)
        assert r.status_code == 503, r.text
        assert r.json["error"]["code"] == "store_unwritable"
        assert "Read-only file system" in r.json["error"]["message"]
        assert str(root) not in r.text
    assert Store(root).live_version("coat") == 1


def test_a_folder_without_versions_is_no_model(tmp_path, bundle):
    root = tmp_path / "store"
    _publish(root, bundle)
    (root / "ghost" / "versions").mkdir(parents=True)
    (root / "ghost" / ".staging").mkdir()
    _, client = _client(root)
    assert [m["name"] for m in client.get("/models").json["models"]] == ["coat"]
    ready = client.get("/readyz")
    assert ready.status_code == 200 and "ghost" not in ready.json["models"]
    assert "ghost" not in client.get("/").text
    assert client.get("/page/ghost").status_code == 404
    assert client.get("/models/ghost/versions").status_code == 404


@pytest.mark.parametrize("failure", ["internal error", "full disk"])
def test_a_failed_first_publish_leaves_no_model_folder(tmp_path, bundle, failure):
    def extra(work, version):
        if failure == "full disk":
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        raise RuntimeError("a bug in the report")

    st = Store(tmp_path / "store")
    with pytest.raises(StoreError if failure == "full disk" else RuntimeError):
        st.publish("coat", bundle["manifest"], bundle["arrays"], extra_files=extra)
    assert not (tmp_path / "store" / "coat").exists()
    assert st.models() == []


# -- 3. versions, paths, the lock table, --workers ------------------------------------------
@pytest.mark.parametrize("text", ["²", "١", "٣", "1²", "0", "-1", "1e3", " 1", "1234567890"])
def test_versions_are_ascii_digits_everywhere(tmp_path, bundle, text, capsys):
    root = tmp_path / "store"
    _publish(root, bundle)
    with pytest.raises(StoreError, match="invalid version"):
        check_version(text)
    _, client = _client(root)
    r = client.post(f"/models/coat/predict?version={text}", json={"rows": [TYPICAL_ROW]})
    assert r.status_code == 400 and r.json["error"]["code"] == "invalid_version"
    assert client.get(f"/models/coat/versions/{text}/report").status_code == 404
    assert client.get(f"/page/coat/try?version={text}").status_code == 404
    for command in ("inspect", "verify", "release"):
        code, _, err = run_cli(capsys, command, "coat", text, "--store", root)
        assert code == 2 and "invalid version" in err, (command, err)


def test_no_answer_names_the_store_location(tmp_path, bundle):
    root = tmp_path / "store"
    _publish(root, bundle)
    with pytest.raises(StoreError) as caught:
        Store(root).versions("nosuch")
    assert str(root) not in str(caught.value)
    symlink_loop(root / "coat" / "versions" / "2")
    _, client = _client(root)
    answers = [client.get("/models/nosuch/versions"), client.get("/models/nosuch"),
               client.post("/models/nosuch/predict", json={"rows": [TYPICAL_ROW]}),
               client.post("/models/coat/predict?version=2", json={"rows": [TYPICAL_ROW]}),
               client.post("/models/coat/predict?version=9", json={"rows": [TYPICAL_ROW]}),
               client.get("/models/coat/versions"), client.get("/page/coat"),
               client.get("/page/coat/try?version=2"),
               client.post("/models/coat/release", json={"version": 2}, headers=AUTH)]
    assert {a.status_code for a in answers} <= {200, 404, 409}
    for a in answers:
        assert str(root) not in a.text and str(tmp_path) not in a.text


def test_the_load_lock_table_stays_bounded(tmp_path, bundle):
    st = _publish(tmp_path / "store", bundle)
    models = LiveModels(st)
    models.refresh()
    for v in range(3, 3003):
        with pytest.raises(StoreError):
            models.pinned_version("coat", v)
    assert models.pinned_version("coat", 2).version == 2
    assert len(models._loading) == 0  # one entry per load under way; none now


@pytest.mark.parametrize("workers", ["-1", "0", "two", "²"])
def test_serve_with_a_bad_worker_count_is_a_user_error(workers, tmp_path):
    done = kridge("serve", "--workers", workers, "--bind", "127.0.0.1:1", store=tmp_path,
                  timeout=60)
    assert done.returncode == 2, done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and "--workers must be a whole number of at least 1" in lines[0]


def test_verify_of_a_healthy_model_still_passes(tmp_path, bundle):
    root = tmp_path / "store"
    _publish(root, bundle)
    done = kridge("verify", "coat", store=root)
    assert done.returncode == 0 and done.stdout.count(": ok") == 2
