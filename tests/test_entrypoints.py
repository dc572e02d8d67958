"""`kridge serve` as a user starts it, and Parquet input."""

from __future__ import annotations

import signal
import subprocess
import time
from pathlib import Path

import numpy as np
import pytest
import requests
from cli_helpers import KRIDGE
from service_helpers import free_port

from service import load_model
from trainer.cli import main

ARGS = ["--target", "hardness_s", "--gamma", "0.2", "--ridge", "0.5", "--no-report", "--quiet",
        "--features", "oven_temp_c,line_speed_m_min,wet_film_um,humidity_pct,viscosity_mpas"]


def test_kridge_serve_runs_gunicorn_on_the_given_bind(small_csv, store_dir):
    assert main(["train", str(small_csv), "--name", "c", "--release", *ARGS]) == 0
    port = free_port()
    proc = subprocess.Popen([*KRIDGE, "serve", "--bind", f"127.0.0.1:{port}", "--workers", "1",
                             "--store", str(store_dir)], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                ready = requests.get(f"http://127.0.0.1:{port}/readyz", timeout=1)
                break
            except requests.RequestException:
                assert time.monotonic() < deadline and proc.poll() is None
                time.sleep(0.2)
        assert ready.status_code == 200 and ready.json()["models"] == {"c": 1}
    finally:
        proc.send_signal(signal.SIGTERM)  # `kridge serve` became the gunicorn master (exec)
        proc.wait(timeout=30)


def test_parquet_input_trains_the_same_model_as_csv(small_csv, store_dir, tmp_path):
    pytest.importorskip("pyarrow")
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    parquet = tmp_path / "small.parquet"
    pq.write_table(pacsv.read_csv(small_csv), parquet)
    assert main(["train", str(small_csv), "--name", "from-csv", *ARGS]) == 0
    assert main(["train", str(parquet), "--name", "from-parquet", *ARGS]) == 0
    a = load_model(store_dir, "from-csv", 1)
    b = load_model(store_dir, "from-parquet", 1)
    data = np.loadtxt(small_csv, delimiter=",", skiprows=1)
    x = data[:, :5]  # the process settings: the first five columns
    assert a.features == b.features
    assert np.array_equal(a.predict(x), b.predict(x))


def test_a_plain_install_carries_every_package_of_the_code():
    """``pip install .`` (the serving image's install) ships what pyproject's package rule
    finds: every folder of service/ and trainer/ that holds an ``__init__.py``."""
    import tomllib
    from setuptools import find_packages

    root = Path(__file__).resolve().parents[1]
    rule = tomllib.loads((root / "pyproject.toml").read_text())["tool"]["setuptools"]
    found = set(find_packages(where=str(root), include=rule["packages"]["find"]["include"]))
    on_disk = {".".join(p.parent.relative_to(root).parts)
               for top in ("service", "trainer") for p in (root / top).rglob("__init__.py")}
    assert on_disk <= found, sorted(on_disk - found)
