"""The ``filial`` command: recipes, exit codes, resume, seeds, the report and TensorBoard files."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest
from tensorboard.backend.event_processing.event_accumulator import EventAccumulator
from tensorboard.plugins.hparams import plugin_data_pb2

from filial import cli
from filial.recipe import RecipeError, parse_override, resolve

ROOT = Path(__file__).resolve().parents[1]

SMALL = """
[run]
name = "small"
seeds = [0, 1]
baseline = "matched"

[data]
factory = "filial.demo:mail_room_loaders"
noise = 0.3
train_size = 300
heldout_size = 150

[model]
factory = "filial.demo:mlp"
hidden = [32]

[training]
epochs = 3
lr = 0.1

[generations]
targets = "ce"
max = 2
patience = 5
"""


@pytest.fixture
def small_recipe(tmp_path):
    path = tmp_path / "small.toml"
    path.write_text(SMALL)
    return path


def _scalars(folder: Path, tag: str) -> list[tuple[int, float]]:
    accumulator = EventAccumulator(str(folder))
    accumulator.Reload()
    return [(e.step, e.value) for e in accumulator.Scalars(tag)]


@pytest.mark.slow
def test_run_report_and_tensorboard_end_to_end(small_recipe, tmp_path, capsys):
    run_dir = tmp_path / "run"
    assert cli.main(["run", str(small_recipe), "--run-dir", str(run_dir)]) == 0
    out = capsys.readouterr().out
    assert "across seeds (mean +- standard deviation)" in out
    assert f"TensorBoard: tensorboard --logdir {run_dir / 'tb'}" in out
    saved = tomllib.loads((run_dir / "recipe.toml").read_text())
    # max_generations: the recipe says max, the key's old name, which is saved under the new one
    assert saved["generations"]["max_generations"] == 2 and saved["run"]["run_dir"] == str(run_dir)
    for seed in (0, 1):
        state = json.loads((run_dir / f"seed{seed}" / "lineage.json").read_text())
        assert [r["generation"] for r in state["records"]] == [0, 1, 2]
        assert (run_dir / f"seed{seed}" / "baseline" / "matched" / "baseline.json").is_file()

    assert cli.main(["report", str(run_dir), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert [x["seed"] for x in report["lineages"]] == [0, 1]
    assert [row["generation"] for row in report["generations"]] == [0, 1, 2]
    for row in report["generations"]:
        values = [x["records"][row["generation"]]["heldout"] for x in report["lineages"]]
        assert row["heldout_mean"] == pytest.approx(np.mean(values))
        assert row["heldout_std"] == pytest.approx(np.std(values, ddof=1))
    for x in report["lineages"]:
        assert report["chosen"][str(x["seed"])] == x["best"]
        base = x["baseline"]
        assert base["epochs_matched"] == 3 * 3  # three generations of three epochs
        gain = x["gain"]
        assert gain["low"] <= gain["observed"] <= gain["high"]

    assert cli.main(["report", str(run_dir)]) == 0
    text = capsys.readouterr().out
    rows = [line for line in text.splitlines() if line.strip()[:1].isdigit()]
    assert len(rows) >= 2 * 3
    assert "chosen generation per seed" in text and "matched baseline (9 epochs" in text

    tb = run_dir / "tb"
    for seed in (0, 1):
        records = json.loads((run_dir / f"seed{seed}" / "lineage.json").read_text())["records"]
        for g, record in enumerate(records):
            run = tb / f"seed{seed}" / f"gen{g}"
            assert [s for s, _ in _scalars(run, "epoch/loss")] == [0, 1, 2]
            assert _scalars(run, "generation/held-out") == [(g, pytest.approx(record["heldout"]))]
        matched = _scalars(tb / f"seed{seed}" / "baseline matched", "generation/held-out")
        assert [s for s, _ in matched] == [0, 1, 2]
        accumulator = EventAccumulator(str(tb / f"seed{seed}" / "hparams"))
        accumulator.Reload()
        start = accumulator.PluginTagToContent("hparams")["_hparams_/session_start_info"]
        session = plugin_data_pb2.HParamsPluginData.FromString(start).session_start_info
        assert session.hparams["run: seed"].string_value == str(seed)
    # The arms view: means over the two seeds, the custom-scalars layout with it.
    heldout = _scalars(tb / "arms" / "with generations", "held-out/every arm")
    assert [v for _, v in heldout] == pytest.approx(
        [row["heldout_mean"] for row in report["generations"]]
    )
    accumulator = EventAccumulator(str(tb / "arms" / "with generations"))
    accumulator.Reload()
    assert "custom_scalars__config__" in accumulator.PluginTagToContent("custom_scalars")
    level = _scalars(tb / "arms" / "baseline matched", "held-out/every arm")
    assert [s for s, _ in level] == [0, 1, 2]
    assert [v for _, v in level] == pytest.approx(
        [np.mean([x["baseline"]["heldout"] for x in report["lineages"]])] * 3
    )
    # No stray folders: exactly the runs the layout names.
    assert sorted(p.name for p in tb.iterdir()) == ["arms", "seed0", "seed1"]
    assert sorted(p.name for p in (tb / "seed0").iterdir()) == [
        "baseline matched",
        "gen0",
        "gen1",
        "gen2",
        "hparams",
    ]


@pytest.mark.slow
def test_rerun_resumes_and_other_recipes_are_refused(small_recipe, tmp_path, capsys):
    run_dir = tmp_path / "run"
    args = ["run", str(small_recipe), "--run-dir", str(run_dir), "--set", "run.seeds=[0]"]
    assert cli.main(args) == 0
    stamps = {p: p.stat().st_mtime_ns for p in run_dir.rglob("student.pt")}
    assert cli.main(args) == 0  # resumes: nothing left to train
    assert {p: p.stat().st_mtime_ns for p in run_dir.rglob("student.pt")} == stamps
    capsys.readouterr()
    assert cli.main([*args, "--set", "generations.temperature=4"]) == 2
    err = capsys.readouterr().err
    assert "generations.temperature: 1.0 in the run, 4.0 now" in err and "--fresh" in err
    assert {p: p.stat().st_mtime_ns for p in run_dir.rglob("student.pt")} == stamps
    # the device says where a run trains, not what it is: a run may move on resume
    assert cli.main([*args, "--set", 'training.device="cpu"']) == 0
    assert {p: p.stat().st_mtime_ns for p in run_dir.rglob("student.pt")} == stamps
    assert cli.main([*args, "--set", "generations.max=1", "--fresh"]) == 0
    state = json.loads((run_dir / "seed0" / "lineage.json").read_text())
    assert len(state["records"]) == 2


@pytest.mark.parametrize(
    "change, words",
    [
        (("[training]", "[training]\nepoch = 4"), "training.epoch is not a recipe key"),
        (("epochs = 3", 'epochs = "three"'), "training.epochs should be an integer"),
        (('factory = "filial.demo:mlp"', 'factory = "nowhere.models:net"'), "model.factory"),
        (('factory = "filial.demo:mlp"', 'factory = "filial.demo:missing"'), "has no 'missing'"),
        (("noise = 0.3", "noize = 0.3"), "data.noize"),
        (('baseline = "matched"', "baseline = 'best'"), "run.baseline should be one of"),
        (("patience = 5", "patience = 0"), "generations.patience should be >= 1"),
        (("[run]", "[extra]\nx = 1\n[run]"), "unknown section [extra]"),
        (("[training]", '[training]\ndevice = "gpu0"'), "training.device = 'gpu0' is not a"),
    ],
)
def test_bad_recipes_exit_2_naming_the_key_and_write_nothing(tmp_path, capsys, change, words):
    path = tmp_path / "bad.toml"
    path.write_text(SMALL.replace(*change, 1))
    run_dir = tmp_path / "run"
    assert cli.main(["run", str(path), "--run-dir", str(run_dir)]) == 2
    assert words in capsys.readouterr().err
    assert not run_dir.exists()


def test_missing_recipe_file_and_bad_overrides_exit_2(tmp_path, capsys, small_recipe):
    assert cli.main(["run", str(tmp_path / "absent.toml")]) == 2
    assert "absent.toml does not exist" in capsys.readouterr().err
    run_dir = tmp_path / "run"
    for override, words in [
        ("generations.temperature", "section.key=value"),
        ("nosuch.key=1", "unknown section 'nosuch'"),
        ("training.optimizer=adam", "training.momentum applies to optimizer = 'sgd' only"),
    ]:
        argv = ["run", str(small_recipe), "--run-dir", str(run_dir), "--set", override]
        if "optimizer" in override:
            small_recipe.write_text(SMALL.replace("lr = 0.1", "lr = 0.1\nmomentum = 0.5"))
        assert cli.main(argv) == 2
        assert words in capsys.readouterr().err
    assert not run_dir.exists()
    with pytest.raises(SystemExit) as info:  # argparse's own usage errors
        cli.main(["run"])
    assert info.value.code == 2
    assert cli.main(["report", str(tmp_path)]) == 2
    assert "not a filial run directory" in capsys.readouterr().err


def test_foreign_run_dir_is_refused(small_recipe, tmp_path, capsys):
    foreign = tmp_path / "photos"
    foreign.mkdir()
    (foreign / "cat.jpg").write_bytes(b"meow")
    assert cli.main(["run", str(small_recipe), "--run-dir", str(foreign), "--fresh"]) == 2
    assert "not a filial run directory" in capsys.readouterr().err
    assert [p.name for p in foreign.iterdir()] == ["cat.jpg"]


def test_overrides_are_read_as_toml_values():
    assert parse_override("generations.temperature=4") == ("generations", "temperature", 4)
    assert parse_override("run.seeds=[1, 2]") == ("run", "seeds", [1, 2])
    assert parse_override("run.name=my run") == ("run", "name", "my run")
    recipe = resolve(tomllib.loads(SMALL), ["training.epochs=7"])
    assert recipe["training"]["epochs"] == 7 and recipe["training"]["optimizer"] == "sgd"
    # The saved recipe reads back to the same values (tomllib is the reader).
    assert tomllib.loads(recipe.to_toml()) == recipe.values
    with pytest.raises(RecipeError, match="lists a seed twice"):
        resolve(tomllib.loads(SMALL), ["run.seeds=[1, 1]"])


@pytest.mark.slow
def test_ctrl_c_leaves_a_resumable_run(small_recipe, tmp_path):
    """A real SIGINT to `python -m filial run` after the first generation, then the rerun."""
    run_dir = tmp_path / "run"
    command = [
        sys.executable,
        "-m",
        "filial",
        "run",
        str(small_recipe),
        "--run-dir",
        str(run_dir),
        "--set",
        "run.seeds=[0]",
        "--set",
        "training.epochs=40",
    ]
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    # A job started in the background of a non-interactive shell inherits SIGINT ignored, and
    # Python then keeps ignoring it: give the child the default disposition, as a terminal does.
    process = subprocess.Popen(
        command,
        stderr=subprocess.PIPE,
        stdout=subprocess.PIPE,
        text=True,
        env=env,
        preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL),
    )
    lines = []
    for line in process.stderr:
        lines.append(line)
        if line.startswith("filial: generation 0"):
            process.send_signal(signal.SIGINT)
            break
    _, rest = process.communicate(timeout=120)
    err = "".join(lines) + rest
    assert process.returncode == 130, err
    assert "interrupted" in err and "resume with:" in err and "\r" not in err
    state = json.loads((run_dir / "seed0" / "lineage.json").read_text())
    finished = [r["generation"] for r in state["records"]]
    assert finished and finished[0] == 0
    first = (run_dir / "seed0" / "gen0" / "student.pt").read_bytes()
    done = subprocess.run(command, capture_output=True, text=True, timeout=300, env=env)
    assert done.returncode == 0, done.stderr
    assert (run_dir / "seed0" / "gen0" / "student.pt").read_bytes() == first
    generations = [line for line in done.stderr.splitlines() if "filial: generation" in line]
    assert not any(line.startswith("filial: generation 0:") for line in generations)


@pytest.mark.slow
@pytest.mark.parametrize("name", ["digits_ce.toml", "digits_l2.toml"])
def test_shipped_recipes_run(name, tmp_path):
    """The shipped recipes, shortened by --set, through the console script's module."""
    command = [
        sys.executable,
        "-m",
        "filial",
        "run",
        str(ROOT / "recipes" / name),
        "--run-dir",
        str(tmp_path / "run"),
        "--set",
        "training.epochs=2",
        "--set",
        "run.seeds=[0]",
        "--set",
        "generations.max=1",
    ]
    done = subprocess.run(command, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert "kept generation" in done.stdout or "generation 0 was kept" in done.stdout


@pytest.mark.slow
def test_progress_on_a_terminal_is_bars_not_lines(small_recipe, tmp_path):
    """Under a pseudo-terminal: tqdm bars (carriage returns), no plain generation lines."""
    import fcntl
    import pty
    import struct
    import termios

    leader, follower = pty.openpty()
    # A new pseudo-terminal is 0 x 0; give it 24 rows of 100 columns so bars have room.
    fcntl.ioctl(follower, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 100, 0, 0))
    command = [
        sys.executable,
        "-m",
        "filial",
        "run",
        str(small_recipe),
        "--run-dir",
        str(tmp_path / "run"),
        "--set",
        "run.seeds=[0]",
        "--set",
        "run.baseline='none'",
    ]
    process = subprocess.Popen(command, stdin=follower, stdout=subprocess.PIPE, stderr=follower)
    os.close(follower)
    chunks = []
    while True:
        try:
            chunk = os.read(leader, 4096)
        except OSError:  # the terminal closes when the process ends
            break
        if not chunk:
            break
        chunks.append(chunk)
    process.wait(timeout=120)
    os.close(leader)
    screen = b"".join(chunks).decode(errors="replace")
    assert process.returncode == 0, screen
    assert "\r" in screen and "generations" in screen  # the generation bar was drawn
    assert "filial: generation" not in screen


def test_fresh_never_deletes_a_folder_filial_did_not_make(small_recipe, tmp_path, capsys):
    folder = tmp_path / "project"
    folder.mkdir()
    (folder / "recipe.toml").write_text('[tool]\nname = "cake"\n')  # someone else's recipe
    (folder / "notes.txt").write_text("keep me")
    assert cli.main(["run", str(small_recipe), "--run-dir", str(folder), "--fresh"]) == 2
    assert "not a filial run directory" in capsys.readouterr().err
    assert sorted(p.name for p in folder.iterdir()) == ["notes.txt", "recipe.toml"]


@pytest.mark.slow
def test_a_refused_fresh_run_leaves_the_earlier_run_as_it_was(small_recipe, tmp_path, capsys):
    run_dir = tmp_path / "run"
    args = [
        "run",
        str(small_recipe),
        "--run-dir",
        str(run_dir),
        "--set",
        "run.seeds=[0]",
        "--set",
        "run.baseline='none'",
        "--set",
        "generations.max=1",
    ]
    assert cli.main(args) == 0
    before = {p: p.read_bytes() for p in run_dir.rglob("*") if p.is_file() and p.name != ".lock"}
    capsys.readouterr()
    assert (
        cli.main([*args, "--fresh", "--set", "model.hidden=[]", "--set", "model.inputs=32"]) == 2
    )  # the model cannot take the data's 64 features
    assert "fails on a batch of the training data" in capsys.readouterr().err
    after = {p: p.read_bytes() for p in run_dir.rglob("*") if p.is_file() and p.name != ".lock"}
    assert after == before
    assert cli.main(args) == 0  # a clean rerun: no "took over" message
    assert "took over the lock" not in capsys.readouterr().err


def test_a_model_that_cannot_run_on_the_data_exits_2_and_leaves_nothing(
    small_recipe, tmp_path, capsys
):
    run_dir = tmp_path / "run"
    argv = ["run", str(small_recipe), "--run-dir", str(run_dir), "--set", "model.inputs=32"]
    assert cli.main(argv) == 2
    assert "mat1 and mat2" in capsys.readouterr().err
    assert not run_dir.exists()


def test_saved_recipes_read_back_unchanged():
    recipe = resolve(tomllib.loads(SMALL), ['data.note="two\\nlines \\"quoted\\" ü"'])
    text = recipe.to_toml()
    assert text.startswith("# filial run recipe")
    assert tomllib.loads(text) == recipe.values
    odd = tomllib.loads(SMALL)
    odd["data"]["options"] = {"a.b": 1, "with space": [1.5, True]}
    assert tomllib.loads(resolve(odd).to_toml()) == resolve(odd).values
    with pytest.raises(RecipeError, match="date"):
        resolve(tomllib.loads(SMALL), ["data.when=1979-05-27"])
