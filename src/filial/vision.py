"""CIFAR-style vision: the CIFAR ResNets of He et al. 2016 and CIFAR-10/100 loaders.

The model is the 32x32 family of "Deep Residual Learning for Image Recognition" (He, Zhang, Ren
and Sun, CVPR 2016, section 4.2): a 3x3 convolution, then three stages of ``n`` residual blocks
with 16, 32 and 64 channels (each block two 3x3 convolutions with batch norm; the first block of
the second and third stages halves the feature map), global average pooling and a linear head:
depth ``6n + 2``. Shortcuts are identities; where a stage widens, the paper's option A takes every
other pixel and pads the new channels with zeros, so shortcuts add no parameters.

The loaders read the python version of CIFAR-10 or CIFAR-100 from a local folder (never
downloading) or, with ``source = "fake"``, use torchvision's ``FakeData`` with the same
transforms. torchvision (the ``vision`` extra) is imported inside the data functions only:
``import filial`` and the model need torch alone.

Recipe factories: ``model.factory = "filial.vision:cifar_resnet"`` and ``data.factory =
"filial.vision:cifar_loaders"`` (``recipes/cifar10_resnet.toml``, ``recipes/cifar100_resnet.toml``).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, Dataset

from . import _checks
from .errors import InputError

# Per-channel mean and standard deviation of the training images (pixels in [0, 1]), quoted from
# memory of the values commonly published for these datasets, not recomputed here.
STATS = {
    "cifar10": ((0.4914, 0.4822, 0.4465), (0.2470, 0.2435, 0.2616)),
    "cifar100": ((0.5071, 0.4865, 0.4409), (0.2673, 0.2564, 0.2762)),
}
CLASSES = {"cifar10": 10, "cifar100": 100}
NAMES = {"cifar10": "CIFAR-10", "cifar100": "CIFAR-100"}
DOWNLOAD_PAGE = "https://www.cs.toronto.edu/~kriz/cifar.html"
ARCHIVES = {"cifar10": "cifar-10-python.tar.gz", "cifar100": "cifar-100-python.tar.gz"}
TRAIN_SIZE, TEST_SIZE = 50_000, 10_000  # both datasets; FakeData mirrors them
# ResNet-1202, the deepest CIFAR ResNet He et al. 2016 trained (section 4.2, table 6).
MAX_DEPTH = 1202


# -- the model -----------------------------------------------------------------------------------


def check_depth(depth: Any) -> int:
    """``depth`` if it is ``6n + 2`` for a whole ``n >= 1``, at most :data:`MAX_DEPTH`;
    otherwise an :class:`InputError`.

    >>> check_depth(20), check_depth(110)
    (20, 110)
    """
    if (
        not isinstance(depth, int)
        or isinstance(depth, bool)
        or not 8 <= depth <= MAX_DEPTH
        or (depth - 2) % 6
    ):
        raise InputError(
            f"depth should be 6n+2 for a whole n >= 1, at most {MAX_DEPTH} (8, 14, 20, 26, 32, "
            f"...; the paper's are 20, 32, 44, 56 and 110, and 1202 its deepest), but got {depth!r}"
        )
    return depth


def resnet_parameters(depth: int, classes: int) -> int:
    """The parameter count of ``CifarResNet(depth, classes)``, computed without building it.

    >>> resnet_parameters(20, 10)  # the paper's 0.27M (He et al. 2016, table 6)
    269722
    """
    n = (check_depth(depth) - 2) // 6
    count = 3 * 16 * 9 + 2 * 16  # first convolution and its batch norm
    width = 16
    for channels in (16, 32, 64):
        for _ in range(n):
            count += width * channels * 9 + channels * channels * 9 + 4 * channels
            width = channels
    return count + 64 * classes + classes


class ShortcutA(nn.Module):
    """The paper's option A: identity, strided where the map shrinks, zero-padded channels."""

    def __init__(self, inputs: int, outputs: int, stride: int) -> None:
        super().__init__()
        self.extra, self.stride = outputs - inputs, stride

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if self.stride > 1:
            x = x[:, :, :: self.stride, :: self.stride]
        if self.extra:
            x = F.pad(x, (0, 0, 0, 0, 0, self.extra))  # zeros after the existing channels
        return x


class BasicBlock(nn.Module):
    """Two 3x3 convolutions with batch norm; ReLU after the sum with the shortcut."""

    def __init__(self, inputs: int, outputs: int, stride: int) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(inputs, outputs, 3, stride=stride, padding=1, bias=False)
        self.bn1 = nn.BatchNorm2d(outputs)
        self.conv2 = nn.Conv2d(outputs, outputs, 3, padding=1, bias=False)
        self.bn2 = nn.BatchNorm2d(outputs)
        self.shortcut = ShortcutA(inputs, outputs, stride)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out = F.relu(self.bn1(self.conv1(x)))
        out = self.bn2(self.conv2(out))
        return F.relu(out + self.shortcut(x))


class CifarResNet(nn.Module):
    """ResNet-``depth`` for 3x32x32 images (``depth = 6n + 2``), ``classes`` logits."""

    def __init__(self, depth: int = 20, classes: int = 10) -> None:
        super().__init__()
        n = (check_depth(depth) - 2) // 6
        classes = _checks.integer(classes, "classes", 1)
        _checks.parameters(
            resnet_parameters(depth, classes), f"a ResNet-{depth} with {classes:,} classes"
        )
        self.conv = nn.Conv2d(3, 16, 3, padding=1, bias=False)
        self.bn = nn.BatchNorm2d(16)
        blocks: list[nn.Module] = []
        width = 16
        for stage, channels in enumerate((16, 32, 64)):
            for i in range(n):
                stride = 2 if stage > 0 and i == 0 else 1
                blocks.append(BasicBlock(width, channels, stride))
                width = channels
        self.blocks = nn.Sequential(*blocks)
        self.head = nn.Linear(64, classes)
        for module in self.modules():  # He et al. 2015 initialisation, as the paper uses
            if isinstance(module, nn.Conv2d):
                nn.init.kaiming_normal_(module.weight, mode="fan_out", nonlinearity="relu")

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out = self.blocks(F.relu(self.bn(self.conv(x))))
        return self.head(torch.flatten(F.adaptive_avg_pool2d(out, 1), 1))


def cifar_resnet(depth: int = 20, classes: int = 10) -> nn.Module:
    """Recipe model factory: a fresh CIFAR ResNet (``depth = 6n + 2``)."""
    return CifarResNet(depth, classes)


# -- the data ------------------------------------------------------------------------------------


def _torchvision() -> Any:
    try:
        import torchvision
    except ImportError as exc:
        raise ImportError(
            "the CIFAR loaders need torchvision: pip install 'filial[vision]'"
        ) from exc
    return torchvision


def transforms(dataset: str, train: bool) -> Any:
    """Training: random 32x32 crop of the image padded by 4 pixels, horizontal flip; both:
    to a tensor in [0, 1] and normalised per channel."""
    t = _torchvision().transforms
    mean, std = STATS[dataset]
    steps = [t.RandomCrop(32, padding=4), t.RandomHorizontalFlip()] if train else []
    return t.Compose([*steps, t.ToTensor(), t.Normalize(mean, std)])


class Split(Dataset):
    """The samples ``indices`` of ``base`` (PIL image, label) through ``transform``; labels are
    Python ints, so the default collate makes int64 tensors."""

    def __init__(self, base: Any, indices: np.ndarray, transform: Any) -> None:
        self.base, self.indices, self.transform = base, indices, transform

    def __len__(self) -> int:
        return len(self.indices)

    def __getitem__(self, i: int) -> tuple[torch.Tensor, int]:
        image, label = self.base[int(self.indices[i])]
        return self.transform(image), int(label)


def _folder_dataset(dataset: str, root: Path) -> tuple[Any, Any]:
    """The official training and test splits read from ``root``; a clear error when absent."""
    datasets = _torchvision().datasets
    kind = datasets.CIFAR10 if dataset == "cifar10" else datasets.CIFAR100
    folder = root / kind.base_folder
    expected = [name for name, _md5 in kind.train_list + kind.test_list] + [kind.meta["filename"]]
    missing = [name for name in expected if not (folder / name).is_file()]
    name = NAMES[dataset]
    if missing:
        found = f"missing: {', '.join(missing)}" if folder.is_dir() else f"{folder} does not exist"
        raise InputError(
            f"{name} is not in {folder}: filial looked there for {', '.join(expected)} ({found}) "
            f"and never downloads data. Get {ARCHIVES[dataset]} (the python version) from "
            f"{DOWNLOAD_PAGE} and extract it into {root} (it unpacks to {kind.base_folder}/), or "
            f'on a machine with internet run python -c "import torchvision; '
            f"torchvision.datasets.{kind.__name__}('{root}', download=True)\" and copy "
            f"{kind.base_folder}/ into {root}. Set data.root for another folder, or try the "
            "recipe without the files: --set data.source=fake"
        )
    try:
        return kind(str(root), train=True, download=False), kind(
            str(root), train=False, download=False
        )
    except RuntimeError as exc:  # present but failing torchvision's checksums
        raise InputError(
            f"{name} files in {folder} fail torchvision's checks ({exc}); extract "
            f"{ARCHIVES[dataset]} from {DOWNLOAD_PAGE} into {root} again"
        ) from exc


def _fake_dataset(dataset: str) -> tuple[Any, Any]:
    """torchvision's FakeData (random 3x32x32 images, random labels) at the real sizes; the
    test images are other ones (an offset into FakeData's per-index seeds)."""
    fake = _torchvision().datasets.FakeData
    classes = CLASSES[dataset]
    train = fake(size=TRAIN_SIZE, image_size=(3, 32, 32), num_classes=classes)
    test = fake(
        size=TEST_SIZE, image_size=(3, 32, 32), num_classes=classes, random_offset=TRAIN_SIZE
    )
    return train, test


def max_workers() -> int:
    """The most DataLoader workers :func:`cifar_loaders` starts: four per core, at least 32.
    Each worker is a process with its own copy of the dataset object; beyond a few per core
    they add memory, not speed (common practice), and a count typed with zeros too many would
    start that many processes."""
    return max(32, 4 * (os.cpu_count() or 1))


def cifar_loaders(
    dataset: str = "cifar10",
    root: str = "data",
    source: str = "folder",
    subset: int = 0,
    heldout_size: int = 5000,
    test_subset: int = 0,
    split_seed: int = 0,
    batch_size: int = 128,
    workers: int = 2,
) -> tuple[DataLoader, DataLoader, DataLoader]:
    """Recipe data factory: (train, held-out, test) loaders of CIFAR-10 or CIFAR-100.

    ``heldout_size`` images are drawn from the official training split (a permutation under
    ``split_seed``) and scored without augmentation; the training part keeps the rest in file
    order, of which ``subset`` > 0 keeps the first ``subset``. The test loader is the official
    test split (its first ``test_subset`` images when > 0), without augmentation. ``source =
    "fake"`` swaps the files for torchvision's FakeData at the same sizes.
    """
    _checks.choice(dataset, "data.dataset", tuple(CLASSES))
    _checks.choice(source, "data.source", ("folder", "fake"))
    if not isinstance(root, (str, os.PathLike)) or not str(root):
        raise InputError(f"data.root should be a folder name, but got data.root={root!r}")
    heldout_size = _checks.integer(
        heldout_size,
        "data.heldout_size",
        1,
        TRAIN_SIZE - 1,
        f"it is split off the {TRAIN_SIZE:,} training images",
    )
    rest = TRAIN_SIZE - heldout_size
    subset = _checks.integer(
        subset, "data.subset", 0, rest, f"0 for all {rest:,} training images left"
    )
    _checks.integer(
        test_subset, "data.test_subset", 0, TEST_SIZE, f"0 for all {TEST_SIZE:,} test images"
    )
    _checks.integer(split_seed, "data.split_seed", 0, _checks.MAX_SEED)
    _checks.integer(
        batch_size,
        "data.batch_size",
        1,
        TRAIN_SIZE,
        f"a larger batch than the {TRAIN_SIZE:,} training images is the whole set anyway",
    )
    _checks.integer(
        workers, "data.workers", 0, max_workers(), "each worker is a process; 4 per core at most"
    )
    folder = Path(root).expanduser().absolute()
    train_base, test_base = (
        _fake_dataset(dataset) if source == "fake" else _folder_dataset(dataset, folder)
    )
    order = np.random.default_rng(split_seed).permutation(len(train_base))
    heldout = np.sort(order[:heldout_size])
    train = np.sort(order[heldout_size:])
    if subset:
        train = train[:subset]
    test = np.arange(min(test_subset, len(test_base)) if test_subset else len(test_base))
    augment, plain = transforms(dataset, train=True), transforms(dataset, train=False)
    common: dict[str, Any] = {"batch_size": batch_size, "num_workers": workers}
    return (
        DataLoader(
            Split(train_base, train, augment),
            shuffle=True,
            generator=torch.Generator().manual_seed(split_seed),
            **common,
        ),
        DataLoader(Split(train_base, heldout, plain), **common),
        DataLoader(Split(test_base, test, plain), **common),
    )


def cifar_unlabeled_loaders(
    dataset: str = "cifar10",
    root: str = "data",
    source: str = "folder",
    labels: int = 4000,
    pool_size: int = 0,
    heldout_size: int = 5000,
    test_subset: int = 0,
    split_seed: int = 0,
    batch_size: int = 128,
    workers: int = 2,
) -> dict[str, DataLoader]:
    """Recipe data factory: CIFAR with few labels (the common semi-supervised protocol: 4,000
    labelled CIFAR-10 training images) and the other training images as an unlabelled pool.

    ``heldout_size`` images are split off the training split as in :func:`cifar_loaders`;
    of the rest (a permutation under ``split_seed``) the first ``labels`` keep their labels
    and the others (the first ``pool_size`` of them when > 0) form the pool: ``(image, true
    label)`` pairs, augmented as the training images are, whose labels only the audit figure
    reads (recipe ``pool.audit``). Keys: train, heldout, test, unlabeled.
    """
    _checks.choice(dataset, "data.dataset", tuple(CLASSES))
    _checks.choice(source, "data.source", ("folder", "fake"))
    heldout_size = _checks.integer(heldout_size, "data.heldout_size", 1, TRAIN_SIZE - 2)
    rest = TRAIN_SIZE - heldout_size
    labels = _checks.integer(labels, "data.labels", 1, rest - 1, "the pool keeps at least one")
    pool_size = _checks.integer(pool_size, "data.pool_size", 0, rest - labels, "0: all the rest")
    _checks.integer(test_subset, "data.test_subset", 0, TEST_SIZE)
    _checks.integer(split_seed, "data.split_seed", 0, _checks.MAX_SEED)
    _checks.integer(batch_size, "data.batch_size", 1, TRAIN_SIZE)
    _checks.integer(workers, "data.workers", 0, max_workers())
    if not isinstance(root, (str, os.PathLike)) or not str(root):
        raise InputError(f"data.root should be a folder name, but got data.root={root!r}")
    folder = Path(root).expanduser().absolute()
    train_base, test_base = (
        _fake_dataset(dataset) if source == "fake" else _folder_dataset(dataset, folder)
    )
    order = np.random.default_rng(split_seed).permutation(len(train_base))
    heldout = np.sort(order[:heldout_size])
    labelled = np.sort(order[heldout_size : heldout_size + labels])
    pool = np.sort(order[heldout_size + labels :])
    if pool_size:
        pool = pool[:pool_size]
    test = np.arange(min(test_subset, len(test_base)) if test_subset else len(test_base))
    augment, plain = transforms(dataset, train=True), transforms(dataset, train=False)
    common: dict[str, Any] = {"batch_size": batch_size, "num_workers": workers}
    return {
        "train": DataLoader(
            Split(train_base, labelled, augment),
            shuffle=True,
            generator=torch.Generator().manual_seed(split_seed),
            **common,
        ),
        "heldout": DataLoader(Split(train_base, heldout, plain), **common),
        "test": DataLoader(Split(test_base, test, plain), **common),
        "unlabeled": DataLoader(Split(train_base, pool, augment), **common),
    }
