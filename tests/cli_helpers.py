"""The ``kridge`` command line as tests run it: in this process (fast, output captured by
pytest's ``capsys``) or as its own process through the installed entry point."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

from trainer.cli import main

#: The installed console script: what a user runs, in its own process.
KRIDGE = [str(Path(sys.executable).with_name("kridge"))]


def run_cli(capsys, *argv) -> tuple[int, str, str]:
    """Run the CLI in-process; returns (exit code, stdout, stderr)."""
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def kridge(*args, store: Path | None = None, timeout: float = 300) -> subprocess.CompletedProcess:
    """``kridge ARGS [--store STORE]`` in its own process, output captured as text."""
    argv = [*KRIDGE, *map(str, args)] + (["--store", str(store)] if store is not None else [])
    return subprocess.run(argv, capture_output=True, text=True, timeout=timeout)
