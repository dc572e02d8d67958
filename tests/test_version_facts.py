"""Versions told apart: `kridge versions`, `kridge inspect MODEL A B` and the model page show
method, features, training rows, data fingerprint and held-out error, for manifests of
schema 1 (the fixture store) and 2 (written now)."""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from cli_helpers import run_cli

from service.app import create_app
from service.settings import Settings

FIXTURE = Path(__file__).parent / "fixtures" / "store_schema1"
FEATURES = ["oven_temp_c", "line_speed_m_min", "wet_film_um", "humidity_pct",
            "viscosity_mpas"]


def sha12(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()[:12]


@pytest.fixture
def store(tmp_path, small_csv) -> Path:
    """The schema-1 fixture (coat v1), then v2 (schema 2, exact, 5 features) and v3
    (Nyström on 20 landmarks, 3 features, another ridge and gamma)."""
    root = tmp_path / "store"
    shutil.copytree(FIXTURE, root)
    common = ["train", str(small_csv), "--name", "coat", "--store", str(root), "--target",
              "hardness_s", "--no-report", "--quiet"]
    assert main_ok(common + ["--features", ",".join(FEATURES), "--gamma", "0.3",
                             "--ridge", "0.01"])
    assert main_ok(common + ["--features", ",".join(FEATURES[:3]), "--gamma", "0.5",
                             "--ridge", "0.1", "--method", "nystrom", "--landmarks", "20"])
    return root


def main_ok(argv: list[str]) -> bool:
    from trainer.cli import main
    return main(argv) == 0


def test_versions_shows_what_tells_them_apart(store, small_csv, capsys):
    code, out, err = run_cli(capsys, "versions", "coat", "--store", store)
    assert code == 0, err
    lines = {line.split()[0] if not line.startswith("*") else line.split()[1]: line
             for line in out.splitlines()[2:]}
    old = json.loads((FIXTURE / "coat/versions/1/manifest.json").read_text())
    assert old["schema"] == 1
    # schema 1: figures as its manifest holds them
    assert "exact" in lines["1"] and "oven_temp_c, line_speed_m_min, wet_film_um" in lines["1"]
    assert " 40 " in lines["1"] and old["training"]["data_sha256"][:12] in lines["1"]
    assert f"holdout RMSE {old['metrics']['holdout']['hardness_s']['rmse']:.4g}" in lines["1"]
    # schema 2: the data fingerprint is the training file's own sha256
    data = sha12(small_csv.read_bytes())
    assert "exact" in lines["2"] and ", ".join(FEATURES) in lines["2"] and data in lines["2"]
    assert "nystrom (20 landmarks)" in lines["3"] and data in lines["3"]
    assert " 60 " in lines["2"] and "holdout RMSE" in lines["3"]
    code, out, _ = run_cli(capsys, "versions", "coat", "--store", store, "--json")
    doc = json.loads(out)
    assert doc["versions"] == [1, 2, 3] and doc["live"] == 1
    assert [d["method"] for d in doc["details"]] == ["exact", "exact", "nystrom (20 landmarks)"]
    assert [d["feature_count"] for d in doc["details"]] == [3, 5, 3]
    assert doc["details"][2]["data_sha256"] == data


def test_many_features_show_as_a_count_and_a_hash(tmp_path, capsys):
    rng = np.random.default_rng(3)
    names = [f"f{i}" for i in range(8)]
    x = rng.normal(size=(40, 8))
    csv = tmp_path / "wide.csv"
    csv.write_text(",".join([*names, "y"]) + "\n" + "\n".join(
        ",".join(f"{v:.6f}" for v in [*row, row.sum()]) for row in x) + "\n")
    assert main_ok(["train", str(csv), "--name", "wide", "--store", str(tmp_path / "s"),
                    "--target", "y", "--gamma", "0.1", "--ridge", "0.1", "--no-report",
                    "--quiet"])
    capsys.readouterr()  # the training summary
    code, out, _ = run_cli(capsys, "versions", "wide", "--store", tmp_path / "s")
    assert code == 0
    expected = hashlib.sha256("\n".join(names).encode()).hexdigest()[:12]
    assert f"8 features, sha256 {expected}" in out and "f0, f1" not in out


def test_inspect_a_b_names_what_changed(store, capsys):
    code, out, err = run_cli(capsys, "inspect", "coat", "1", "3", "--store", store)
    assert code == 0, err
    text = dict(line.split(None, 1) if "  " not in line else
                [p.strip() for p in line.split("  ", 1)] for line in out.splitlines())
    assert text["model"] == "coat: v1 → v3"
    assert text["method"] == "exact → nystrom (20 landmarks)"
    assert text["kernel gamma"] == "0.3 → 0.5"
    v3 = json.loads((store / "coat/versions/3/manifest.json").read_text())
    assert text["training rows"] == f"40 → {v3['training']['rows']}"
    assert text["ridge"].endswith("→ 0.1")
    assert text["holdout hardness_s"].startswith("RMSE ")
    code, out, _ = run_cli(capsys, "inspect", "coat", "2", "3", "--store", store, "--json")
    doc = json.loads(out)
    ch = doc["changes"]
    assert (doc["from"], doc["to"]) == (2, 3)
    assert ch["features_removed"] == FEATURES[3:] and ch["features_added"] == []
    assert ch["kernel_params"] == {"gamma": {"from": 0.3, "to": 0.5}}
    assert ch["ridge"] == {"from": 0.01, "to": 0.1}
    assert "data_sha256" not in ch and "method" in ch  # the same file, another method
    assert set(ch["metrics"]["holdout"]["hardness_s"]) >= {"rmse", "r2"}
    code, out, _ = run_cli(capsys, "inspect", "coat", "2", "2", "--store", store)
    assert code == 0 and "none: the two versions hold the same figures" in out


def test_inspect_a_b_with_a_missing_version_is_a_user_error(store, capsys):
    code, _, err = run_cli(capsys, "inspect", "coat", "1", "9", "--store", store)
    assert code == 2 and "9" in err
    code, _, err = run_cli(capsys, "inspect", "coat", "1", "x", "--store", store)
    assert code == 2


def test_the_model_page_shows_method_features_and_data(store, small_csv):
    app = create_app(Settings(store=str(store)), watch=False)
    page = app.test_client().get("/page/coat").get_data(as_text=True)
    for label in ("Method", "Features", "Training rows", "Data sha256"):
        assert f">{label}</th>" in page
    assert "nystrom (20 landmarks)" in page and "exact" in page
    assert sha12(small_csv.read_bytes()) in page
    assert "a0f43c388739" in page  # the schema-1 version's own fingerprint
    assert "<bdi>humidity_pct</bdi>" in page
