"""What tripped a newcomer (issue 16): hook-mode epochs, resumed loops that changed, a finished
run rerun, the count of generations, scalar regression outputs, the command's help."""

from __future__ import annotations

import logging
import subprocess
import sys

import pytest
import torch
from conftest import TinyNet, blobs
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

import filial
from filial import cli
from filial.errors import InputError, LockedError
from filial.recipe import RecipeError, resolve


def _options(**kwargs):
    return {"max_generations": 1, "patience": 5, "tensorboard": False, **kwargs}


def _hook(lineage, epochs=2, stop_after=None):
    """The README's hook loop, which never calls gen.log_epoch."""
    losses = {}
    for gen in lineage:
        opt = torch.optim.SGD(gen.model.parameters(), lr=0.1)
        losses[gen.index] = []
        for _ in range(epochs):
            total, batches = 0.0, 0
            for inputs, labels, targets in gen.loader:
                loss = gen.loss(gen.model(inputs), labels, targets)
                opt.zero_grad()
                loss.backward()
                opt.step()
                total, batches = total + float(loss.detach()), batches + 1
            losses[gen.index].append(total / batches)
        gen.finish(gen.model)
        if gen.index == stop_after:
            break
    return losses


def test_hook_mode_records_every_pass_and_its_mean_loss(loaders, tmp_path):
    train = loaders[0]
    lineage = filial.Lineage(TinyNet(), train, loaders[1], run_dir=tmp_path / "run", **_options())
    by_hand = _hook(lineage, epochs=3)
    for record in lineage.result.records:
        assert record["passes"] == 3 and record["batches"] == 3 * len(train)
        assert [e["epoch"] for e in record["epochs"]] == [0, 1, 2]
        got = [e["loss"] for e in record["epochs"]]
        assert got == pytest.approx(by_hand[record["generation"]], rel=1e-6)


def test_fit_epochs_figures_win_over_the_counted_passes(loaders, tmp_path):
    fit = filial.fit_epochs(2, lambda p: torch.optim.SGD(p, lr=0.1), progress=False)
    lineage = filial.Lineage(
        TinyNet(), loaders[0], loaders[1], run_dir=tmp_path / "run", **_options()
    )
    result = lineage.run(fit)
    for record in result.records:
        assert record["passes"] == 2
        assert [sorted(e) for e in record["epochs"]] == [["epoch", "loss", "running_accuracy"]] * 2


def test_a_resumed_loop_that_trains_other_passes_is_warned_about(loaders, tmp_path, caplog):
    run = tmp_path / "run"
    options = _options(max_generations=2)
    _hook(filial.Lineage(TinyNet(), *loaders[:2], run_dir=run, **options), 3, stop_after=1)
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="filial"):
        _hook(filial.Lineage(TinyNet(), *loaders[:2], run_dir=run, **options), epochs=1)
    assert "generation 2 trained 1 passes over gen.loader, generations 0-1 trained 3" in caplog.text


def test_a_finished_run_rerun_says_so_instead_of_resuming(loaders, tmp_path, capsys):
    run = tmp_path / "run"
    _hook(filial.Lineage(TinyNet(), *loaders[:2], run_dir=run, **_options()))
    capsys.readouterr()
    again = filial.Lineage(TinyNet(), *loaders[:2], run_dir=run, **_options())
    assert list(again) == []
    err = capsys.readouterr().err
    assert "is already finished (max-generations after generation 1" in err
    assert "resuming" not in err


def test_max_generations_is_the_recipe_key_and_max_its_old_name():
    base = {"data": {"factory": "a:b"}, "model": {"factory": "a:c"}}
    assert (
        resolve({**base, "generations": {"max_generations": 4}})["generations"]["max_generations"]
        == 4
    )
    old = resolve({**base, "generations": {"max": 4}})
    assert old["generations"]["max_generations"] == 4 and "max" not in old["generations"]
    override = resolve({**base, "generations": {"max_generations": 4}}, ["generations.max=2"])
    assert override["generations"]["max_generations"] == 2
    with pytest.raises(RecipeError, match="old name of generations.max_generations"):
        resolve({**base, "generations": {"max": 4, "max_generations": 4}})


def test_a_squeezed_regression_output_is_explained(tmp_path):
    data = TensorDataset(torch.randn(40, 5), torch.randn(40))
    squeezed = lambda: _Squeezed()  # noqa: E731
    with pytest.raises(InputError, match=r"return shape \(batch, 1\).*do not squeeze"):
        filial.Lineage(
            squeezed,
            DataLoader(data, batch_size=8),
            DataLoader(TensorDataset(torch.randn(20, 5), torch.randn(20)), batch_size=8),
            run_dir=tmp_path / "run",
            targets="l2",
        )


class _Squeezed(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.linear = nn.Linear(5, 1)

    def forward(self, x):
        return self.linear(x).squeeze(1)


def test_one_column_regression_with_flat_labels_runs(tmp_path):
    g = torch.Generator().manual_seed(0)
    x = torch.randn(64, 5, generator=g)
    data = TensorDataset(x, x.sum(dim=1))  # labels (batch,), outputs (batch, 1)
    heldout = TensorDataset(x[:20] + 0.1, x[:20].sum(dim=1))
    lineage = filial.Lineage(
        lambda: nn.Linear(5, 1),
        DataLoader(data, batch_size=16),
        DataLoader(heldout, batch_size=16),
        run_dir=tmp_path / "run",
        targets="l2",
        **_options(),
    )
    _hook(lineage)
    assert all(isinstance(r["heldout"], float) for r in lineage.result.records)


def test_the_command_has_a_version_and_says_its_defaults(capsys):
    with pytest.raises(SystemExit):
        cli.main(["--version"])
    assert capsys.readouterr().out.strip() == f"filial {filial.__version__}"
    with pytest.raises(SystemExit):
        cli.main(["run", "--help"])
    assert "runs/RUN_NAME" in capsys.readouterr().out
    with pytest.raises(SystemExit):
        cli.main(["report", "--help"])
    assert "a run directory made by filial run" in capsys.readouterr().out


def test_a_run_directory_in_use_is_a_filial_line_not_a_private_class(tmp_path):
    assert issubclass(LockedError, InputError) and issubclass(LockedError, RuntimeError)
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
        data = blobs(40)
        with pytest.raises(LockedError, match=f"in use by process {holder.pid}") as info:
            filial.Lineage(
                TinyNet(), DataLoader(data), DataLoader(blobs(20, seed=5)), run_dir=run_dir
            )
        assert type(info.value).__module__ == "filial.errors"
    finally:
        holder.kill()
        holder.wait()
