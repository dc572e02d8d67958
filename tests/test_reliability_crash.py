"""Crash safety of the store: kill -9 mid-publish, racing releases, a read-only store, a full
disk. Whatever happens, a reader sees whole versions only, live.json names a whole version,
and a failed write leaves nothing half-written.

The kill trials run ``kridge train`` (the command line's ``main``) in processes forked from
one driver that has imported everything once, with ``os.fsync`` slowed down so that the
publish steps take long enough to be hit at random moments; the kills are real SIGKILLs.
"""

from __future__ import annotations

import builtins
import contextlib
import errno
import io
import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from service.model import verify
from service.store import Store
from trainer.cli import main

TESTS = Path(__file__).resolve().parent
TRAIN = ["--target", "hardness_s", "--kernel", "rbf", "--gamma", "0.2", "--ridge", "0.5",
         "--no-report", "--quiet",
         "--features", "oven_temp_c,line_speed_m_min,wet_film_um,humidity_pct,viscosity_mpas"]


def kill_trials(store: str, csv: str, trials: int, seed: int, fsync_delay: float,
                window: float, max_trials: int = 0) -> dict:
    """Fork publishing ``kridge train`` runs and SIGKILL each at a random moment of its
    publish, until ``trials`` kills have landed inside a publish or ``max_trials`` runs (at
    least ``trials``) were made; a shared machine can stretch a publish past its kill or
    shorten it, so the count of kills is what is asked for, not the count of runs. Runs in
    the driver process; prints nothing, returns counts."""
    import trainer.exact.solver  # noqa: F401 - the solver and its libraries imported before forking, once
    import trainer.job  # noqa: F401

    rng = random.Random(seed)
    killed = finished = 0
    publish_seconds = 0.0
    trial = -2
    while killed < trials and trial + 1 < max(max_trials, trials):
        trial += 1  # trial -1: one whole publish, timed, sizes the window
        r, w = os.pipe()
        pid = os.fork()
        if pid == 0:  # the trainer
            os.close(r)
            argv = ["train", csv, "--name", "coat", "--store", store, *TRAIN, "--release"]
            os._exit(_publishing_child(w, argv[:-1] if trial % 2 == 0 else argv, fsync_delay))
        os.close(w)
        started = os.read(r, 1)
        t_start = time.monotonic()
        os.close(r)
        if started and trial >= 0:
            time.sleep(rng.uniform(0.0, window or 1.2 * publish_seconds))
            os.kill(pid, signal.SIGKILL)
        _, status = os.waitpid(pid, 0)
        if trial < 0:
            assert os.WIFEXITED(status) and os.WEXITSTATUS(status) == 0, status
            publish_seconds = time.monotonic() - t_start
            continue
        if os.WIFSIGNALED(status):
            killed += 1
        else:
            assert os.WEXITSTATUS(status) == 0, status
            finished += 1
    return {"trials": trial + 1, "killed": killed, "finished": finished,
            "publish_seconds": round(publish_seconds, 3)}


def _publishing_child(announce: int, argv: list[str], fsync_delay: float) -> int:
    """``kridge train`` with a slowed fsync, writing one byte to ``announce`` as its
    publish begins."""
    import service.store as store_module

    real_fsync, real_publish = os.fsync, store_module.Store.publish

    def slow_fsync(fd):
        time.sleep(fsync_delay)
        real_fsync(fd)

    def announced(self, *a, **k):
        os.write(announce, b"p")
        return real_publish(self, *a, **k)

    os.fsync = slow_fsync
    store_module.Store.publish = announced
    with open(os.devnull, "w") as sink:
        os.dup2(sink.fileno(), 1)  # the driver's stdout carries its own result
        os.dup2(sink.fileno(), 2)
        return main(argv)


def run_kill_trials(store: Path, csv: Path, trials: int, seed: int = 0,
                    fsync_delay: float = 0.004, window: float = 0.0,
                    max_trials: int = 0) -> dict:
    """Kills fall uniformly in the first ``window`` seconds of each publish; 0 means 1.2 ×
    the length of one whole publish (with release) measured first in the same driver.
    ``trials`` kills are wanted, in at most ``max_trials`` runs (see :func:`kill_trials`)."""
    args = (f"{str(store)!r}, {str(csv)!r}, {trials}, {seed}, {fsync_delay}, {window}, "
            f"{max_trials}")
    code = ("import json, sys, test_reliability_crash as t; "
            f"print('counts:', json.dumps(t.kill_trials({args})))")
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(TESTS), str(TESTS.parent)]),
               OPENBLAS_NUM_THREADS="1")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                       env=env, timeout=600)
    assert r.returncode == 0, r.stderr
    line = [x for x in r.stdout.splitlines() if x.startswith("counts: ")][-1]
    return json.loads(line.split(": ", 1)[1])


def check_store_whole(root: Path, name: str = "coat") -> list[int]:
    """Every visible version verifies, numbers are 1..N, live.json names one of them."""
    st = Store(root)
    versions = st.versions(name)
    assert versions == list(range(1, len(versions) + 1)), versions
    for v in versions:
        verify(st, name, v)
    live = st.live_version(name)
    assert live is None or live in versions
    return versions


def test_kill_9_during_publish_leaves_whole_versions_only(store_dir, small_csv):
    kills = 12
    counts = run_kill_trials(store_dir, small_csv, kills, seed=1, max_trials=120)
    print("kill trials:", counts)
    assert counts["killed"] == kills, counts  # the kills landed inside publishes
    versions = check_store_whole(store_dir)
    assert len(versions) <= counts["trials"] + 1
    # the litter of killed publishers is swept by the next publish, which takes N + 1
    code = main(["train", str(small_csv), "--name", "coat", "--store", str(store_dir), *TRAIN])
    assert code == 0
    assert Store(store_dir).versions("coat")[-1] == len(versions) + 1
    check_store_whole(store_dir)
    assert list((store_dir / "coat" / ".staging").iterdir()) == []
    st = Store(store_dir)
    st.history("coat")  # readable to the last line
    if st.live_version("coat") is not None:
        st.release("coat", len(versions) + 1)
        assert st.live_stack("coat")[-1] == len(versions) + 1


def _release_loop(root: str, versions: list[int], rounds: int, seed: int) -> None:
    st = Store(root)
    rng = random.Random(seed)
    for _ in range(rounds):
        st.release("coat", rng.choice(versions), check=lambda v: verify(st, "coat", v))


def test_racing_releases_keep_live_json_whole(store_dir, small_csv):
    for _ in range(3):
        assert main(["train", str(small_csv), "--name", "coat", "--store", str(store_dir),
                     *TRAIN]) == 0
    st = Store(store_dir)
    st.release("coat", 1)
    live = store_dir / "coat" / "live.json"
    code = ("import sys, test_reliability_crash as t; "
            "t._release_loop(sys.argv[1], [1, 2, 3], 40, int(sys.argv[2]))")
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(TESTS), str(TESTS.parent)]))
    racers = [subprocess.Popen([sys.executable, "-c", code, str(store_dir), str(seed)],
                               env=env, stderr=subprocess.PIPE, text=True)
              for seed in (1, 2)]
    seen, reads = set(), 0
    while any(p.poll() is None for p in racers):
        entry = json.loads(live.read_bytes())  # never half a file: it is swapped by rename
        assert entry["version"] in (1, 2, 3)
        seen.add(entry["version"])
        reads += 1
    for p in racers:
        assert p.wait() == 0, p.stderr.read()
    assert reads > 50 and len(seen) >= 2
    history = st.history("coat")
    assert len(history) == 1 + 2 * 40
    assert st.live_stack("coat")[-1] == st.live_version("coat") == history[-1]["version"]
    check_store_whole(store_dir)


# -- write faults, injected in-process -------------------------------------------------------

class _Budget:
    """Bytes the disk still takes; ``None`` for a read-only file system."""

    def __init__(self, left: int | None):
        self.left = left

    def fail(self) -> OSError:
        code = errno.EROFS if self.left is None else errno.ENOSPC
        return OSError(code, os.strerror(code))

    def take(self, n: int) -> int:
        """How many of ``n`` bytes fit; raises once nothing fits."""
        if self.left is None or (self.left == 0 and n):
            raise self.fail()
        allowed = min(n, self.left)
        self.left -= allowed
        return allowed


class _LimitedFile:
    def __init__(self, f, budget: _Budget):
        self._f, self._budget = f, budget

    def write(self, data):
        n = len(data) if isinstance(data, str) else memoryview(data).nbytes
        allowed = self._budget.take(n)
        if isinstance(data, str):
            self._f.write(data[:allowed])
        else:
            self._f.write(memoryview(data).cast("B")[:allowed])
        if allowed < n:
            raise self._budget.fail()
        return n

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self._f.close()

    def __getattr__(self, item):
        return getattr(self._f, item)


def _under(path, root: Path) -> bool:
    try:
        return os.path.abspath(os.fspath(path)).startswith(str(root))
    except TypeError:
        return False  # a file descriptor


@contextlib.contextmanager
def faulty_disk(root: Path, budget: _Budget):
    """Within the block, writes under ``root`` hit a full (or read-only) disk."""
    real_open, real_fdopen = builtins.open, os.fdopen
    real_os_open, real_write, real_mkdir = os.open, os.write, os.mkdir
    writing = os.O_WRONLY | os.O_RDWR | os.O_CREAT | os.O_APPEND

    def fake_open(file, mode="r", *a, **k):
        if not (_under(file, root) and set(mode) & set("wax+")):
            return real_open(file, mode, *a, **k)
        if budget.left is None:
            raise budget.fail()
        return _LimitedFile(real_open(file, mode, *a, **k), budget)

    def fake_fdopen(fd, mode="r", *a, **k):
        f = real_fdopen(fd, mode, *a, **k)
        return _LimitedFile(f, budget) if set(mode) & set("wax+") else f

    def fake_os_open(path, flags, *a, **k):
        if budget.left is None and _under(path, root) and flags & writing:
            raise budget.fail()
        return real_os_open(path, flags, *a, **k)

    def fake_write(fd, data):
        try:
            target = os.readlink(f"/proc/self/fd/{fd}")
        except OSError:
            target = ""
        if not target.startswith(str(root)):
            return real_write(fd, data)
        allowed = budget.take(memoryview(data).nbytes)
        return real_write(fd, memoryview(data).cast("B")[:allowed])

    def fake_mkdir(path, *a, **k):
        if budget.left is None and _under(path, root):
            raise budget.fail()
        return real_mkdir(path, *a, **k)

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(builtins, "open", fake_open)
        mp.setattr(io, "open", fake_open)
        mp.setattr(os, "fdopen", fake_fdopen)
        mp.setattr(os, "open", fake_os_open)
        mp.setattr(os, "write", fake_write)
        mp.setattr(os, "mkdir", fake_mkdir)
        yield


def _visible(root: Path) -> dict:
    """What a reader of the store can see: every file's bytes, staging folders' names."""
    out = {}
    for p in sorted(root.rglob("*")):
        rel = str(p.relative_to(root))
        if p.is_file() and p.name != ".lock":
            out[rel] = p.read_bytes()
    return out


def _published(store_dir, small_csv, release: bool = False):
    argv = ["train", str(small_csv), "--name", "coat", "--store", str(store_dir), *TRAIN]
    return main([*argv, "--release"] if release else argv)


def test_full_disk_at_every_point_of_a_publish_writes_nothing(store_dir, small_csv, capsys):
    assert _published(store_dir, small_csv, release=True) == 0
    capsys.readouterr()
    before = _visible(store_dir)
    # sweep the failure point through the publish: 0 bytes, then growing budgets
    fails = 0
    for left in (0, 1, 100, 128, 1000, 4000, 10_000, 20_000, 40_000, 80_000, 10**7):
        with faulty_disk(store_dir, _Budget(left)):
            code = _published(store_dir, small_csv, release=True)
        out, err = capsys.readouterr()
        if code == 0:
            break
        fails += 1
        assert code == 2 and err.count("\n") == 1 and "No space left on device" in err, err
        assert "Traceback" not in err and "nothing was published" in err
        assert _visible(store_dir) == before, left
        assert list((store_dir / "coat" / ".staging").iterdir()) == []
    assert code == 0 and fails >= 5
    assert Store(store_dir).versions("coat") == [1, 2]  # the failed ones took no number
    check_store_whole(store_dir)


def test_full_disk_during_release_changes_nothing(store_dir, small_csv, capsys):
    assert _published(store_dir, small_csv, release=True) == 0
    assert _published(store_dir, small_csv) == 0
    capsys.readouterr()
    before = _visible(store_dir)
    live_size = len((store_dir / "coat" / "live.json").read_bytes())
    # nothing fits; the new pointer fits but not the record; the record half fits
    for left in (0, live_size + 10, live_size + 40):
        with faulty_disk(store_dir, _Budget(left)):
            code = main(["release", "coat", "2", "--store", str(store_dir)])
        out, err = capsys.readouterr()
        assert code == 2 and "No space left on device" in err and "unchanged" in err, err
        assert _visible(store_dir) == before, left
    assert main(["release", "coat", "2", "--store", str(store_dir)]) == 0
    assert Store(store_dir).live_stack("coat") == [1, 2]


def test_read_only_store_gives_clear_errors_and_still_reads(store_dir, small_csv, capsys):
    assert _published(store_dir, small_csv, release=True) == 0
    assert _published(store_dir, small_csv) == 0
    capsys.readouterr()
    before = _visible(store_dir)
    with faulty_disk(store_dir, _Budget(None)):
        for argv in (["train", str(small_csv), "--name", "coat", *TRAIN],
                     ["release", "coat", "2"], ["rollback", "coat"]):
            code = main([*argv, "--store", str(store_dir)])
            out, err = capsys.readouterr()
            assert code == 2 and err.count("\n") == 1, err
            assert "Read-only file system" in err and "Traceback" not in err
        # reading needs no write: verify and load work on a read-only store
        assert main(["verify", "coat", "--store", str(store_dir)]) == 0
        assert verify(Store(store_dir), "coat", 1).version == 1
    assert _visible(store_dir) == before
