"""Models trained on the labels alone, to tell the gain of generations from other gains.

Generation 0 is the model "without generations". :func:`train_matched_baseline` trains one more
model on the labels for as many epochs as the whole lineage used (from generation 0's seed, so
the comparison is paired), which tells the gain of generations apart from the gain of more
training. Its record goes to ``RUN/baseline/baseline.json``, its files to ``RUN/baseline/gen0/``.
"""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Callable, Sequence
from typing import Any

from torch import nn

from . import distributed
from ._io import atomic_write_json
from .generation import Generation, GenerationInputs, Measured
from .observers import Observer
from .records import BaselineRecord, GenerationRecord
from .rundir import BASELINE_DIR, RunDirectory
from .seeding import seed_generation

FitFactory = Callable[[int], Callable[[Generation], nn.Module | None]]


def matched_epochs(records: Sequence[GenerationRecord]) -> int:
    """The epochs the whole lineage trained (as logged); a lineage that logged none cannot be
    matched."""
    epochs = sum(len(r.get("epochs") or []) for r in records)
    if epochs == 0:
        raise ValueError(
            "the lineage logged no epochs, so the matched epoch count is unknown: train with "
            "filial.fit_epochs or call gen.log_epoch(epoch, loss=...) in your loop"
        )
    return epochs


def train_matched_baseline(
    inputs: GenerationInputs,
    model_fn: Callable[[], nn.Module],
    records: Sequence[GenerationRecord],
    make_fit: FitFactory,
    observer: Observer,
) -> BaselineRecord:
    """Train, score and record the matched baseline of a finished lineage (see the module
    docstring); a finished baseline for the same epoch count is returned as it is."""
    epochs = matched_epochs(records)
    lineage_run = inputs.run
    state_path = lineage_run.baseline_state_path
    if state_path.is_file():
        stored = json.loads(state_path.read_text(encoding="utf-8"))
        if stored.get("epochs_matched") == epochs:
            return stored

    def conclude(gen: Generation, write: Callable[[], Measured] | None) -> GenerationRecord:
        def save() -> BaselineRecord:
            assert write is not None  # rank 0 (or one process) writes
            record: Any = write().record
            record.update(
                kind="matched-baseline",
                epochs_matched=epochs,
                checkpoint=f"{BASELINE_DIR}/{record['checkpoint']}",
            )
            atomic_write_json(state_path, record)
            return record

        saved = distributed.on_rank_zero(save, "writing the matched baseline")
        if saved is None:  # a rank other than 0: rank 0 has written the baseline's record
            saved = json.loads(state_path.read_text(encoding="utf-8"))
        return saved

    seed_generation(inputs.seed, 0, inputs.train_loader)
    baseline_inputs = dataclasses.replace(
        inputs, run=RunDirectory(lineage_run.baseline_path), write_targets=False
    )
    gen = Generation(0, model_fn(), baseline_inputs, conclude)
    fitted = make_fit(epochs)(gen)
    record: Any = gen.finish(fitted if fitted is not None else gen.model)
    observer.baseline_ended(record, records)
    return record
