"""The boundaries the README promises: the runtime (``service``) runs without the trainer's
packages, and the benches stand on the project's public code, not on the tests."""

from __future__ import annotations

import ast
import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
FORBIDDEN = ("trainer", "scipy", "sklearn", "matplotlib")

#: Import the runtime, build the app, load a model and answer one request through the app;
#: then list every loaded module whose top-level package is forbidden. ``extra`` lets the
#: control case import something the check must catch.
PROBE = """
import json, sys
store, extra, forbidden = sys.argv[1], sys.argv[2], sys.argv[3].split(",")
for name in sys.argv[4].split(",") if sys.argv[4] else ():
    sys.modules[name] = None  # as if not installed: importing it raises ImportError
import service
from service import load_model
from service.app import create_app
from service.settings import Settings
if extra:
    __import__(extra)
app = create_app(Settings(store=store), watch=False)
model = load_model(store, "coat")
with app.test_client() as client:
    r = client.post("/models/coat/predict", json={"rows": [[250, 20, 40, 50, 1000]]})
loaded = sorted(n for n in sys.modules if n.split(".")[0] in forbidden and sys.modules[n])
print(json.dumps({"status": r.status_code, "version": model.version, "loaded": loaded}))
"""


def train_small(root: Path, demo_csv: Path, *kernel: str) -> Path:
    """A 60-row coating model in a fresh store (``kernel``: extra ``--kernel`` arguments)."""
    csv = root.parent / "small.csv"
    csv.write_text("\n".join(demo_csv.read_text().splitlines()[:61]) + "\n")
    code = subprocess.run(
        [sys.executable, "-m", "trainer.cli", "train", str(csv), "--name", "coat",
         "--target", "hardness_s",
         "--features", "oven_temp_c,line_speed_m_min,wet_film_um,humidity_pct,viscosity_mpas",
         "--gamma", "0.2", "--ridge", "0.5", "--release", "--no-report", "--quiet",
         *kernel, "--store", str(root)], capture_output=True, text=True, timeout=300)
    assert code.returncode == 0, code.stderr
    return root


@pytest.fixture(scope="module")
def store(tmp_path_factory, demo_csv) -> Path:
    return train_small(tmp_path_factory.mktemp("boundary") / "store", demo_csv)


def probe(store: Path, extra: str = "", forbidden: tuple[str, ...] = FORBIDDEN,
          absent: tuple[str, ...] = ()) -> dict:
    """Run PROBE in a fresh interpreter; ``absent`` packages behave as if not installed."""
    argv = [sys.executable, "-c", PROBE, str(store), extra, ",".join(forbidden),
            ",".join(absent)]
    r = subprocess.run(argv, capture_output=True, text=True, timeout=120, cwd=ROOT)
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout.strip().splitlines()[-1])


def test_the_runtime_loads_no_trainer_scipy_sklearn_or_matplotlib(store):
    seen = probe(store)
    assert seen["status"] == 200 and seen["version"] == 1  # the runtime really ran
    assert seen["loaded"] == []


def test_only_a_laplacian_model_loads_numba_and_it_serves_without_scipy(
    store, tmp_path, demo_csv
):
    # numba compiles the laplacian's L1 loop; an rbf model must not pay its import
    assert probe(store, forbidden=("numba",))["loaded"] == []
    laplacian = train_small(tmp_path / "store", demo_csv, "--kernel", "laplacian")
    # with scipy installed, numba's compiler loads scipy.linalg for its own linear algebra;
    # the serving image has no scipy, so the probe runs as if none were installed
    seen = probe(laplacian, forbidden=(*FORBIDDEN, "numba"), absent=FORBIDDEN)
    assert seen["status"] == 200
    assert [n for n in seen["loaded"] if n.split(".")[0] != "numba"] == []
    assert "numba" in seen["loaded"]


def test_the_boundary_check_catches_a_forbidden_import(store):
    # control: the same probe, with the trainer pulled in, must see it (and its scipy)
    seen = probe(store, "trainer.exact.solver")
    assert "trainer.exact.solver" in seen["loaded"] and "scipy" in seen["loaded"]


TEST_MODULES = {p.stem for p in (ROOT / "tests").glob("*.py")}


def _bench_import_faults(path: Path) -> list[str]:
    faults = []
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.ImportFrom) and node.module:
            top = node.module.split(".")[0]
            if top in TEST_MODULES or top == "tests":
                faults.append(f"{path.name}:{node.lineno} imports from the tests ({node.module})")
            for alias in node.names:
                dunder = alias.name.startswith("__") and alias.name.endswith("__")
                if alias.name.startswith("_") and not dunder:
                    faults.append(f"{path.name}:{node.lineno} imports private {alias.name}")
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] in TEST_MODULES | {"tests"}:
                    faults.append(f"{path.name}:{node.lineno} imports {alias.name}")
    return faults


def test_benches_import_neither_tests_nor_private_names():
    faults = [f for p in sorted((ROOT / "bench").glob("*.py")) for f in _bench_import_faults(p)]
    assert faults == []


def test_the_bench_import_check_catches_a_test_import(tmp_path):
    fake = tmp_path / "fake_bench.py"
    fake.write_text("from service_helpers import Gunicorn\nfrom service.store import _x\n")
    assert len(_bench_import_faults(fake)) == 2

