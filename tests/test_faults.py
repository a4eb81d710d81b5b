"""The fault table of the README: crashes (a real SIGKILL), concurrency, bad input, security.

Crashes are real: ``python -m filial run`` is started as a subprocess with ``FILIAL_FAULT``
naming a point (see ``filial._faults``), it kills itself there with SIGKILL, and the same
command is run again without the variable. The rerun must continue from the first unfinished
generation, train no finished generation again, record none twice, read nothing half-written,
and end with the records of an uninterrupted run.
"""

from __future__ import annotations

import itertools
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import bad_inputs
import pytest

from filial import cli

TESTS = Path(__file__).resolve().parent

RECIPE = """
[run]
name = "faults"
seeds = [0]

[data]
factory = "{data}"
{data_keys}

[model]
factory = "{model}"
{model_keys}

[training]
epochs = {epochs}
lr = 0.1

[generations]
max = 2
patience = 5
"""
DIGITS = ("filial.demo:mail_room_loaders", "train_size = 300\nheldout_size = 150")
MLP = ("filial.demo:mlp", "hidden = [32]")


def _recipe(folder: Path, data=DIGITS, model=MLP, epochs=3, name="recipe.toml") -> Path:
    path = folder / name
    path.write_text(
        RECIPE.format(
            data=data[0], data_keys=data[1], model=model[0], model_keys=model[1], epochs=epochs
        )
    )
    return path


def _env(fault: str | None = None) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k != "FILIAL_FAULT"}
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(TESTS), env.get("PYTHONPATH")) if p)
    if fault:
        env["FILIAL_FAULT"] = fault
    return env


def _command(recipe: Path, run_dir: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "filial", "run", str(recipe), "--run-dir", str(run_dir), *extra]


def _run(recipe: Path, run_dir: Path, *extra: str, fault: str | None = None):
    return subprocess.run(
        _command(recipe, run_dir, *extra),
        capture_output=True,
        text=True,
        env=_env(fault),
        timeout=300,
    )


def _records(run_dir: Path) -> list[dict]:
    return json.loads((run_dir / "seed0" / "lineage.json").read_text())["records"]


def _stable(records):
    return [{k: v for k, v in r.items() if k != "seconds"} for r in records]


def _temporaries(run_dir: Path) -> list[Path]:
    return [p for p in run_dir.rglob(".*.tmp-*")]


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """The records of an uninterrupted run of the same recipe and seed."""
    folder = tmp_path_factory.mktemp("reference")
    done = _run(_recipe(folder), folder / "run")
    assert done.returncode == 0, done.stderr
    return _stable(_records(folder / "run"))


# -- crashes -----------------------------------------------------------------------------------

KILLS = {
    "batch:gen1#7": "during a student's training epoch (generation 1, epoch 2)",
    "teacher:gen1#2": "during the teacher pass, its rows half streamed into the store",
    "write:gen1/targets.npy": "while the targets are being written",
    "write:gen1/student.pt": "while a checkpoint is being written",
    "write:seed0/lineage.json#3": "while lineage.json is being rewritten (generation 1's record)",
}


@pytest.mark.slow
@pytest.mark.parametrize("fault", list(KILLS), ids=list(KILLS.values()))
def test_sigkill_then_the_same_command_resumes(fault, reference, tmp_path):
    recipe, run_dir = _recipe(tmp_path), tmp_path / "run"
    killed = _run(recipe, run_dir, fault=fault)
    assert killed.returncode == -signal.SIGKILL, killed.stderr
    assert [r["generation"] for r in _records(run_dir)] == [0]  # lineage.json is whole
    finished = (run_dir / "seed0" / "gen0" / "student.pt").read_bytes()
    stamp = (run_dir / "seed0" / "gen0" / "student.pt").stat().st_mtime_ns
    if fault.startswith(("write:", "teacher:")):
        assert _temporaries(run_dir), "the kill should have left the temporary file"
    if fault.startswith("teacher:"):
        # the teacher pass streams its rows into the store's temporaries as it goes; nothing
        # a later run trusts exists yet
        assert [p.name.split("-")[0] for p in _temporaries(run_dir)] == [".targets.npy.tmp"]
        assert not (run_dir / "seed0" / "gen1" / "targets.json").exists()

    rerun = _run(recipe, run_dir)
    assert rerun.returncode == 0, rerun.stderr
    records = _records(run_dir)
    assert [r["generation"] for r in records] == [0, 1, 2]  # none twice, none missing
    assert _stable(records) == reference  # as if nothing had happened
    assert (run_dir / "seed0" / "gen0" / "student.pt").read_bytes() == finished
    assert (run_dir / "seed0" / "gen0" / "student.pt").stat().st_mtime_ns == stamp
    assert "resuming" in rerun.stderr and "generation 0:" not in rerun.stderr
    assert not _temporaries(run_dir)
    if fault.startswith(("write:", "teacher:")):
        assert "left by a process that died" in rerun.stderr


@pytest.mark.slow
def test_full_disk_is_a_clear_error_and_nothing_half_written_remains(reference, tmp_path):
    recipe, run_dir = _recipe(tmp_path), tmp_path / "run"
    full = _run(recipe, run_dir, fault="write:gen1/targets.npy=enospc")
    assert full.returncode == 1
    assert "no space left on the device while writing" in full.stderr
    assert "targets.npy" in full.stderr and "rerun" in full.stderr
    gen1 = run_dir / "seed0" / "gen1"
    assert not (gen1 / "targets.npy").exists() and not (gen1 / "targets.json").exists()
    assert not _temporaries(run_dir)
    assert [r["generation"] for r in _records(run_dir)] == [0]
    rerun = _run(recipe, run_dir)
    assert rerun.returncode == 0, rerun.stderr
    assert _stable(_records(run_dir)) == reference


# -- concurrency -------------------------------------------------------------------------------


def _wait_for_lock(run_dir: Path, pid: int, seconds: float = 60) -> None:
    deadline = time.monotonic() + seconds
    lock = run_dir / ".lock"
    while time.monotonic() < deadline:
        try:
            if json.loads(lock.read_text()).get("pid") == pid:
                return
        except (OSError, ValueError):
            pass
        time.sleep(0.1)
    raise AssertionError(f"process {pid} never took the lock of {run_dir}")


@pytest.mark.slow
def test_a_live_run_refuses_a_second_and_a_dead_ones_lock_is_taken_over(tmp_path):
    recipe, run_dir = _recipe(tmp_path, epochs=5000), tmp_path / "run"
    first = subprocess.Popen(
        _command(recipe, run_dir),
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        env=_env(),
    )
    try:
        _wait_for_lock(run_dir, first.pid)
        second = _run(recipe, run_dir)
        assert second.returncode == 2
        assert f"is in use by process {first.pid}" in second.stderr
    finally:
        first.kill()  # SIGKILL: the lock file stays behind, its flock goes with the process
        first.wait()
    third = _run(recipe, run_dir, "--fresh", "--set", "training.epochs=2")
    assert third.returncode == 0, third.stderr
    assert f"took over the lock of {run_dir} left by process {first.pid}" in third.stderr


def test_lineage_in_a_locked_directory_names_the_holder(loaders, tmp_path):
    from conftest import TinyNet

    import filial

    run_dir = tmp_path / "run"
    run_dir.mkdir()
    holder = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "import sys, time; from filial._io import RunLock; "
            "lock = RunLock(sys.argv[1]).acquire(); print('locked', flush=True); time.sleep(60)",
            str(run_dir),
        ],
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        assert holder.stdout.readline().strip() == "locked"
        with pytest.raises(RuntimeError, match=f"is in use by process {holder.pid}"):
            filial.Lineage(TinyNet(), loaders[0], loaders[1], run_dir=run_dir)
        assert sorted(p.name for p in run_dir.iterdir()) == [".lock"]  # nothing else written
    finally:
        holder.kill()
        holder.wait()


# -- bad input -----------------------------------------------------------------------------------


def _snapshot(folder: Path) -> list[tuple[str, int]]:
    """Every entry with its modification time, but the lock files (they name the last process
    that opened the directory, and that is all they change)."""
    if not folder.exists():
        return []
    return sorted(
        (str(p.relative_to(folder)), p.stat().st_mtime_ns)
        for p in folder.rglob("*")
        if p.name != ".lock"
    )


@pytest.mark.parametrize(
    "data, model, words",
    [
        (("bad_inputs:iterable_train", ""), MLP, "map-style"),
        (("bad_inputs:triple_batches", ""), MLP, "(inputs, labels)"),
        (("bad_inputs:labels_beyond_outputs", ""), MLP, "labels range over [0, 11]"),
        (("bad_inputs:empty_heldout", ""), MLP, "is empty"),
        (("bad_inputs:heldout_is_train", ""), MLP, "held-out evidence must come from samples"),
    ],
    ids=["iterable dataset", "not pairs", "labels beyond outputs", "empty held-out", "same set"],
)
def test_bad_data_exits_2_before_anything_is_written(tmp_path, capsys, data, model, words):
    run_dir = tmp_path / "run"
    assert cli.main(["run", str(_recipe(tmp_path, data, model)), "--run-dir", str(run_dir)]) == 2
    assert words in capsys.readouterr().err
    assert not run_dir.exists()


@pytest.mark.parametrize(
    "model, counter, words",
    [
        (("bad_inputs:same_module", ""), None, "same module object"),
        (("bad_inputs:wider_in_generation_one", ""), "_calls", "generation 1's model has 11"),
    ],
    ids=["model_fn returns the same module", "output width changes"],
)
def test_bad_models_exit_2_and_keep_what_was_finished(tmp_path, capsys, model, counter, words):
    if counter:
        setattr(bad_inputs, counter, itertools.count())
    run_dir = tmp_path / "run"
    argv = ["run", str(_recipe(tmp_path, DIGITS, model)), "--run-dir", str(run_dir)]
    assert cli.main(argv) == 2
    err = capsys.readouterr().err
    assert words in err and "Finished generations are kept" in err
    assert [r["generation"] for r in _records(run_dir)] == [0]
    assert not (run_dir / "seed0" / "gen1").exists()


def test_nan_generation_is_recorded_as_diverged_and_the_best_is_kept(tmp_path, capsys):
    bad_inputs._nan_calls = itertools.count()
    run_dir = tmp_path / "run"
    recipe = _recipe(tmp_path, DIGITS, ("bad_inputs:nan_in_generation_one", ""))
    assert cli.main(["run", str(recipe), "--run-dir", str(run_dir)]) == 0
    state = json.loads((run_dir / "seed0" / "lineage.json").read_text())
    assert [r["diverged"] for r in state["records"]] == [False, True]
    assert state["decision"]["reason"] == "diverged" and state["decision"]["best"] == 0
    out = capsys.readouterr().out
    assert "generation 0 was kept" in out and "diverged" in out


@pytest.mark.slow
def test_damaged_targets_are_recomputed_and_a_damaged_checkpoint_is_refused(reference, tmp_path):
    recipe, run_dir = _recipe(tmp_path), tmp_path / "run"
    assert _run(recipe, run_dir, fault="batch:gen1#2").returncode == -signal.SIGKILL
    targets = run_dir / "seed0" / "gen0" / "targets.npy"
    targets.write_bytes(targets.read_bytes()[:-64])  # truncated
    rerun = _run(recipe, run_dir)
    assert rerun.returncode == 0, rerun.stderr
    assert "truncated" in rerun.stderr and "recomputing generation 0's targets" in rerun.stderr
    assert _stable(_records(run_dir)) == reference

    other, other_dir = _recipe(tmp_path, name="other.toml"), tmp_path / "other"
    assert _run(other, other_dir, fault="batch:gen1#2").returncode == -signal.SIGKILL
    gen0 = other_dir / "seed0" / "gen0"
    data = bytearray((gen0 / "targets.npy").read_bytes())
    data[-1] ^= 0xFF
    (gen0 / "targets.npy").write_bytes(bytes(data))  # corrupted, same size
    (gen0 / "student.pt").write_bytes((gen0 / "student.pt").read_bytes()[:100])
    before = _snapshot(other_dir)
    refused = _run(other, other_dir)
    assert refused.returncode == 2
    assert "sha256" in refused.stderr and "student.pt" in refused.stderr
    assert _snapshot(other_dir) == before


def test_other_training_data_on_resume_is_refused(tmp_path, capsys, monkeypatch):
    recipe, run_dir = (
        _recipe(tmp_path, ("bad_inputs:scaled_data", ""), ("filial.demo:mlp", "")),
        (tmp_path / "run"),
    )
    assert cli.main(["run", str(recipe), "--run-dir", str(run_dir)]) == 0
    before = _snapshot(run_dir)
    monkeypatch.setenv("BAD_INPUTS_SCALE", "100")  # same labels, other inputs, same recipe
    capsys.readouterr()
    assert cli.main(["run", str(recipe), "--run-dir", str(run_dir)]) == 2
    assert "train_fingerprint" in capsys.readouterr().err
    assert _snapshot(run_dir) == before


# -- security ----------------------------------------------------------------------------------


def test_recipe_strings_are_never_run_and_names_cannot_leave_runs(tmp_path, capsys):
    marker = tmp_path / "ran"
    recipe = _recipe(tmp_path)
    for value in (f"__import__('pathlib').Path('{marker}').touch()", "../escape", "/etc/x"):
        argv = ["run", str(recipe), "--set", f"run.name={value}"]
        assert cli.main(argv) == 2
        assert "run.name should be a plain name" in capsys.readouterr().err
    assert not marker.exists()
    assert not (tmp_path.parent / "escape").exists()


def test_a_run_writes_only_inside_its_run_directory(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    recipe = _recipe(tmp_path)
    before = {p.name for p in tmp_path.iterdir()}
    assert cli.main(["run", str(recipe), "--run-dir", "inside/run"]) == 0
    assert {p.name for p in tmp_path.iterdir()} - before == {"inside"}
    assert [p.name for p in (tmp_path / "inside").iterdir()] == ["run"]
