"""Shared fixtures: a fresh store per test and the demo data file."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DEMO_CSV = ROOT / "demo_data" / "coating_line.csv"
sys.path[:0] = [str(ROOT), str(ROOT / "demo_data")]  # bench/ helpers, the demo generator


@pytest.fixture
def store_dir(tmp_path, monkeypatch) -> Path:
    """An empty store root; KRIDGE_STORE points at it for the test's duration."""
    root = tmp_path / "store"
    monkeypatch.setenv("KRIDGE_STORE", str(root))
    return root


@pytest.fixture(scope="session")
def demo_csv() -> Path:
    return DEMO_CSV


@pytest.fixture
def small_csv(tmp_path, demo_csv):
    """The first 60 rows of the demo data: enough for a real model, fast to fit."""
    lines = demo_csv.read_text().splitlines()[:61]
    path = tmp_path / "small.csv"
    path.write_text("\n".join(lines) + "\n")
    return path
