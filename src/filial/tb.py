"""TensorBoard layout for the with-versus-without comparison.

Everything is derived from the records in ``lineage.json``, so a resumed run writes the same
files as one that went straight through. Under one lineage's TensorBoard folder (default
``RUN/tb``):

``genG/``
    one run per generation: ``train/loss`` and ``train/running_accuracy_vs_labels`` (or
    ``running_neg_mse``) per epoch, as logged by ``fit_epochs`` or ``gen.log_epoch``.
``summary/``
    ``generation/heldout``, ``generation/test``, ``generation/ensemble``,
    ``generation/train_vs_labels``, ``generation/target_entropy`` or ``generation/output_norm``
    and ``generation/agreement``, with the generation number as the step; ``compare/*`` for the
    first chart (held-out by generation, generation 0's level, the matched baseline's level); the
    custom-scalars layout; the hparams session of the lineage.
``baseline/``
    the matched baseline (a model trained on the labels for as many epochs as the lineage used).

Only the writer's own folder is ever created (``SummaryWriter.add_hparams`` would add a
time-stamped sub-folder per call, so the hparams summaries are written by hand).
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from torch.utils.tensorboard import SummaryWriter
from torch.utils.tensorboard.summary import hparams

from .records import is_number

LAYOUT = {
    "filial: with versus without generations": {
        "held-out metric by generation vs generation 0 and the matched baseline": [
            "Multiline",
            [
                r"compare/heldout_by_generation",
                r"compare/generation_0",
                r"compare/matched_baseline",
            ],
        ],
        "test metric by generation (reported, never used to decide)": [
            "Multiline",
            [r"generation/test"],
        ],
        "held-out, ensemble and train-vs-labels by generation": [
            "Multiline",
            [r"generation/heldout", r"generation/ensemble", r"generation/train_vs_labels"],
        ],
        "held-out across seeds: mean and one standard deviation": [
            "Margin",
            ["seeds/heldout_mean", "seeds/heldout_low", "seeds/heldout_high"],
        ],
    }
}

_SUMMARY_KEYS = {
    "heldout": "generation/heldout",
    "test": "generation/test",
    "ensemble": "generation/ensemble",
    "train": "generation/train_vs_labels",
    "target_entropy": "generation/target_entropy",
    "output_norm": "generation/output_norm",
    "agreement": "generation/agreement",
}


_RUNNING = ("running_accuracy", "running_neg_mse")


class _Writer:
    """A SummaryWriter for one run folder, flushed (and, unless kept, closed) after each use."""

    def __init__(self, folder: Path, cache: dict[Path, SummaryWriter] | None = None) -> None:
        self.folder = folder
        self.cache = cache

    def __enter__(self) -> SummaryWriter:
        writer = self.cache.get(self.folder) if self.cache is not None else None
        if writer is None:
            self.folder.mkdir(parents=True, exist_ok=True)
            # A deep queue: add_scalar never waits for the writer thread (max_queue=10 did).
            writer = SummaryWriter(log_dir=os.fspath(self.folder), max_queue=10_000)
            if self.cache is not None:
                self.cache[self.folder] = writer
        self.writer = writer
        return writer

    def __exit__(self, *exc: Any) -> None:
        self.writer.flush()
        if self.cache is None:
            self.writer.close()


class TensorBoardLog:
    """Writes one lineage's TensorBoard runs under ``folder``."""

    def __init__(self, folder: str | os.PathLike[str]) -> None:
        self.folder = Path(folder)
        # The summary run is written after every generation: one open writer (one event file
        # per process) instead of a new file each time.
        self._open: dict[Path, SummaryWriter] = {}

    def _summary(self) -> _Writer:
        return _Writer(self.folder / "summary", self._open)

    def close(self) -> None:
        for writer in self._open.values():
            writer.close()
        self._open.clear()

    def generation(self, record: dict[str, Any], first: dict[str, Any]) -> None:
        """A finished generation: its epoch run and its points in the summary run."""
        index = int(record["generation"])
        epochs = record.get("epochs") or []
        if epochs:
            with _Writer(self.folder / f"gen{index}") as writer:
                for entry in epochs:
                    step = int(entry["epoch"])
                    if is_number(entry.get("loss")):
                        writer.add_scalar("train/loss", entry["loss"], step)
                    for name in _RUNNING:
                        if is_number(entry.get(name)):
                            writer.add_scalar(f"train/{name}_vs_labels", entry[name], step)
        with self._summary() as writer:
            if index == 0:
                writer.add_custom_scalars(LAYOUT)
            for key, tag in _SUMMARY_KEYS.items():
                if is_number(record.get(key)):
                    writer.add_scalar(tag, record[key], index)
            if is_number(record.get("heldout")):
                writer.add_scalar("compare/heldout_by_generation", record["heldout"], index)
            if is_number(first.get("heldout")):
                writer.add_scalar("compare/generation_0", first["heldout"], index)

    def baseline(self, record: dict[str, Any], generations: Sequence[int]) -> None:
        """The matched baseline: its epoch curves, and its level beside every generation."""
        with _Writer(self.folder / "baseline") as writer:
            for entry in record.get("epochs") or []:
                if is_number(entry.get("loss")):
                    writer.add_scalar("train/loss", entry["loss"], int(entry["epoch"]))
                for name in _RUNNING:
                    if is_number(entry.get(name)):
                        writer.add_scalar(
                            f"train/{name}_vs_labels", entry[name], int(entry["epoch"])
                        )
            for key in ("heldout", "test", "train"):
                if is_number(record.get(key)):
                    writer.add_scalar(f"baseline/{key}", record[key], 0)
        if is_number(record.get("heldout")):
            with self._summary() as writer:
                for index in generations:
                    writer.add_scalar("compare/matched_baseline", record["heldout"], index)

    def session(self, settings: dict[str, Any], metrics: dict[str, float]) -> None:
        """The lineage's row in the hparams table (one row per seed across a recipe's seeds)."""
        hparam_values = {
            k: v for k, v in settings.items() if isinstance(v, (int, float, str, bool))
        }
        metric_values = {f"hparams/{k}": float(v) for k, v in metrics.items() if is_number(v)}
        with self._summary() as writer:
            file_writer = writer._get_file_writer()
            for summary in hparams(hparam_values, metric_values):
                file_writer.add_summary(summary)
            for tag, value in metric_values.items():
                writer.add_scalar(tag, value, 0)


def seeds_spread(
    folder: str | os.PathLike[str],
    means: Sequence[float | None],
    stds: Sequence[float | None],
) -> None:
    """Across-seed held-out mean and mean +- one standard deviation, per generation."""
    with _Writer(Path(folder) / "seeds") as writer:
        writer.add_custom_scalars(LAYOUT)
        for index, (mean, std) in enumerate(zip(means, stds, strict=True)):
            if is_number(mean) and is_number(std):
                writer.add_scalar("seeds/heldout_mean", mean, index)
                writer.add_scalar("seeds/heldout_low", mean - std, index)
                writer.add_scalar("seeds/heldout_high", mean + std, index)
