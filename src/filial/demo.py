"""The embedded demo: a mail room sorting envelopes by handwritten postcode digit.

The training labels were crowd-sourced and part of them are wrong; a small set of envelopes was
checked by the supervisor (held-out) and another kept aside for the final report (test). The
images are scikit-learn's copy of the UCI optical recognition of handwritten digits data (8x8
pixels, 1,797 images, shipped with the package, so nothing is downloaded). The annotators' mistakes
are simulated with symmetric label noise: each training label is, with probability ``noise``,
replaced by one of the other nine classes drawn uniformly.

Run ``python -m filial.demo`` (options: ``--help``) for a lineage with one row per generation.
Needs the ``demo`` extra (scikit-learn).
"""

from __future__ import annotations

import argparse
import itertools
import logging
import sys
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from . import _checks

CLASSES = 10
DIGITS = 1797  # images in scikit-learn's digits
# Deeper plain MLPs (no residual connections) do not train well; common practice, and a list
# of more layers is a typo rather than a model.
MAX_LAYERS = 1000
# The CNN's activations grow with channels x 64 pixels per image; 4096 is twice the widest
# layer of the ImageNet ResNets (2048), far past anything 8x8 digits can use.
MAX_CHANNELS = 4096


def _load_digits() -> tuple[np.ndarray, np.ndarray]:
    try:
        from sklearn.datasets import load_digits
    except ImportError as exc:  # pragma: no cover - depends on the environment
        raise ImportError("the digits demo needs scikit-learn: pip install 'filial[demo]'") from exc
    digits = load_digits()
    return digits.data.astype(np.float32) / 16.0, digits.target.astype(np.int64)


def symmetric_noise(
    labels: np.ndarray, rate: float, classes: int, seed: int
) -> tuple[np.ndarray, np.ndarray]:
    """Replace each label, with probability ``rate``, by a different class drawn uniformly.

    Returns the noisy labels and the mask of flipped ones.

    >>> noisy, flipped = symmetric_noise(np.zeros(1000, dtype=np.int64), 0.3, 10, seed=0)
    >>> bool((noisy[flipped] != 0).all()), bool(0.25 < flipped.mean() < 0.35)
    (True, True)
    """
    rate = _checks.fraction(rate, "rate")
    rng = np.random.default_rng(seed)
    flipped = rng.random(len(labels)) < rate
    shift = rng.integers(1, classes, size=len(labels))  # 1..classes-1: never the true class
    noisy = np.where(flipped, (labels + shift) % classes, labels)
    return noisy.astype(labels.dtype), flipped


@dataclass
class MailRoom:
    """The three splits: noisy training labels, clean held-out and test labels."""

    train: TensorDataset
    heldout: TensorDataset
    test: TensorDataset
    clean_train_labels: torch.Tensor
    flipped: torch.Tensor

    def loaders(
        self, batch_size: int = 64, seed: int = 0
    ) -> tuple[DataLoader, DataLoader, DataLoader]:
        """Shuffled training loader (seeded generator), held-out and test loaders."""
        generator = torch.Generator().manual_seed(seed)
        return (
            DataLoader(self.train, batch_size=batch_size, shuffle=True, generator=generator),
            DataLoader(self.heldout, batch_size=256),
            DataLoader(self.test, batch_size=256),
        )


def mail_room(
    noise: float = 0.3,
    seed: int = 0,
    train_size: int = 1000,
    heldout_size: int = 300,
    images: bool = False,
) -> MailRoom:
    """Digits split into train / held-out / test with noisy training labels.

    ``seed`` fixes both the split and the noise. ``images=True`` gives inputs of shape (1, 8, 8)
    for the CNN; otherwise flat vectors of 64 values in [0, 1].
    """
    _check_room(noise, seed, train_size, heldout_size, images, prefix="")
    x, y = _load_digits()
    order = np.random.default_rng(seed).permutation(len(x))
    x, y = x[order], y[order]
    if images:
        x = x.reshape(-1, 1, 8, 8)
    cut = train_size + heldout_size
    noisy, flipped = symmetric_noise(y[:train_size], noise, CLASSES, seed + 1)
    tensor = torch.from_numpy
    return MailRoom(
        train=TensorDataset(tensor(x[:train_size]), tensor(noisy)),
        heldout=TensorDataset(tensor(x[train_size:cut]), tensor(y[train_size:cut])),
        test=TensorDataset(tensor(x[cut:]), tensor(y[cut:])),
        clean_train_labels=tensor(y[:train_size]),
        flipped=tensor(flipped),
    )


def _check_room(
    noise: float, seed: int, train_size: int, heldout_size: int, images: bool, prefix: str
) -> None:
    """The mail room's arguments, named ``prefix + name`` (``data.`` for the recipe factory,
    whose ``split_seed`` is the room's ``seed``)."""
    _checks.fraction(noise, f"{prefix}noise")
    _checks.integer(seed, f"{prefix}split_seed" if prefix else "seed", 0, _checks.MAX_SEED)
    _checks.flag(images, f"{prefix}images")
    room = f"the digits have {DIGITS:,} images, and the test set keeps at least one"
    train = _checks.integer(train_size, f"{prefix}train_size", 1, DIGITS - 2, room)
    _checks.integer(heldout_size, f"{prefix}heldout_size", 1, DIGITS - 1 - train, room)


def _check_mlp(hidden: Any, inputs: Any, prefix: str) -> tuple[tuple[int, ...], int]:
    hidden = _checks.integers(
        hidden, f"{prefix}hidden", 1, max_length=MAX_LAYERS, why="deeper plain MLPs do not train"
    )
    inputs = _checks.integer(inputs, f"{prefix}inputs", 1)
    widths = [inputs, *hidden, CLASSES]
    count = sum((a + 1) * b for a, b in itertools.pairwise(widths))  # weights and biases
    _checks.parameters(count, f"an MLP {' -> '.join(str(w) for w in widths)}")
    return hidden, inputs


def _check_cnn(channels: Any, prefix: str) -> tuple[int, int]:
    c1, c2 = _checks.integers(channels, f"{prefix}channels", 1, MAX_CHANNELS, length=2)
    return c1, c2


class MLP:
    """Factory of fresh MLPs ``64 -> hidden... -> 10`` (a picklable ``model_fn``).

    Widths are checked when the factory is made: positive integers, at most
    :data:`MAX_LAYERS` hidden layers and :data:`filial._checks.MAX_PARAMETERS` parameters.
    """

    def __init__(
        self, hidden: Sequence[int] = (256, 256), inputs: int = 64, dropout: float = 0.0
    ) -> None:
        self.hidden, self.inputs = _check_mlp(hidden, inputs, prefix="")
        self.dropout = _checks.fraction(dropout, "dropout")

    def __call__(self) -> nn.Module:
        layers: list[nn.Module] = []
        width = self.inputs
        for h in self.hidden:
            layers += [nn.Linear(width, h), nn.ReLU()]
            if self.dropout:  # a noised student (Noisy Student, Xie et al. 2020)
                layers.append(nn.Dropout(self.dropout))
            width = h
        layers.append(nn.Linear(width, CLASSES))
        return nn.Sequential(*layers)


class CNN:
    """Factory of fresh small CNNs for 1x8x8 digit images (a picklable ``model_fn``)."""

    def __init__(self, channels: Sequence[int] = (16, 32)) -> None:
        self.channels = _check_cnn(channels, prefix="")

    def __call__(self) -> nn.Module:
        c1, c2 = self.channels
        return nn.Sequential(
            nn.Conv2d(1, c1, 3, padding=1),
            nn.ReLU(),
            nn.Conv2d(c1, c2, 3, padding=1),
            nn.ReLU(),
            nn.MaxPool2d(2),
            nn.Flatten(),
            nn.Linear(c2 * 4 * 4, CLASSES),
        )


def mail_room_loaders(
    noise: float = 0.3,
    split_seed: int = 0,
    batch_size: int = 64,
    train_size: int = 1000,
    heldout_size: int = 300,
    images: bool = False,
) -> tuple[DataLoader, DataLoader, DataLoader]:
    """Recipe data factory: the mail room's (train, held-out, test) loaders.

    Arguments are checked by their recipe keys (``data.batch_size`` ...) before any data are
    loaded; ``batch_size`` is at most the 1,797 digits (a batch of the whole training set).
    """
    _check_room(noise, split_seed, train_size, heldout_size, images, prefix="data.")
    _checks.integer(
        batch_size,
        "data.batch_size",
        1,
        DIGITS,
        f"a larger batch than the {DIGITS:,} digits is the whole training set anyway",
    )
    room = mail_room(noise, split_seed, train_size, heldout_size, images)
    return room.loaders(batch_size=batch_size, seed=split_seed)


def mlp(hidden: Sequence[int] = (256, 256), inputs: int = 64, dropout: float = 0.0) -> nn.Module:
    """Recipe model factory: a fresh MLP for flat digits (``model.hidden`` widths, dropout
    after every hidden layer when ``model.dropout`` > 0)."""
    hidden, inputs = _check_mlp(hidden, inputs, prefix="model.")
    return MLP(hidden, inputs, _checks.fraction(dropout, "model.dropout"))()


def mail_room_unlabeled_loaders(
    labels: int = 100,
    noise: float = 0.0,
    split_seed: int = 0,
    batch_size: int = 32,
    train_size: int = 1000,
    heldout_size: int = 300,
    audit: bool = True,
) -> dict[str, DataLoader]:
    """Recipe data factory: the mail room where most envelopes arrive without a label.

    The first ``labels`` envelopes of the training split keep their (crowd-sourced, ``noise``)
    labels; the rest of the split is the unlabelled pool, a dataset of ``(image, true digit)``
    pairs whose digits only the audit figure reads (``pool.audit = true``; with ``audit =
    false`` the pool holds images alone). Keys: train, heldout, test, unlabeled.
    """
    _check_room(noise, split_seed, train_size, heldout_size, False, prefix="data.")
    _checks.integer(labels, "data.labels", 1, train_size - 1, "the pool keeps at least one")
    _checks.integer(batch_size, "data.batch_size", 1, DIGITS)
    _checks.flag(audit, "data.audit")
    room = mail_room(noise, split_seed, train_size, heldout_size)
    x, y = room.train.tensors
    truth = room.clean_train_labels
    generator = torch.Generator().manual_seed(split_seed)
    train = TensorDataset(x[:labels], y[:labels])
    pool: Any = TensorDataset(x[labels:], truth[labels:]) if audit else _Images(x[labels:])
    return {
        "train": DataLoader(train, batch_size=batch_size, shuffle=True, generator=generator),
        "heldout": DataLoader(room.heldout, batch_size=256),
        "test": DataLoader(room.test, batch_size=256),
        "unlabeled": DataLoader(pool, batch_size=256),
    }


class _Images(torch.utils.data.Dataset):
    """Images alone (a pool without labels)."""

    def __init__(self, images: torch.Tensor) -> None:
        self.images = images

    def __len__(self) -> int:
        return len(self.images)

    def __getitem__(self, index: int) -> torch.Tensor:
        return self.images[index]


def cnn(channels: Sequence[int] = (16, 32)) -> nn.Module:
    """Recipe model factory: a fresh small CNN for 1x8x8 digits (use ``images = true``)."""
    return CNN(_check_cnn(channels, prefix="model."))()


def main(argv: Sequence[str] | None = None) -> int:
    import filial
    from filial.report import generation_table

    parser = argparse.ArgumentParser(
        prog="python -m filial.demo",
        description="Self-distillation generations on the mail-room digits with noisy labels.",
    )
    parser.add_argument("--targets", choices=("ce", "l2"), default="ce")
    parser.add_argument("--model", choices=("mlp", "cnn"), default="mlp")
    parser.add_argument("--noise", type=float, default=0.3, help="label noise rate (0.3)")
    parser.add_argument("--epochs", type=int, default=60)
    parser.add_argument("--lr", type=float, default=0.05)
    parser.add_argument("--generations", type=int, default=6, help="max generations after 0")
    parser.add_argument("--patience", type=int, default=2)
    parser.add_argument("--temperature", type=float, default=1.0)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--run-dir", default="runs/demo")
    parser.add_argument("--fresh", action="store_true", help="delete an earlier demo run first")
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="%(message)s", stream=sys.stderr)
    torch.set_num_threads(max(1, torch.get_num_threads()))

    room = mail_room(noise=args.noise, seed=args.seed, images=args.model == "cnn")
    train, heldout, test = room.loaders(seed=args.seed)
    lineage = filial.Lineage(
        MLP() if args.model == "mlp" else CNN(),
        train,
        heldout,
        run_dir=args.run_dir,
        targets=args.targets,
        temperature=args.temperature,
        max_generations=args.generations,
        patience=args.patience,
        test_loader=test,
        seed=args.seed,
        fresh=args.fresh,
    )
    fit = filial.fit_epochs(
        epochs=args.epochs,
        optimizer=lambda p: torch.optim.SGD(p, lr=args.lr, momentum=0.9, weight_decay=5e-4),
    )
    result = lineage.run(fit)
    print(
        f"mail room: {len(room.train)} envelopes with {float(room.flipped.float().mean()):.0%} "
        f"wrong labels, {len(room.heldout)} checked (held-out), {len(room.test)} for the report"
    )
    print(generation_table(result.records, result.best))
    kept = (
        f"best generation {result.best} ({result.checkpoint()})"
        if result.best is not None
        else ("no generation finished without diverging")
    )
    print(f"stopped: {result.stop_reason}; {kept}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
