"""The CIFAR vision recipes: the ResNet against its paper, the loaders, the recipes end to end."""

from __future__ import annotations

import json
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest
import torch
from torch import nn

from filial import cli
from filial.errors import InputError
from filial.stopping import StopRule
from filial.vision import STATS, BasicBlock, ShortcutA, cifar_loaders, cifar_resnet

ROOT = Path(__file__).resolve().parents[1]


def _parameters(module: nn.Module) -> int:
    return sum(p.numel() for p in module.parameters())


def test_import_filial_does_not_import_torchvision():
    code = (
        "import sys, filial, filial.cli, filial.vision\n"
        "filial.vision.cifar_resnet(20)\n"
        "assert 'torchvision' not in sys.modules, 'torchvision was imported'\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr


# He et al. 2016, table 6 (CIFAR-10, 10 classes): parameters of ResNet-20 ... ResNet-110, in
# millions as printed there (two significant digits), so each count must round to that figure.
@pytest.mark.parametrize(
    "depth, millions, tolerance",
    [(20, 0.27, 0.005), (32, 0.46, 0.005), (44, 0.66, 0.005), (56, 0.85, 0.005), (110, 1.7, 0.05)],
)
def test_parameter_counts_match_the_papers_table_6(depth, millions, tolerance):
    assert abs(_parameters(cifar_resnet(depth, 10)) / 1e6 - millions) <= tolerance


def test_the_architecture_is_the_papers_cifar_family():
    n = 3  # ResNet-20
    model = cifar_resnet(6 * n + 2, 10)
    weighted = [m for m in model.modules() if isinstance(m, (nn.Conv2d, nn.Linear))]
    assert len(weighted) == 6 * n + 2  # the depth counts the weighted layers
    convs = [m for m in weighted if isinstance(m, nn.Conv2d)]
    assert {m.kernel_size for m in convs} == {(3, 3)}  # option A: no 1x1 projection
    assert {m.out_channels for m in convs} == {16, 32, 64}
    assert len([m for m in model.modules() if isinstance(m, BasicBlock)]) == 3 * n
    shortcuts = [m for m in model.modules() if isinstance(m, ShortcutA)]
    assert len(shortcuts) == 3 * n and sum(_parameters(s) for s in shortcuts) == 0
    x = torch.randn(2, 3, 32, 32)
    stem = torch.relu(model.bn(model.conv(x)))
    assert model.blocks(stem).shape == (2, 64, 8, 8)  # 32 -> 16 -> 8 across the stages
    assert model(x).shape == (2, 10) and cifar_resnet(8, 100)(x).shape == (2, 100)


def test_option_a_is_a_strided_identity_padded_with_zeros():
    x = torch.randn(2, 16, 32, 32)
    out = ShortcutA(16, 32, stride=2)(x)
    assert out.shape == (2, 32, 16, 16)
    assert torch.equal(out[:, :16], x[:, :, ::2, ::2]) and not out[:, 16:].any()
    assert ShortcutA(16, 16, stride=1)(x) is x


@pytest.mark.parametrize("depth", [21, 18, 2, 0, -4, 20.0, True, "20"])
def test_depths_that_are_not_6n_plus_2_are_refused(depth):
    with pytest.raises(InputError, match=r"6n\+2 .*20, 32, 44, 56 and 110"):
        cifar_resnet(depth)


def test_a_bad_depth_in_a_recipe_exits_2_naming_it(tmp_path, capsys):
    argv = [
        "run",
        str(ROOT / "recipes" / "cifar10_resnet.toml"),
        "--run-dir",
        str(tmp_path / "run"),
        "--set",
        "data.source=fake",
        "--set",
        "model.depth=21",
    ]
    assert cli.main(argv) == 2
    err = capsys.readouterr().err
    assert "depth should be 6n+2" in err and "but got 21" in err
    assert not (tmp_path / "run").exists()


# The layout of the python versions, as the dataset's download page describes the archives.
CIFAR10_FILES = [f"data_batch_{i}" for i in range(1, 6)] + ["test_batch", "batches.meta"]
CIFAR100_FILES = ["train", "test", "meta"]


@pytest.mark.parametrize(
    "dataset, folder, files, archive",
    [
        ("cifar10", "cifar-10-batches-py", CIFAR10_FILES, "cifar-10-python.tar.gz"),
        ("cifar100", "cifar-100-python", CIFAR100_FILES, "cifar-100-python.tar.gz"),
    ],
)
def test_absent_files_name_the_folder_the_files_and_how_to_get_them(
    tmp_path, dataset, folder, files, archive
):
    with pytest.raises(InputError) as info:
        cifar_loaders(dataset, root=str(tmp_path))
    message = str(info.value)
    assert f"{tmp_path / folder} does not exist" in message
    assert f"looked there for {', '.join(files)}" in message
    assert archive in message and "https://www.cs.toronto.edu/~kriz/cifar.html" in message
    assert "download=True" in message and "data.source=fake" in message

    (tmp_path / folder).mkdir()
    (tmp_path / folder / files[0]).write_bytes(b"")
    with pytest.raises(InputError) as info:
        cifar_loaders(dataset, root=str(tmp_path))
    assert f"(missing: {', '.join(files[1:])})" in str(info.value)


def test_files_failing_the_checksums_are_an_input_error(tmp_path):
    folder = tmp_path / "cifar-10-batches-py"
    folder.mkdir()
    for name in CIFAR10_FILES:
        (folder / name).write_bytes(b"not a pickle")
    with pytest.raises(InputError, match="fail torchvision's checks"):
        cifar_loaders(root=str(tmp_path))


def test_missing_files_through_the_command_exit_2_naming_the_folder(tmp_path, capsys):
    argv = [
        "run",
        str(ROOT / "recipes" / "cifar100_resnet.toml"),
        "--run-dir",
        str(tmp_path / "run"),
        "--set",
        f"data.root={tmp_path / 'nowhere'}",
    ]
    assert cli.main(argv) == 2
    assert str(tmp_path / "nowhere" / "cifar-100-python") in capsys.readouterr().err
    assert not (tmp_path / "run").exists()


def _fake(**kwargs):
    settings = {"source": "fake", "subset": 40, "heldout_size": 20, "test_subset": 12}
    return cifar_loaders(**{**settings, **kwargs})


def test_training_images_are_augmented_and_heldout_images_are_not():
    train, heldout, test = _fake(workers=0)
    torch.manual_seed(0)
    fetches = [train.dataset[0][0] for _ in range(6)]
    assert not all(torch.equal(fetches[0], f) for f in fetches[1:])
    for loader in (heldout, test):
        assert torch.equal(loader.dataset[3][0], loader.dataset[3][0])
    # Held-out is only ToTensor and Normalize: the same pixels computed here with numpy.
    image, _ = heldout.dataset.base[int(heldout.dataset.indices[3])]
    mean, std = (np.array(v, dtype=np.float32)[:, None, None] for v in STATS["cifar10"])
    expected = (np.asarray(image, dtype=np.float32).transpose(2, 0, 1) / 255 - mean) / std
    assert np.allclose(heldout.dataset[3][0].numpy(), expected, atol=1e-6)
    # Every augmented view is a 32x32 window of the 4-pixel zero-padded (normalised-zero) image,
    # possibly mirrored: one of the 9 x 9 x 2 candidates.
    plain = torch.from_numpy(np.asarray(train.dataset.base[0][0], np.float32) / 255)
    padded = torch.nn.functional.pad(plain.permute(2, 0, 1), (4, 4, 4, 4))
    for view in fetches:
        raw = (
            view * torch.tensor(STATS["cifar10"][1])[:, None, None]
            + torch.tensor(STATS["cifar10"][0])[:, None, None]
        )
        candidates = [
            w
            for i in range(9)
            for j in range(9)
            for w in (padded[:, i : i + 32, j : j + 32], padded[:, i : i + 32, j : j + 32].flip(2))
        ]
        assert any(torch.allclose(raw, c, atol=1e-5) for c in candidates)


def test_splits_subset_labels_and_fake_class_counts():
    train, heldout, test = _fake(split_seed=3, workers=0)
    assert (len(train.dataset), len(heldout.dataset), len(test.dataset)) == (40, 20, 12)
    assert not set(train.dataset.indices) & set(heldout.dataset.indices)
    # The training part keeps file order, and subset keeps its first images.
    everything, _, _ = _fake(split_seed=3, subset=0, workers=0)
    assert len(everything.dataset) == 50_000 - 20
    assert list(train.dataset.indices) == list(everything.dataset.indices[:40])
    _, other, _ = _fake(split_seed=4, workers=0)
    assert list(other.dataset.indices) != list(heldout.dataset.indices)
    x, y, *_ = next(iter(train))
    assert x.shape == (40, 3, 32, 32) and x.dtype == torch.float32  # one batch of 128 or fewer
    assert y.dtype == torch.int64
    _, held100, _ = _fake(dataset="cifar100", heldout_size=400, workers=0)
    labels = torch.cat([y for _, y in held100])
    assert labels.dtype == torch.int64 and 0 <= labels.min() and labels.max() < 100
    assert len(labels.unique()) > 10


@pytest.mark.parametrize(
    "key, value, words",
    [
        ("dataset", "mnist", "data.dataset"),
        ("source", "web", "data.source"),
        ("subset", -1, "data.subset"),
        ("heldout_size", 0, "data.heldout_size"),
        ("batch_size", 0, "data.batch_size"),
    ],
)
def test_bad_data_keys_are_named(key, value, words):
    with pytest.raises(InputError, match=words):
        _fake(**{key: value})


@pytest.mark.slow
@pytest.mark.parametrize("name", ["cifar10_resnet.toml", "cifar100_resnet.toml"])
def test_cifar_recipes_run_end_to_end_over_fake_data(name, tmp_path, monkeypatch, capsys):
    """The shipped recipe through `filial run`: FakeData at 32x32, the real transforms, loaders
    with worker processes and the real (shallowest) ResNet, two generations.

    FakeData's labels are random and each crop of its noise images is a new image, so generation
    0 learns little beyond the commonest label and may predict one class almost everywhere, which
    rightly stops a lineage on collapse (tests/test_stopping.py). That stop is turned off here so
    that the student generation always runs.
    """
    monkeypatch.setattr(StopRule, "collapsed", lambda self, record, first: None)
    run_dir = tmp_path / "run"
    overrides = {
        "data.source": "fake",
        "data.subset": 48,
        "data.heldout_size": 24,
        "data.test_subset": 24,
        "data.batch_size": 16,
        "model.depth": 8,
        "training.epochs": 2,
        "generations.max": 1,
        "run.baseline": "none",
    }
    argv = ["run", str(ROOT / "recipes" / name), "--run-dir", str(run_dir)]
    for key, value in overrides.items():
        argv += ["--set", f"{key}={value}"]
    assert cli.main(argv) == 0, capsys.readouterr().err
    assert "kept generation" in capsys.readouterr().out
    state = json.loads((run_dir / "seed0" / "lineage.json").read_text())
    assert [r["generation"] for r in state["records"]] == [0, 1]
    assert [r["mode"] for r in state["records"]] == ["labels", "cached"]
    assert state["records"][-1]["stop"]["reason"] == "max-generations"
    classes = 100 if name.startswith("cifar100") else 10
    targets = np.load(run_dir / "seed0" / "gen0" / "targets.npy")  # generation 1's teacher
    assert targets.shape == (48, 4, classes)  # the recipes' four replayed views per image
    assert not np.array_equal(targets[:, 0], targets[:, 1])  # views of other crops and flips
    saved = tomllib.loads((run_dir / "recipe.toml").read_text())
    assert saved["data"]["source"] == "fake" and saved["model"]["depth"] == 8
