"""The distribution as a user's pip builds it: no setuptools warnings, and the pages'
templates and stylesheet inside the wheel and the sdist."""

from __future__ import annotations

import shutil
import subprocess
import sys
import tarfile
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
#: What setuptools prints when package data is declared wrongly, or an install warns.
WARNING_MARKS = ("would be ignored", "package_data", "package-data", "!!",
                 "SetuptoolsDeprecationWarning", "BuildBackendWarning", "is absent from the")


@pytest.mark.slow
def test_wheel_and_sdist_build_without_warnings_and_carry_the_page_files(tmp_path):
    pytest.importorskip("build")
    src = tmp_path / "src"  # a copy: building writes build/ and *.egg-info beside the sources
    shutil.copytree(ROOT, src, ignore=shutil.ignore_patterns(
        ".venv", ".git", "kridge-store", "build", "*.egg-info", "__pycache__", ".pytest_cache",
        ".ruff_cache", "artifacts", "results"))
    out = tmp_path / "dist"
    run = subprocess.run([sys.executable, "-m", "build", "--outdir", str(out), str(src)],
                         capture_output=True, text=True, timeout=600)
    assert run.returncode == 0, run.stderr[-2000:]
    log = run.stdout + run.stderr
    found = [line for line in log.splitlines() if any(m in line for m in WARNING_MARKS)]
    assert not found, found
    pages = sorted(p.relative_to(ROOT).as_posix()
                   for p in [*(ROOT / "service" / "templates").glob("*.html"),
                             *(ROOT / "service" / "static").glob("*.css")])
    assert pages  # the pages exist in the checkout
    (wheel,) = out.glob("*.whl")
    with zipfile.ZipFile(wheel) as z:
        names = set(z.namelist())
    assert set(pages) <= names, set(pages) - names
    assert "trainer/read/labels.py" in names and "trainer/nystrom/rank.py" in names
    (sdist,) = out.glob("*.tar.gz")
    with tarfile.open(sdist) as t:
        inside = {n.split("/", 1)[1] for n in t.getnames() if "/" in n}
    assert set(pages) <= inside, set(pages) - inside
