"""Holes of the fuzzing campaign that lose or lock up work (issue 17): startup kills and
interrupts, two Lineage objects on one run directory, foreign models, unusable run directories,
API misuse.

Kills are real: ``python -m filial run`` kills itself with SIGKILL at a named startup step
(``FILIAL_FAULT=start:...`` or ``write:...``, see ``filial._faults``), then the same command, and
the same command with ``--fresh``, must run to the end.
"""

from __future__ import annotations

import itertools
import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import bad_inputs
import pytest
import torch
from conftest import TinyNet
from torch import nn

import filial
from filial import cli
from filial.errors import InputError

TESTS = Path(__file__).resolve().parent

RECIPE = """
[run]
name = "startup"
seeds = [0, 1]

[data]
factory = "{data}"
{data_keys}

[model]
factory = "{model}"
{model_keys}

[training]
epochs = 1
lr = 0.1

[generations]
max = 1
patience = 5
"""


DIGITS = "train_size = 200\nheldout_size = 100"


def _recipe(
    folder: Path,
    data: str = "filial.demo:mail_room_loaders",
    model: str = "filial.demo:mlp",
    data_keys: str = DIGITS,
    model_keys: str = "hidden = [16]",
) -> Path:
    path = folder / "recipe.toml"
    path.write_text(
        RECIPE.format(data=data, model=model, data_keys=data_keys, model_keys=model_keys)
    )
    return path


def _env(fault: str | None = None) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k != "FILIAL_FAULT"}
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(TESTS), env.get("PYTHONPATH")) if p)
    if fault:
        env["FILIAL_FAULT"] = fault
    return env


def _run(recipe: Path, run_dir: Path, *extra: str, fault: str | None = None):
    command = [sys.executable, "-m", "filial", "run", str(recipe), "--run-dir", str(run_dir)]
    return subprocess.run(
        [*command, *extra], capture_output=True, text=True, env=_env(fault), timeout=300
    )


def _generations(run_dir: Path, seed: int) -> list[int]:
    state = json.loads((run_dir / f"seed{seed}" / "lineage.json").read_text())
    return [r["generation"] for r in state["records"]]


# -- kills and interrupts at every startup step --------------------------------------------------

# Each step's rerun is the same command, or (every other step) the same command with --fresh.
STARTUP = {
    "start:claimed": ("after the lock, before anything is written", ()),
    "write:run/recipe.toml": ("while recipe.toml is written", ("--fresh",)),
    "start:recipe": ("after recipe.toml, before any lineage", ()),
    "write:seed0/lineage.json": ("while seed 0's lineage.json is first written", ("--fresh",)),
    "start:seed0": ("after seed 0's lineage, before seed 1's", ()),
    "start:seed1": ("after the last lineage, before training", ("--fresh",)),
}


@pytest.mark.slow
@pytest.mark.parametrize("fault", list(STARTUP), ids=[words for words, _ in STARTUP.values()])
def test_a_kill_at_any_startup_step_leaves_a_run_that_resumes(fault, tmp_path):
    recipe, run_dir = _recipe(tmp_path), tmp_path / "run"
    killed = _run(recipe, run_dir, fault=fault)
    assert killed.returncode == -signal.SIGKILL, killed.stderr
    assert run_dir.is_dir()
    rerun = _run(recipe, run_dir, *STARTUP[fault][1])
    assert rerun.returncode == 0, rerun.stderr
    assert _generations(run_dir, 0) == _generations(run_dir, 1) == [0, 1]
    assert not list(run_dir.rglob(".*.tmp-*"))


def test_ctrl_c_at_startup_says_how_to_run_again_and_leaves_nothing(tmp_path, capsys):
    bad_inputs._interrupt_calls = itertools.count()
    recipe = _recipe(tmp_path, model="bad_inputs:interrupted_on_third_call")
    run_dir = tmp_path / "run"
    assert cli.main(["run", str(recipe), "--run-dir", str(run_dir)]) == 130
    err = capsys.readouterr().err
    assert "interrupted before any generation trained" in err and "Traceback" not in err
    assert f"filial run {recipe} --run-dir {run_dir}" in err
    assert not run_dir.exists()  # made by this call, holding no finished generation
    # An empty folder of the user's is left empty (but for the lock), and so usable again.
    run_dir.mkdir()
    bad_inputs._interrupt_calls = itertools.count()
    assert cli.main(["run", str(recipe), "--run-dir", str(run_dir)]) == 130
    assert [p.name for p in run_dir.iterdir() if p.name != ".lock"] == []
    assert cli.main(["run", str(_recipe(tmp_path)), "--run-dir", str(run_dir)]) == 0


def test_a_refused_start_in_an_empty_folder_leaves_it_empty(tmp_path, capsys):
    run_dir = tmp_path / "run"
    run_dir.mkdir()
    recipe = _recipe(tmp_path, data="bad_inputs:heldout_is_train", data_keys="")
    assert cli.main(["run", str(recipe), "--run-dir", str(run_dir)]) == 2
    assert "held-out evidence" in capsys.readouterr().err
    assert [p.name for p in run_dir.iterdir() if p.name != ".lock"] == []


def test_fresh_failures_say_what_fresh_removed(tmp_path, capsys):
    recipe, run_dir = _recipe(tmp_path), tmp_path / "run"
    assert cli.main(["run", str(recipe), "--run-dir", str(run_dir)]) == 0
    bad_inputs._calls = itertools.count()
    wider = _recipe(tmp_path, model="bad_inputs:wider_in_generation_one", model_keys="")
    capsys.readouterr()
    assert cli.main(["run", str(wider), "--run-dir", str(run_dir), "--fresh"]) == 2
    err = capsys.readouterr().err
    assert "--fresh removed the earlier run" in err and "Finished generations are kept" not in err


# -- run directories the system refuses ------------------------------------------------------------


def _unusable_paths(tmp_path: Path) -> dict[str, Path]:
    afile = tmp_path / "afile"
    afile.write_text("x")
    dangling = tmp_path / "dangling"
    dangling.symlink_to(tmp_path / "nowhere")
    paths = {
        "under a file": afile / "sub",
        "under /dev/null": Path("/dev/null/sub"),
        "in /proc": Path("/proc/filial-run-x"),
        "a dangling link": dangling,
        "a name over 255 bytes": tmp_path / ("n" * 300),
        "a name over 255 bytes, deeper": tmp_path / ("n" * 300) / "run",
    }
    if Path("/sys").is_dir():
        paths["in /sys"] = Path("/sys/filial-run-x")
    return paths


@pytest.mark.parametrize(
    "kind",
    [
        "under a file",
        "under /dev/null",
        "in /proc",
        "a dangling link",
        "a name over 255 bytes",
        "a name over 255 bytes, deeper",
        "in /sys",
    ],
)
def test_a_run_directory_the_system_refuses_is_one_filial_line(tmp_path, capsys, kind):
    paths = _unusable_paths(tmp_path)
    if kind not in paths:
        pytest.skip("no /sys here")
    run_dir = paths[kind]
    assert cli.main(["run", str(_recipe(tmp_path)), "--run-dir", str(run_dir)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("filial: ") and "Traceback" not in err
    assert "run_dir" in err or "run directory" in err
    assert not (tmp_path / "nowhere").exists()


def test_a_long_run_name_is_one_filial_line(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    recipe = _recipe(tmp_path)
    assert cli.main(["run", str(recipe), "--set", f"run.name={'x' * 300}"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("filial: ") and "255" in err


def test_the_api_refuses_an_unusable_run_directory_by_name(loaders, tmp_path):
    afile = tmp_path / "afile"
    afile.write_text("x")
    for run_dir in (afile / "sub", tmp_path / ("n" * 300)):
        with pytest.raises(InputError, match="run directory|run_dir"):
            filial.Lineage(TinyNet(), loaders[0], loaders[1], run_dir=run_dir, progress=False)


# -- two Lineage objects on one run directory, in one process -------------------------------------


def _train(gen) -> None:
    opt = torch.optim.SGD(gen.model.parameters(), lr=0.1)
    for inputs, labels, targets in gen.loader:
        loss = gen.loss(gen.model(inputs), labels, targets)
        opt.zero_grad()
        loss.backward()
        opt.step()


def _make(loaders, run_dir, **kwargs):
    options = {"max_generations": 2, "patience": 5, "progress": False, "tensorboard": False}
    return filial.Lineage(
        TinyNet(), loaders[0], loaders[1], run_dir=run_dir, **{**options, **kwargs}
    )


def test_an_older_objects_generation_cannot_overwrite_a_finished_run(loaders, tmp_path):
    run_dir = tmp_path / "run"
    older = _make(loaders, run_dir)
    for gen in older:
        if gen.index == 2:
            stale = gen  # handed out, not finished
            break
        _train(gen)
        gen.finish(gen.model)
    newer = _make(loaders, run_dir)
    for gen in newer:
        _train(gen)
        gen.finish(gen.model)
    finished = (run_dir / "lineage.json").read_bytes()
    assert [r["generation"] for r in newer.result.records] == [0, 1, 2]
    _train(stale)
    with pytest.raises(InputError, match="replaced by a newer Lineage"):
        stale.finish(stale.model)
    assert (run_dir / "lineage.json").read_bytes() == finished  # records [0, 1, 2] kept
    with pytest.raises(InputError, match="handing out generation"):
        next(iter(older))


def test_two_objects_handing_out_generation_0_cannot_both_write_it(loaders, tmp_path):
    run_dir = tmp_path / "run"
    first = next(iter(_make(loaders, run_dir)))
    second_lineage = _make(loaders, run_dir)
    second = next(iter(second_lineage))
    _train(second)
    second.finish(second.model)
    checkpoint = (run_dir / "gen0" / "student.pt").read_bytes()
    _train(first)
    with pytest.raises(InputError, match="replaced by a newer Lineage"):
        first.finish(first.model)
    assert (run_dir / "gen0" / "student.pt").read_bytes() == checkpoint
    assert [r["generation"] for r in second_lineage.result.records] == [0]


# -- finish with a model of another architecture ---------------------------------------------------

OTHERS = {
    "fewer outputs": lambda: nn.Sequential(nn.Linear(5, 2)),
    "other layer names": lambda: nn.Sequential(nn.Linear(5, 16), nn.Linear(16, 3)),
    "wider hidden layer": lambda: nn.Sequential(nn.Linear(5, 17), nn.ReLU(), nn.Linear(17, 3)),
    "an extra buffer": lambda: nn.Sequential(
        nn.Linear(5, 16), nn.BatchNorm1d(16), nn.Linear(16, 3)
    ),
}


@pytest.mark.parametrize("other", list(OTHERS))
def test_finish_refuses_a_model_model_fn_does_not_build(loaders, tmp_path, other):
    run_dir = tmp_path / "run"
    lineage = _make(loaders, run_dir)
    gen = next(iter(lineage))
    before = sorted(p.name for p in run_dir.rglob("*"))
    with pytest.raises(InputError, match="not what model_fn builds"):
        gen.finish(OTHERS[other]())
    assert sorted(p.name for p in run_dir.rglob("*")) == before  # nothing written
    _train(gen)
    gen.finish(gen.model)
    assert [r["generation"] for r in lineage.result.records] == [0]
    assert lineage.result.best_model() is not None


# -- API misuse ------------------------------------------------------------------------------------


def test_a_module_instead_of_a_factory_is_named(loaders, tmp_path):
    with pytest.raises(TypeError, match=r"pass make_model, not make_model\(\)"):
        filial.Lineage(TinyNet()(), loaders[0], loaders[1], run_dir=tmp_path / "run")
    assert not (tmp_path / "run").exists()


def test_a_script_run_as_main_resumes_when_imported(loaders, tmp_path):
    """``python script.py`` saves ``model_fn: '__main__:make'``; importing the script names the
    same function ``script:make``: the run resumes (compared by qualified name)."""
    run_dir = tmp_path / "run"
    lineage = _make(loaders, run_dir, max_generations=1)
    gen = next(iter(lineage))
    gen.finish(gen.model)
    lineage.close()
    state = json.loads((run_dir / "lineage.json").read_text())
    module, _, name = state["settings"]["model_fn"].rpartition(":")
    assert module == "conftest"
    state["settings"]["model_fn"] = f"__main__:{name}"  # as a script run directly saves it
    (run_dir / "lineage.json").write_text(json.dumps(state))
    resumed = _make(loaders, run_dir, max_generations=1)
    assert [r["generation"] for r in resumed.result.records] == [0]
    state["settings"]["model_fn"] = "__main__:OtherNet"
    (run_dir / "lineage.json").write_text(json.dumps(state))
    resumed.close()
    with pytest.raises(InputError, match="model_fn"):
        _make(loaders, run_dir, max_generations=1)


def test_views_whose_store_cannot_fit_are_refused_with_the_figure(loaders, tmp_path):
    with pytest.raises(InputError, match=r"takes [0-9.]+ TiB, but .* has [0-9.]+ GiB free"):
        _make(loaders, tmp_path / "run", views=10**12)
    assert not (tmp_path / "run").exists()
