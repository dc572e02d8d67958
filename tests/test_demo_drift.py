"""The demo's second period: a raw-material change that ``kridge drift`` detects, that the
live version's weekly error shows, and on which a retrained version wins the comparison
(our own generator, demo_data/make_coating_data.py, at a small first period)."""

from __future__ import annotations

import json

import make_coating_data as gen
import numpy as np
import pytest

from tests.cli_helpers import run_cli
from trainer.compare_cli import EXIT_NOT_BETTER
from trainer.demo_story import FRESH_SINCE, story_lines

ROOT_DATA = gen.Path(gen.__file__).parent
TARGETS = "hardness_s,gloss_gu"


def test_committed_files_are_the_generators_output(tmp_path):
    gen.write_all(tmp_path)
    for name in ("coating_line.csv", "coating_line_after_change.csv",
                 "coating_line_retrain.csv"):
        assert (tmp_path / name).read_bytes() == (ROOT_DATA / name).read_bytes(), name


def test_fresh_weeks_start_where_the_retraining_file_stops():
    start = gen.CHANGE_START + np.timedelta64(int(gen.RETRAIN_DAYS * 86400), "s")
    assert f"{start}Z" == FRESH_SINCE
    lines = "\n".join(story_lines(ROOT_DATA, "coating", "/tmp/s", TARGETS.split(",")))
    assert f"--since {FRESH_SINCE}" in lines and "kridge drift coating" in lines


@pytest.fixture(scope="module")
def story(tmp_path_factory):
    root = tmp_path_factory.mktemp("story")
    gen.write_all(root, rows=400)
    store = str(root / "store")
    code = run_train(root / "coating_line.csv", store, release=True)
    assert code == 0
    return root, store


def run_train(path, store, release=False):
    from trainer.cli import main

    args = ["train", str(path), "--target", TARGETS, "--name", "coating", "--no-report",
            "--quiet", "--store", store]
    return main(args + (["--release"] if release else []))


def test_drift_detected_error_rises_and_the_retrained_version_wins(capsys, story):
    root, store = story
    capsys.readouterr()  # the fixture's training summary
    after = root / "coating_line_after_change.csv"
    code, out, _ = run_cli(capsys, "drift", "coating", after, "--fail-on-drift", "0.01",
                           "--permutations", "100", "--store", store, "--json")
    doc = json.loads(out)
    assert code == 1 and doc["p_value"] < 0.01
    top = max(doc["features"], key=lambda f: f["mmd_drop"])["feature"]
    assert top == "viscosity_mpas"  # the new resin's viscosity

    code, out, err = run_cli(capsys, "compare", "coating", after, "--time", "sampled_at",
                             "--json", "--permutations", "50", "--store", store)
    assert code == 0, err
    weeks = json.loads(out)["versions"][0]["targets"]["hardness_s"]["windows"]
    assert len(weeks) == 8
    assert weeks[-1]["rmse"] > 2 * weeks[0]["rmse"] and weeks[-1]["bias"] < -5

    assert run_train(root / "coating_line_retrain.csv", store) == 0
    capsys.readouterr()
    code, out, err = run_cli(capsys, "compare", "coating", after, "--time", "sampled_at",
                             "--since", FRESH_SINCE, "--require-better", "0.05",
                             "--permutations", "50", "--store", store, "--json")
    assert code == 0, err
    doc = json.loads(out)
    assert doc["gate"]["passed"] and doc["gate"]["candidate"] == 2
    assert {v["outcome"] for v in doc["verdicts"]} == {"better"}
    # released, the new version is the baseline, and the old one does not pass against it
    assert run_cli(capsys, "release", "coating", "2", "--store", store)[0] == 0
    code, out, _ = run_cli(capsys, "compare", "coating", after, "--time", "sampled_at",
                           "--since", FRESH_SINCE, "--versions", "1,2", "--require-better",
                           "0.05", "--permutations", "20", "--store", store)
    assert code == EXIT_NOT_BETTER and "live v2 beats v1" in out
