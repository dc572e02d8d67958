"""Findings from trying the service and the store as operators would, each pinned by a test.

HTTP conformance (405 with Allow, a document as strict as the service, 409 for a conflict),
a damaged live.json or history.jsonl (a store error everywhere, repaired by release,
explained by rollback), each worker loading a bundle once, the command line showing bugs as
bugs, and tuning leaving out only candidates that fail numerically.
"""

from __future__ import annotations

import json
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
from cli_helpers import run_cli
from jsonschema import Draft202012Validator
from make_coating_data import TYPICAL_ROW
from service_helpers import Gunicorn, holds_for

from service import live_models, model
from service.live_models import LiveModels
from service.store import Conflict, Store, StoreError
from trainer.cli import EXIT_BUG
from trainer.exact import candidates
from trainer.job import TrainOptions, train
from trainer.tuning import search as tuning

TOKEN = "findings-token-5d1c"
AUTH = {"Authorization": f"Bearer {TOKEN}"}


def publish(root, csv, name="coat", ridge=0.5) -> int:
    opts = TrainOptions(data=str(csv), targets=["hardness_s", "gloss_gu"], name=name,
                        kernel="rbf", gamma=0.2, ridge=ridge, store=str(root), quiet=True,
                        report=False)
    return train(opts, log=lambda *a, **k: None)["version"]


@pytest.fixture(scope="module")
def served(tmp_path_factory, demo_csv):
    """coat v1 live and v2 published, a 2-worker service with the admin token."""
    root = tmp_path_factory.mktemp("findings") / "store"
    lines = demo_csv.read_text().splitlines()[:61]
    csv = root.parent / "small.csv"
    csv.write_text("\n".join(lines) + "\n")
    publish(root, csv)
    publish(root, csv, ridge=0.2)
    Store(root).release("coat", 1)
    env = {"KRIDGE_ADMIN_TOKEN": TOKEN, "KRIDGE_POLL_SECONDS": "0.1",
           "PROMETHEUS_MULTIPROC_DIR": str(root.parent / "metrics")}
    with Gunicorn(root, workers=2, env=env) as g:
        g.store = root
        yield g


# -- HTTP conformance -------------------------------------------------------------------------

@pytest.mark.parametrize("method, path, allowed", [
    ("GET", "/models/coat/predict", {"POST"}),
    ("DELETE", "/models/coat/release", {"POST"}),
    ("POST", "/healthz", {"GET", "HEAD"}),
    ("PUT", "/models", {"GET", "HEAD"}),
])
def test_405_lists_the_allowed_methods(served, method, path, allowed):
    # RFC 9110 §15.5.6: "The origin server MUST generate an Allow header field in a 405
    # response containing a list of the target resource's currently supported methods."
    import requests

    r = requests.request(method, served.base + path, timeout=10)
    assert r.status_code == 405
    listed = {m.strip() for m in r.headers["Allow"].split(",")}
    assert allowed <= listed and method not in listed
    assert r.json()["error"]["code"] == "method_not_allowed"


def _schema_validator(doc: dict, schema: dict) -> Draft202012Validator:
    # OpenAPI 3.1 schemas are JSON Schema 2020-12 (reference: jsonschema's validator)
    return Draft202012Validator(dict(schema, components=doc["components"]))


def _body_schema(doc, path):
    return doc["paths"][path]["post"]["requestBody"]["content"]["application/json"]["schema"]


def test_document_and_service_agree_on_rows_and_versions(served):
    doc = served.get("/openapi.json").json()
    generic = _schema_validator(doc, {"$ref": "#/components/schemas/RowBatch"})
    assert "/models/{name}/predict" not in doc["paths"]  # each served model has its own
    concrete = _schema_validator(doc, _body_schema(doc, "/models/coat/predict"))
    release = _schema_validator(doc, _body_schema(doc, "/models/{name}/release"))

    # an empty row: the document refuses it, and so does the service
    assert not generic.is_valid({"rows": [[]]}) and not generic.is_valid({"rows": [{}]})
    assert served.post("/models/coat/predict", json={"rows": [[]]}).status_code == 422

    # per-model rows: the document accepts exactly what the service predicts
    features = served.get("/models/coat").json()["features"]
    good = {"rows": [TYPICAL_ROW, [TYPICAL_ROW[f] for f in features]]}
    assert concrete.is_valid(good)
    assert served.post("/models/coat/predict", json=good).status_code == 200
    for bad in ({"rows": [[1.0, 2.0]]}, {"rows": [dict(TYPICAL_ROW, colour=1.0)]},
                {"rows": [{k: v for k, v in TYPICAL_ROW.items() if k != "wet_film_um"}]}):
        assert not concrete.is_valid(bad)
        assert served.post("/models/coat/predict", json=bad).status_code == 422

    # 173469.0 is an integer in JSON Schema's sense (2020-12 validation §6.1.1), so the
    # service takes it as version 173469, which does not exist: 404, not 422
    assert release.is_valid({"version": 173469.0})
    r = served.post("/models/coat/release", json={"version": 173469.0}, headers=AUTH)
    assert r.status_code == 404, r.text
    assert not release.is_valid({"version": 1.5}) and not release.is_valid({"version": True})
    for bad in (1.5, True, "2", 0):
        r = served.post("/models/coat/release", json={"version": bad}, headers=AUTH)
        assert r.status_code == 422, (bad, r.text)


def test_rollback_with_nothing_earlier_is_a_conflict(served):
    r = served.post("/models/coat/rollback", headers=AUTH)
    assert r.status_code == 409, r.text
    assert "nothing earlier" in r.json()["error"]["message"]
    doc = served.get("/openapi.json").json()
    assert "409" in doc["paths"]["/models/{name}/rollback"]["post"]["responses"]


# -- damaged live.json and history.jsonl ------------------------------------------------------

GARBLED_LIVE = [b"", b"{", b"\x00\x00\x00", b"[]", b"null", b'{"since": "x"}',
                b'{"version": "2"}', b'{"version": true}', b'{"version": 0}',
                b'{"version": 1.5}']


@pytest.fixture
def two_versions(store_dir, small_csv):
    publish(store_dir, small_csv)
    publish(store_dir, small_csv, ridge=0.2)
    return store_dir


@pytest.mark.parametrize("raw", GARBLED_LIVE)
def test_garbled_live_json_is_a_store_error_everywhere(two_versions, raw, capsys):
    st = Store(two_versions)
    st.release("coat", 1)
    (two_versions / "coat" / "live.json").write_bytes(raw)
    with pytest.raises(StoreError, match="coat: live.json is damaged"):
        st.live_version("coat")
    with pytest.raises(StoreError, match="live.json"):
        model.load_model(two_versions, "coat")
    h = LiveModels(st)
    h.start(60.0)  # a worker starting on a damaged pointer: up, not ready, says why
    h.stop()
    ready, _, problems = h.readiness()
    assert not ready and "live.json is damaged" in problems["coat"]
    assert str(two_versions) not in json.dumps(problems)

    # rollback explains what it cannot know, and changes nothing
    code, out, err = run_cli(capsys, "rollback", "coat", "--store", two_versions)
    assert code == 2 and "live now is unknown" in err and "kridge release coat" in err
    assert (two_versions / "coat" / "live.json").read_bytes() == raw

    # release is the repair: a fresh pointer, and the history says what was repaired
    code, out, err = run_cli(capsys, "release", "coat", "2", "--store", two_versions)
    assert code == 0, err
    assert st.live_version("coat") == 2
    last = st.history("coat")[-1]
    assert last["version"] == 2 and "live.json is damaged" in last["repaired"]
    assert st.rollback("coat")["version"] == 1  # and the history still walks back


def test_missing_live_json_with_a_history_is_repaired_and_explained(two_versions, capsys):
    st = Store(two_versions)
    st.release("coat", 1)
    st.release("coat", 2)
    (two_versions / "coat" / "live.json").unlink()
    assert st.live_version("coat") is None
    with pytest.raises(Conflict, match="live.json is missing although the history shows "
                                       "version 2 live"):
        st.rollback("coat")
    rec = st.release("coat", 2)
    assert "live.json was missing" in rec["repaired"]


def test_garbled_history_is_a_store_error_and_release_restarts_it(two_versions, capsys):
    st = Store(two_versions)
    st.release("coat", 1)
    st.release("coat", 2)
    path = two_versions / "coat" / "history.jsonl"
    lines = path.read_text().splitlines()
    path.write_text(lines[0] + "\n" + '{"time": "x", "act' + "\n")  # torn second line
    with pytest.raises(StoreError, match="history.jsonl line 2 is damaged"):
        st.history("coat")
    code, _, err = run_cli(capsys, "rollback", "coat", "--store", two_versions)
    assert code == 2 and "history.jsonl line 2 is damaged" in err
    assert "versions live before are unknown" in err and len(err.strip().splitlines()) == 1
    assert st.live_version("coat") == 2  # unchanged

    st.release("coat", 1)  # the repair: rollback replays from this record on
    rec = st.release("coat", 2)
    assert st.rollback("coat")["version"] == 1
    assert rec.get("repaired") is None
    restart = [json.loads(x) for x in path.read_text().splitlines()[2:] if x.strip()]
    assert restart[0]["restart"] is True and "line 2 is damaged" in restart[0]["repaired"]


def test_a_torn_last_line_does_not_swallow_the_next_record(two_versions):
    st = Store(two_versions)
    st.release("coat", 1)
    path = two_versions / "coat" / "history.jsonl"
    with open(path, "a") as fh:
        fh.write('{"time": "2026-')  # a writer killed mid-append: no newline
    st.release("coat", 2)
    assert path.read_text().splitlines()[-1].startswith('{"time"')
    assert json.loads(path.read_text().splitlines()[-1])["version"] == 2


def test_admin_release_repairs_a_garbled_pointer(served):
    live = served.store / "coat" / "live.json"
    saved = live.read_bytes()
    live.write_bytes(b'{"version": ')
    try:
        # the workers keep serving the last good version while they read the damaged pointer
        def serves_v1() -> bool:
            r = served.post("/models/coat/predict", json={"rows": [TYPICAL_ROW]})
            return r.status_code == 200 and r.headers["X-Model-Version"] == "1"

        assert holds_for(serves_v1, 0.5, "serving version 1") >= 1
        back = served.post("/models/coat/rollback", headers=AUTH)
        assert back.status_code == 409 and "live now is unknown" in back.text
        assert str(served.store) not in back.text
        fixed = served.post("/models/coat/release", json={"version": 1}, headers=AUTH)
        assert fixed.status_code == 200 and "repaired" in fixed.json(), fixed.text
        assert str(served.store) not in fixed.text
    finally:
        if Store(served.store).live_version("coat") != 1:
            live.write_bytes(saved)


# -- a worker loads each bundle once -----------------------------------------------------------

def _slow_counting_loads(monkeypatch):
    state = {"now": 0, "peak": 0, "calls": 0}
    lock = threading.Lock()
    real = live_models.load_model

    def slow(*a, **k):
        with lock:
            state["now"] += 1
            state["calls"] += 1
            state["peak"] = max(state["peak"], state["now"])
        try:
            time.sleep(0.2)  # a large bundle being checksummed
            return real(*a, **k)
        finally:
            with lock:
                state["now"] -= 1

    monkeypatch.setattr(live_models, "load_model", slow)
    return state


def _together(n, fn):
    out, errors = [], []
    start = threading.Barrier(n)

    def run():
        start.wait()
        try:
            out.append(fn())
        except Exception as exc:  # noqa: BLE001 - collected for the assertion
            errors.append(exc)

    threads = [threading.Thread(target=run) for _ in range(n)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors, errors
    return out


def test_a_new_model_is_loaded_once_however_many_requests_ask(two_versions, monkeypatch):
    st = Store(two_versions)
    h = LiveModels(st)
    h.refresh()  # nothing live yet
    st.release("coat", 2)
    h.slots.clear()  # as if the model appeared after the last poll
    state = _slow_counting_loads(monkeypatch)
    models = _together(8, lambda: h.live("coat"))
    assert {m.version for m in models} == {2}
    assert state["calls"] == 1 and state["peak"] == 1


def test_a_pinned_version_is_loaded_once_however_many_requests_ask(two_versions, monkeypatch):
    st = Store(two_versions)
    st.release("coat", 2)
    h = LiveModels(st)
    h.refresh()
    state = _slow_counting_loads(monkeypatch)
    models = _together(8, lambda: h.pinned_version("coat", 1))
    assert {m.version for m in models} == {1} and len({id(m) for m in models}) == 1
    assert state["calls"] == 1 and state["peak"] == 1


# -- the command line: user errors are one line, bugs show as bugs ----------------------------

def test_a_bug_shows_its_traceback_and_a_distinct_exit_status(store_dir, small_csv,
                                                              monkeypatch, capsys):
    import trainer.job as train_module

    def broken(*_a, **_k):
        raise ValueError("an internal invariant broke")  # a coding error, not the user's

    monkeypatch.setattr(train_module, "train", broken)
    code, _, err = run_cli(capsys, "train", small_csv, "--target", "hardness_s", "--name",
                           "coat")
    assert code == EXIT_BUG and EXIT_BUG not in (0, 1, 2)
    assert "Traceback" in err and "an internal invariant broke" in err
    assert "bug in kridge" in err

    def key_bug(*_a, **_k):
        return {}["missing"]

    monkeypatch.setattr(train_module, "train", key_bug)
    code, _, err = run_cli(capsys, "train", small_csv, "--target", "hardness_s", "--name",
                           "coat")
    assert code == EXIT_BUG and "KeyError" in err


def test_argument_mistakes_stay_one_line_user_errors(store_dir, small_csv, capsys):
    code, _, err = run_cli(capsys, "train", small_csv, "--target", "hardness_s", "--name",
                           "coat", "--kernel", "cosine", "--no-report")
    assert code == 2 and err.count("\n") == 1 and "unknown kernel 'cosine'" in err
    publish(store_dir, small_csv)
    code, _, err = run_cli(capsys, "predict", "coat", small_csv, "--version", "1",
                           "--coverage", "1.5")
    assert code == 2 and err.count("\n") == 1 and "coverage" in err


def test_console_script_bug_exit_status(tmp_path):
    code = ("import sys, trainer.cli as c, trainer.job as t\n"
            "t.train = lambda *a, **k: [][1]\n"
            "sys.exit(c.main(['train', 'x.csv', '--target', 'y', '--name', 'm']))\n")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                       cwd=tmp_path, timeout=120)
    assert r.returncode == EXIT_BUG and "IndexError" in r.stderr


# -- tuning leaves out numerical failures only, and counts them ------------------------------

def _tuning_data():
    rng = np.random.default_rng(0)
    x = rng.uniform(-1, 1, (60, 3))
    return x, (np.sin(3 * x[:, 0]) + x[:, 1])[:, None]


def _tune(x, y, log):
    return tuning.tune(x, y, quiet=True, log=log)


def test_a_coding_error_in_tuning_is_not_called_singular(monkeypatch):
    def broken(*_a, **_k):
        raise ValueError("operands could not be broadcast together")

    monkeypatch.setattr(candidates, "kernel_matrix", broken)
    x, y = _tuning_data()
    with pytest.raises(ValueError, match="broadcast"):
        _tune(x, y, lambda *a, **k: None)


def test_numerical_failures_are_counted_and_logged(monkeypatch, caplog):
    real = candidates.eigen_kernel
    calls = {"n": 0}

    def flaky(k, psd=True):
        calls["n"] += 1
        if calls["n"] % 3 == 0:
            raise np.linalg.LinAlgError("eigh did not converge")
        return real(k, psd)

    monkeypatch.setattr(candidates, "eigen_kernel", flaky)
    x, y = _tuning_data()
    said = []
    with caplog.at_level("WARNING", logger="kridge.tuning"):
        info = _tune(x, y, lambda *a, **k: said.append(" ".join(a))).account
    failed = calls["n"] // 3
    assert failed >= 3
    assert info["numerical_failures"] == failed
    assert any(f"{failed} of " in s and "failed numerically" in s for s in said)
    assert sum("LinAlgError" in r.getMessage() for r in caplog.records) == failed
