"""The recipes and the demo run as a user would run them."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.slow
def test_own_loop_recipe_runs(tmp_path):
    run_dir = tmp_path / "own"
    command = [
        sys.executable,
        str(ROOT / "recipes" / "own_loop.py"),
        "--epochs",
        "3",
        "--generations",
        "1",
        "--run-dir",
        str(run_dir),
    ]
    done = subprocess.run(command, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert "best generation" in done.stdout and "test accuracy of the kept model" in done.stdout
    assert (run_dir / "lineage.json").is_file() and (run_dir / "gen1" / "student.pt").is_file()


@pytest.mark.slow
def test_demo_prints_one_row_per_generation(tmp_path):
    command = [
        sys.executable,
        "-m",
        "filial.demo",
        "--epochs",
        "3",
        "--generations",
        "2",
        "--patience",
        "5",
        "--run-dir",
        str(tmp_path / "demo"),
    ]
    done = subprocess.run(command, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    rows = [line.split() for line in done.stdout.splitlines() if line[:4].strip().isdigit()]
    assert [row[0] for row in rows] == ["0", "1", "2"]
    assert "stopped: max-generations" in done.stdout
