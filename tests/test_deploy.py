"""deploy/: manifests checked against Kubernetes' own schemas and against the service's
settings; the gunicorn config through gunicorn's own parser; the serving image's contents
from its Dockerfile and by running the serve path with the training libraries hidden."""

from __future__ import annotations

import importlib.util
import json
import re
import shlex
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import kubernetes_validate
import pytest
import requests
import yaml
from make_coating_data import TYPICAL_ROW
from service_helpers import free_port

from service.app import create_app
from service.settings import Settings, cgroup_cpu_limit, drain_seconds, worker_count
from trainer.cli import build_parser, main

ROOT = Path(__file__).resolve().parents[1]
K8S = ROOT / "deploy" / "kubernetes"
# Schemas shipped offline by kubernetes-validate (PyPI): the oldest release we state
# support for and the newest the installed package carries.
K8S_VERSIONS = ["1.30", kubernetes_validate.latest_version()]
# The packages the serving image must not need (the trainer's extras and the test references).
TRAINING_ONLY = ("scipy", "sklearn", "matplotlib", "joblib", "tqdm")


def docs(path: Path) -> list[dict]:
    return [d for d in yaml.safe_load_all(path.read_text()) if d]


def manifest_files() -> list[Path]:
    return sorted(p for p in K8S.glob("*.yaml") if p.name != "kustomization.yaml")


def by_kind() -> dict[str, list[dict]]:
    out: dict[str, list[dict]] = {}
    for path in manifest_files():
        for d in docs(path):
            out.setdefault(d["kind"], []).append(d)
    return out


def load_sizing():
    spec = importlib.util.spec_from_file_location("sizing_bench", ROOT / "bench" /
                                                  "sizing_bench.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules.setdefault("sizing_bench", module)  # dataclasses look their module up
    spec.loader.exec_module(module)
    return module


def quantity_bytes(q: str) -> float:
    """Kubernetes memory quantity (binary and decimal suffixes) in bytes."""
    m = re.fullmatch(r"(\d+(?:\.\d+)?)(Ki|Mi|Gi|Ti|k|M|G|T)?", q)
    assert m, q
    scale = {"Ki": 2**10, "Mi": 2**20, "Gi": 2**30, "Ti": 2**40, "k": 1e3, "M": 1e6,
             "G": 1e9, "T": 1e12, None: 1}[m.group(2)]
    return float(m.group(1)) * scale


def env_of(container: dict) -> dict[str, str]:
    return {e["name"]: e.get("value") for e in container.get("env", [])}


def serving() -> tuple[dict, dict]:
    (deployment,) = by_kind()["Deployment"]
    (container,) = deployment["spec"]["template"]["spec"]["containers"]
    return deployment, container


# -- Kubernetes ----------------------------------------------------------------------------
@pytest.mark.parametrize("version", K8S_VERSIONS)
@pytest.mark.parametrize("path", manifest_files(), ids=lambda p: p.name)
def test_manifest_validates_against_the_kubernetes_schemas(path, version):
    found = docs(path)
    assert found, f"{path.name} holds no resource"
    for doc in found:
        # strict: unknown fields (a typo'd key) fail too
        kubernetes_validate.validate(doc, version, strict=True)


def test_kustomization_lists_every_serving_manifest_and_no_job():
    kust = yaml.safe_load((K8S / "kustomization.yaml").read_text())
    assert kust["apiVersion"] == "kustomize.config.k8s.io/v1beta1"
    assert kust["kind"] == "Kustomization"
    listed = set(kust["resources"])
    jobs = {p.name for p in manifest_files() if all(d["kind"] == "Job" for d in docs(p))}
    assert listed == {p.name for p in manifest_files()} - jobs
    assert jobs == {"train-job.yaml", "release-job.yaml", "rollback-job.yaml"}
    _, container = serving()
    assert [i["name"] for i in kust["images"]] == [container["image"].split(":")[0]]


def test_the_old_single_file_manifest_is_gone():
    assert not (K8S / "kridge.yaml").exists()


def test_deployment_probes_ports_drain_and_grace_agree_with_the_service(monkeypatch,
                                                                         tmp_path):
    from service import gunicorn_config

    deployment, container = serving()
    pod = deployment["spec"]["template"]["spec"]
    env = env_of(container)
    ports = {p["name"]: p["containerPort"] for p in container["ports"]}
    assert int(env["KRIDGE_BIND"].rsplit(":", 1)[1]) == ports["http"]
    assert env["KRIDGE_BIND"].startswith("0.0.0.0:")  # reachable from the pod network

    routes = {r.rule for r in create_app(Settings(store=str(tmp_path)), watch=False)
              .url_map.iter_rules()}
    probes = {k: container[k]["httpGet"] for k in ("readinessProbe", "livenessProbe",
                                                   "startupProbe")}
    assert probes["readinessProbe"]["path"] == "/readyz"
    assert probes["livenessProbe"]["path"] == probes["startupProbe"]["path"] == "/healthz"
    for probe in probes.values():
        assert probe["path"] in routes and probe["port"] in ports

    # the values the service itself reads from this environment
    for name, value in env.items():
        if value is not None:
            monkeypatch.setenv(name, value)
    drain = drain_seconds()
    assert drain == 10 and worker_count() == 2
    ready = container["readinessProbe"]
    # the balancer sees the 503 (one failed probe, at most one period plus its timeout
    # after SIGTERM) well before the drain ends
    notice = ready["periodSeconds"] * ready.get("failureThreshold", 3) + ready["timeoutSeconds"]
    assert drain >= 2 * notice
    # the kubelet's SIGKILL comes after the drain and gunicorn's graceful stop
    assert pod["terminationGracePeriodSeconds"] > drain + gunicorn_config.graceful_timeout
    # a long request must not make the liveness probe kill a busy pod: gunicorn's worker
    # timeout is what ends a stuck worker
    live = container["livenessProbe"]
    assert live["periodSeconds"] * live["failureThreshold"] >= 3 * live["timeoutSeconds"]


def test_deployment_secret_store_security_and_spread():
    deployment, container = serving()
    pod = deployment["spec"]["template"]["spec"]
    (token,) = [e for e in container["env"] if e["name"] == "KRIDGE_ADMIN_TOKEN"]
    assert set(token["valueFrom"]) == {"secretKeyRef"} and "value" not in token
    mounts = {m["name"]: m for m in container["volumeMounts"]}
    volumes = {v["name"]: v for v in pod["volumes"]}
    store = mounts["store"]
    assert store["readOnly"] is True and store["mountPath"] == env_of(container)["KRIDGE_STORE"]
    claim = volumes["store"]["persistentVolumeClaim"]
    assert claim["readOnly"] is True
    pvcs = {p["metadata"]["name"]: p for p in by_kind()["PersistentVolumeClaim"]}
    assert pvcs[claim["claimName"]]["spec"]["accessModes"] == ["ReadWriteMany"]
    # non-root as the image's user; nothing writable but /tmp
    assert pod["securityContext"]["runAsNonRoot"] is True
    assert pod["securityContext"]["runAsUser"] == dockerfile_user("serve")
    assert container["securityContext"]["readOnlyRootFilesystem"] is True
    assert {m["mountPath"] for m in mounts.values() if not m.get("readOnly")} == {"/tmp"}
    labels = deployment["spec"]["template"]["metadata"]["labels"]
    assert deployment["spec"]["selector"]["matchLabels"].items() <= labels.items()
    (term,) = pod["affinity"]["podAntiAffinity"][
        "preferredDuringSchedulingIgnoredDuringExecution"]
    assert term["podAffinityTerm"]["topologyKey"] == "kubernetes.io/hostname"
    assert term["podAffinityTerm"]["labelSelector"]["matchLabels"].items() <= labels.items()
    assert "replicas" not in deployment["spec"]  # the autoscaler owns the count


def test_service_autoscaler_and_disruption_budget_point_at_the_deployment():
    deployment, container = serving()
    labels = deployment["spec"]["template"]["metadata"]["labels"]
    kinds = by_kind()
    (svc,) = kinds["Service"]
    assert svc["spec"]["selector"].items() <= labels.items()
    assert [p["targetPort"] for p in svc["spec"]["ports"]] == ["http"]
    (hpa,) = kinds["HorizontalPodAutoscaler"]
    ref = hpa["spec"]["scaleTargetRef"]
    assert (ref["kind"], ref["name"]) == ("Deployment", deployment["metadata"]["name"])
    assert [m["resource"]["name"] for m in hpa["spec"]["metrics"]] == ["cpu"]
    assert "cpu" in container["resources"]["requests"]  # utilisation is relative to it
    (pdb,) = kinds["PodDisruptionBudget"]
    assert pdb["spec"]["selector"]["matchLabels"].items() <= labels.items()
    assert pdb["spec"]["maxUnavailable"] < hpa["spec"]["minReplicas"]


def test_deployment_resources_follow_the_sizing_formula():
    sizing = load_sizing()
    deployment, container = serving()
    notes = deployment["metadata"]["annotations"]
    env = env_of(container)
    workers = int(env["KRIDGE_WORKERS"])
    need = sizing.plan(int(notes["kridge.sizing/training-rows"]),
                       int(notes["kridge.sizing/features"]),
                       targets=int(notes["kridge.sizing/targets"]), workers=workers,
                       max_rows=int(env.get("KRIDGE_MAX_ROWS") or Settings().max_rows))
    res = container["resources"]
    memory = quantity_bytes(res["requests"]["memory"])
    assert 1.5 * need["memory_bytes"] <= memory <= 4 * need["memory_bytes"]
    assert res["limits"]["memory"] == res["requests"]["memory"]
    assert int(res["requests"]["cpu"]) == workers == int(res["limits"]["cpu"])


def test_jobs_run_real_commands_on_the_shared_store():
    kinds = by_kind()
    _, server = serving()
    pvcs = {p["metadata"]["name"] for p in kinds["PersistentVolumeClaim"]}
    parser = build_parser()
    commands = set()
    for job in kinds["Job"]:
        pod = job["spec"]["template"]["spec"]
        (c,) = pod["containers"]
        assert c["image"].startswith("kridge-train:") and pod["restartPolicy"] == "Never"
        env = env_of(c)
        # Kubernetes expands $(NAME) from the container's env; the result must parse
        args = [re.sub(r"\$\((\w+)\)", lambda m, env=env: env[m.group(1)], a)
                for a in c["args"]]
        parsed = parser.parse_args(args)
        commands.add(parsed.command)
        mounts = {m["name"]: m for m in c["volumeMounts"]}
        claims = {v["name"]: v["persistentVolumeClaim"]["claimName"]
                  for v in pod["volumes"] if "persistentVolumeClaim" in v}
        assert set(claims.values()) <= pvcs
        assert claims["store"] == "kridge-store" and not mounts["store"].get("readOnly")
        assert mounts["store"]["mountPath"] == env["KRIDGE_STORE"] == \
            env_of(server)["KRIDGE_STORE"]
        if parsed.command == "train":
            assert parsed.release and mounts["inputs"]["readOnly"] is True
            assert parsed.data.startswith(mounts["inputs"]["mountPath"] + "/")
        assert pod["securityContext"]["runAsUser"] == dockerfile_user("train")
    assert commands == {"train", "release", "rollback"}


# -- settings ------------------------------------------------------------------------------
def test_cgroup_cpu_quota_caps_the_cores(tmp_path):
    v2 = tmp_path / "v2"
    v2.mkdir()
    (v2 / "cpu.max").write_text("150000 100000\n")
    assert cgroup_cpu_limit(v2) == 1.5
    (v2 / "cpu.max").write_text("max 100000\n")
    assert cgroup_cpu_limit(v2) is None
    v1 = tmp_path / "v1" / "cpu"
    v1.mkdir(parents=True)
    (v1 / "cpu.cfs_quota_us").write_text("200000\n")
    (v1 / "cpu.cfs_period_us").write_text("100000\n")
    assert cgroup_cpu_limit(tmp_path / "v1") == 2.0
    (v1 / "cpu.cfs_quota_us").write_text("-1\n")
    assert cgroup_cpu_limit(tmp_path / "v1") is None
    assert cgroup_cpu_limit(tmp_path / "none") is None


@pytest.mark.parametrize("raw, words", [("soon", "not a number"), ("-1", "[0, 3600)"),
                                        ("7200", "[0, 3600)")])
def test_bad_drain_setting_names_the_variable(monkeypatch, raw, words):
    monkeypatch.setenv("KRIDGE_DRAIN_SECONDS", raw)
    with pytest.raises(ValueError, match=re.escape(words)) as err:
        drain_seconds()
    assert "KRIDGE_DRAIN_SECONDS" in str(err.value)


# -- gunicorn ------------------------------------------------------------------------------
def test_gunicorn_config_loads_with_gunicorns_own_parser(tmp_path):
    """`gunicorn --print-config` parses the config, imports the app and prints every
    resolved setting."""
    env = {"PATH": "/usr/bin:/bin", "KRIDGE_STORE": str(tmp_path), "KRIDGE_WORKERS": "3",
           "KRIDGE_BIND": "127.0.0.1:9", "PYTHONPATH": str(ROOT)}
    r = subprocess.run([sys.executable, "-m", "gunicorn", "-c", "deploy/gunicorn.conf.py",
                        "--print-config"], cwd=ROOT, env=env, capture_output=True, text=True,
                       timeout=60)
    assert r.returncode == 0, r.stderr
    cfg = dict(re.match(r"(\w+)\s+= (.*)", line).groups()
               for line in r.stdout.splitlines() if re.match(r"\w+\s+= ", line))
    assert cfg["workers"] == "3" and cfg["bind"] == "['127.0.0.1:9']"
    assert cfg["worker_class"] == "service.threaded_worker.DeadlineWorker"
    assert cfg["threads"] == "4" and cfg["keepalive"] == "5" and cfg["http_protocols"] == "['h1']"
    assert cfg["graceful_timeout"] == "10"
    assert cfg["accesslog"] == "None" and cfg["errorlog"] == "-"  # text log on stderr
    assert cfg["wsgi_app"] == "service.wsgi:app"
    for hook in ("on_starting", "when_ready", "child_exit"):
        assert cfg[hook] == f"<{hook}()>"  # ours, not gunicorn's no-op default
    if "control_socket_disable" in cfg:
        assert cfg["control_socket_disable"] == "True"


# -- container -----------------------------------------------------------------------------
def dockerfile_stages() -> dict[str, dict]:
    """Parse deploy/Dockerfile: instructions per stage, line continuations joined."""
    text = (ROOT / "deploy" / "Dockerfile").read_text()
    logical, buf = [], ""
    for line in text.splitlines():
        if not buf and (not line.strip() or line.lstrip().startswith("#")):
            continue
        if line.rstrip().endswith("\\"):
            buf += line.rstrip()[:-1] + " "
            continue
        logical.append(buf + line)
        buf = ""
    stages: dict[str, dict] = {}
    current = None
    for line in logical:
        op, _, rest = line.strip().partition(" ")
        op = op.upper()
        if op == "FROM":
            words = rest.split()
            name = words[2] if len(words) == 3 and words[1].upper() == "AS" else str(len(stages))
            current = stages[name] = {"from": words[0], "ops": [], "order": len(stages)}
            continue
        assert current is not None, f"{op} before FROM"
        current["ops"].append((op, rest.strip()))
    return stages


def stage_chain(stages: dict, name: str) -> list[tuple[str, str]]:
    """The instructions a stage runs, its parent stages' first."""
    stage = stages[name]
    parent = stage["from"]
    return (stage_chain(stages, parent) if parent in stages else []) + stage["ops"]


def dockerfile_user(stage: str) -> int:
    users = [rest for op, rest in stage_chain(dockerfile_stages(), stage) if op == "USER"]
    uid = users[-1].split(":")[0]
    assert uid.isdigit(), "USER must be numeric for runAsNonRoot to verify it"
    return int(uid)


def test_serving_image_holds_the_runtime_only_and_runs_unprivileged():
    stages = dockerfile_stages()
    last = max(stages, key=lambda s: stages[s]["order"])
    assert last == "serve"  # a plain `docker build` makes the serving image
    chain = stage_chain(stages, "serve")
    runs = " ".join(rest for op, rest in chain if op == "RUN")
    for pkg in (*TRAINING_ONLY, "scikit-learn", "[train]", "[dev]", "requirements"):
        assert pkg not in runs, f"serving image installs {pkg}"
    assert re.search(r"pip install \.(\s|$)", runs)  # the package with its runtime deps
    tomllib = pytest.importorskip("tomllib")  # Python ≥ 3.11
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    runtime = " ".join(project["dependencies"]).lower()
    for pkg in (*TRAINING_ONLY, "scikit-learn"):
        assert pkg not in runtime
    ops = dict(chain)  # the last of each instruction wins, as in Docker
    assert int(ops["USER"].split(":")[0]) > 0
    env = dict(kv.split("=", 1) for op, rest in chain if op == "ENV"
               for kv in shlex.split(rest))
    assert ops["EXPOSE"] == env["KRIDGE_BIND"].rsplit(":", 1)[1]
    assert env["KRIDGE_ACCESS_LOG"] == "-" and float(env["KRIDGE_DRAIN_SECONDS"]) > 0
    health = ops["HEALTHCHECK"]
    assert "/healthz" in health and "--timeout=" in health
    cmd = json.loads(ops["CMD"])  # exec form: gunicorn is PID 1 and receives SIGTERM
    assert cmd[:3] == ["gunicorn", "-c", "deploy/gunicorn.conf.py"]
    for op, rest in chain:
        if op == "COPY":
            for src in rest.split()[:-1]:
                assert (ROOT / src).exists(), f"COPY {src}: no such file"


def test_dockerignore_keeps_local_state_out_of_the_build_context():
    lines = [ln.strip() for ln in (ROOT / ".dockerignore").read_text().splitlines()
             if ln.strip() and not ln.startswith("#")]
    assert lines[0] == "*"  # deny everything, then allow what the Dockerfile copies
    allowed = {ln[1:].rstrip("/") for ln in lines if ln.startswith("!")}
    copied = {src.rstrip("/") for stage in dockerfile_stages().values()
              for op, rest in stage["ops"] if op == "COPY" for src in rest.split()[:-1]}
    assert copied == allowed


BLOCKER = textwrap.dedent(f"""
    # Loaded at interpreter start (sitecustomize): the serving path must not need these.
    import importlib.abc, sys

    BLOCKED = {TRAINING_ONLY!r}

    class RefuseTrainingLibraries(importlib.abc.MetaPathFinder):
        def find_spec(self, name, path=None, target=None):
            if name.split(".")[0] in BLOCKED:
                raise ImportError(f"{{name}} is not in the serving image")
            return None

    sys.meta_path.insert(0, RefuseTrainingLibraries())
""")


def test_kridge_serve_runs_with_the_training_libraries_hidden(tmp_path, small_csv):
    store = tmp_path / "store"
    assert main(["train", str(small_csv), "--name", "c", "--release", "--store", str(store),
                 "--target", "hardness_s", "--features", ",".join(TYPICAL_ROW),
                 "--gamma", "0.2", "--ridge", "0.5", "--no-report", "--quiet"]) == 0
    hide = tmp_path / "hide"
    hide.mkdir()
    (hide / "sitecustomize.py").write_text(BLOCKER)
    probe = subprocess.run([sys.executable, "-c", "import scipy"], capture_output=True,
                           text=True, env={"PYTHONPATH": str(hide)})
    assert probe.returncode != 0 and "not in the serving image" in probe.stderr  # it bites
    port = free_port()
    log = tmp_path / "serve.log"
    env = {"PATH": "/usr/bin:/bin", "PYTHONPATH": f"{hide}:{ROOT}",
           "KRIDGE_ACCESS_LOG": "-"}
    with open(log, "w") as out:
        proc = subprocess.Popen([sys.executable, "-m", "trainer.cli", "serve", "--bind",
                                 f"127.0.0.1:{port}", "--workers", "1", "--store", str(store)],
                                env=env, stdout=out, stderr=subprocess.STDOUT, cwd=tmp_path)
        try:
            base = f"http://127.0.0.1:{port}"
            for _ in range(600):
                assert proc.poll() is None, log.read_text()
                try:
                    ready = requests.get(base + "/readyz", timeout=1)
                    break
                except (requests.ConnectionError, requests.Timeout):  # still booting
                    time.sleep(0.1)
            assert ready.status_code == 200, ready.text
            r = requests.post(base + "/models/c/predict", json={"rows": [TYPICAL_ROW]},
                              timeout=10)
            assert r.status_code == 200, r.text
            assert requests.get(base + "/metrics", timeout=10).status_code == 200
        finally:
            proc.terminate()
            proc.wait(timeout=30)
    text = log.read_text()
    assert "not in the serving image" not in text and "Traceback" not in text
    assert '"route":"/models/<name>/predict"' in text  # JSON access log on stdout


# -- single host ---------------------------------------------------------------------------
def test_systemd_unit_stops_through_the_drain():
    from service import gunicorn_config

    entries: dict[str, list[str]] = {}
    for line in (ROOT / "deploy" / "kridge.service").read_text().splitlines():
        if "=" in line and not line.startswith("#"):
            key, value = line.split("=", 1)
            entries.setdefault(key, []).append(value)
    env = dict(v.split("=", 1) for v in entries["Environment"])
    assert entries["KillMode"] == ["mixed"]  # SIGTERM to the master only: it drains
    stop = float(entries["TimeoutStopSec"][0])
    assert stop > float(env["KRIDGE_DRAIN_SECONDS"]) + gunicorn_config.graceful_timeout
    assert entries["ExecStart"][0].endswith("kridge serve")
    assert env["KRIDGE_ACCESS_LOG"] == "-"
