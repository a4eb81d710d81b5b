"""The recipes and the demo run as a user would run them."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from filial import recipe as recipes

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


SHIPPED = sorted(p.name for p in (ROOT / "recipes").glob("*.toml"))


@pytest.mark.parametrize("name", SHIPPED)
def test_every_shipped_recipe_resolves_and_its_factories_take_its_keys(name):
    recipe = recipes.load(ROOT / "recipes" / name)
    for section in ("data", "model"):
        recipe.factory(section)  # imports the factory and binds the recipe's keys


def test_every_shipped_recipe_is_run_by_a_test():
    """Each recipes/*.toml is run end to end somewhere in tests/ (the digits ones in
    test_cli.py, the CIFAR ones over FakeData in test_vision.py): a new recipe needs a test."""
    sources = {p.name: p.read_text() for p in Path(__file__).parent.glob("test_*.py")}
    del sources[Path(__file__).name]
    unrun = [name for name in SHIPPED if not any(f'"{name}"' in s for s in sources.values())]
    assert SHIPPED and not unrun, f"no test runs {unrun}"
