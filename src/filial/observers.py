"""What is printed or logged while a lineage runs, and where: observers of its progress.

A lineage tells its observers what happens (a run resumed, a generation started, an epoch or a
generation ended, a baseline finished, the lineage closed) and never prints itself. Two ship
with filial: :class:`ConsoleProgress` (one line per finished generation on stderr) and
:class:`TensorBoardRuns` (the TensorBoard runs of :mod:`filial.tb`, derived from the records). A
new view of a run (the spectral view, say) is one more :class:`Observer`.

Observers see records after they are on disk, so what they show always matches
``lineage.json``; they run on rank 0 only under a process group.
"""

from __future__ import annotations

import math
import os
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from tqdm.auto import tqdm

from . import distributed
from .records import BaselineRecord, DecisionState, EpochEntry, GenerationRecord
from .spectral import FOLDER as SPECTRAL_FOLDER
from .spectral import load_coefficients
from .stopping import StopRule
from .tb import TensorBoardLog, baseline_name


class Observer:
    """The calls a lineage makes to its observers (each one a no-op here)."""

    def attached(self, run_dir: Path, settings: dict[str, Any]) -> None:
        """The lineage is built: its run directory and its settings (``lineage.json``'s)."""

    def resumed(
        self, run_dir: Path, records: Sequence[GenerationRecord], decision: DecisionState | None
    ) -> None:
        """An existing run directory is opened with finished generations (``decision`` says
        whether the lineage had already stopped)."""

    def generation_started(self, index: int, teacher: int | None) -> None:
        """Generation ``index`` is handed out (``teacher``: its teacher's index)."""

    def epoch_ended(self, index: int, entry: EpochEntry) -> None:
        """``gen.log_epoch`` recorded an epoch of generation ``index``."""

    def generation_ended(
        self, record: GenerationRecord, records: Sequence[GenerationRecord], decision: DecisionState
    ) -> None:
        """``record`` is written (``records`` holds every finished one, ``record`` last)."""

    def baseline_ended(self, record: BaselineRecord, records: Sequence[GenerationRecord]) -> None:
        """A baseline trained on the labels finished."""

    def close(self) -> None:
        """The lineage is closed; release files."""


class Observers(Observer):
    """Several observers, told in order."""

    def __init__(self, observers: Sequence[Observer] = ()) -> None:
        self.observers = list(observers)

    def attached(self, run_dir: Path, settings: dict[str, Any]) -> None:
        for observer in self.observers:
            observer.attached(run_dir, settings)

    def resumed(
        self, run_dir: Path, records: Sequence[GenerationRecord], decision: DecisionState | None
    ) -> None:
        for observer in self.observers:
            observer.resumed(run_dir, records, decision)

    def generation_started(self, index: int, teacher: int | None) -> None:
        for observer in self.observers:
            observer.generation_started(index, teacher)

    def epoch_ended(self, index: int, entry: EpochEntry) -> None:
        for observer in self.observers:
            observer.epoch_ended(index, entry)

    def generation_ended(
        self, record: GenerationRecord, records: Sequence[GenerationRecord], decision: DecisionState
    ) -> None:
        for observer in self.observers:
            observer.generation_ended(record, records, decision)

    def baseline_ended(self, record: BaselineRecord, records: Sequence[GenerationRecord]) -> None:
        for observer in self.observers:
            observer.baseline_ended(record, records)

    def close(self) -> None:
        for observer in self.observers:
            observer.close()


def figure(value: Any) -> str:
    """A metric for a line of text: four decimals, '-' when absent."""
    if value is None:
        return "-"
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    return f"{value:.4f}"


def forecast_line(found: dict[str, Any]) -> str:
    """The spectral forecast in one line (see :func:`filial.spectral.forecast`)."""
    fixed, refit = found["fixed"], found["refit"]

    def collapse(regime: dict[str, Any]) -> str:
        return "none in range" if regime["collapse"] is None else f"at {regime['collapse']}"

    return (
        f"spectral forecast (kernel ridge, c = {found['ridge']:.3g}): best generation "
        f"{fixed['best']} (held-out {figure(fixed['heldout'][fixed['best']])}), collapse "
        f"{collapse(fixed)}; with c refitted each round: best {refit['best']}, collapse "
        f"{collapse(refit)}"
    )


class ConsoleProgress(Observer):
    """One line per finished generation on stderr, through tqdm so open bars survive."""

    def say(self, line: str) -> None:
        tqdm.write(f"filial: {line}", file=sys.stderr)

    def resumed(
        self, run_dir: Path, records: Sequence[GenerationRecord], decision: DecisionState | None
    ) -> None:
        if decision and decision["stop"]:
            self.say(
                f"{run_dir} is already finished ({decision['reason']} after generation "
                f"{records[-1]['generation']}; kept generation {decision['best']}): nothing to "
                "train"
            )
        elif records:
            self.say(f"resuming {run_dir} after generation {records[-1]['generation']}")

    def generation_ended(
        self, record: GenerationRecord, records: Sequence[GenerationRecord], decision: DecisionState
    ) -> None:
        stop = (
            f"; stop ({decision['reason']}), best generation {decision['best']}"
            if decision["stop"]
            else ""
        )
        spectrum = record.get("spectrum")
        shape = (
            f", 95 % of output energy in {spectrum['components95']} components (top 10 %: "
            f"{spectrum['top10']:.0%})"
            if spectrum is not None
            else ""
        )
        self.say(
            f"generation {record['generation']}: held-out {figure(record['heldout'])}, train vs "
            f"labels {figure(record['train'])}, ensemble {figure(record['ensemble'])}"
            f"{shape}, {record['seconds']:.1f} s{stop}"
        )
        if "forecast" in record:
            self.say(forecast_line(record["forecast"]))

    def baseline_ended(self, record: BaselineRecord, records: Sequence[GenerationRecord]) -> None:
        name = baseline_name(record)
        kept = record.get("best_epoch")
        at = f", kept after epoch {kept + 1}" if kept is not None else ""
        self.say(
            f"{name} baseline ({record['epochs_matched']} epochs on the labels{at}): held-out "
            f"{figure(record['heldout'])}, {record['seconds']:.1f} s"
        )


# The settings shown as hparams columns, one row per lineage.
_HPARAMS = ("seed", "targets", "temperature", "label_weight", "max_generations", "patience")


class TensorBoardRuns(Observer):
    """One lineage's TensorBoard runs under ``folder`` (see :mod:`filial.tb`).

    ``alone`` (default): the lineage is the whole run and also writes the ``arms/`` view;
    ``filial run`` passes False for each seed and writes that view across the seeds itself.
    """

    def __init__(self, folder: str | os.PathLike[str], *, alone: bool = True) -> None:
        self.log = TensorBoardLog(folder, alone=alone)
        self.settings: dict[str, Any] = {}
        self.run_dir: Path | None = None

    def attached(self, run_dir: Path, settings: dict[str, Any]) -> None:
        self.settings = {key: settings[key] for key in _HPARAMS}
        self.run_dir = run_dir

    def generation_ended(
        self, record: GenerationRecord, records: Sequence[GenerationRecord], decision: DecisionState
    ) -> None:
        self.log.generation(record, records[0], records=records)
        if "spectrum" in record and self.run_dir is not None:
            found = load_coefficients(self.run_dir / SPECTRAL_FOLDER, record["generation"])
            energies = None if found is None else (found**2).sum(axis=1)
            self.log.spectrum(record, energies)
        if decision["stop"]:
            self.log.session(self.settings, session_metrics(records))
            self.log.close()

    def baseline_ended(self, record: BaselineRecord, records: Sequence[GenerationRecord]) -> None:
        self.log.baseline(record, [r["generation"] for r in records], records=records)
        self.log.close()

    def close(self) -> None:
        self.log.close()


def session_metrics(records: Sequence[GenerationRecord]) -> dict[str, float]:
    """The hparams-table metrics of a lineage: generation 0 against the kept generation."""
    best = StopRule.best(records)
    if best is None:
        return {}
    kept, first = records[best], records[0]
    metrics: dict[str, float | None] = {
        "best_generation": float(best),
        "generations": float(len(records) - 1),
        "heldout_best": kept["heldout"],
        "heldout_generation_0": first["heldout"],
        "heldout_gain": kept["heldout"] - first["heldout"]
        if first["heldout"] is not None and kept["heldout"] is not None
        else None,
    }
    if kept.get("test") is not None and first.get("test") is not None:
        metrics["test_best"] = kept["test"]
        metrics["test_gain"] = kept["test"] - first["test"]  # type: ignore[operator]
    return {k: v for k, v in metrics.items() if v is not None}


def standard_observers(
    run: Any, progress: bool, tensorboard: bool | str | Path, extra: Sequence[Observer]
) -> list[Observer]:
    """A lineage's observers: TensorBoard runs (``run.tensorboard_path`` for True), the user's
    observers and progress lines; none but on rank 0 under a process group."""
    if not distributed.is_main():
        return []
    observers: list[Observer] = []
    if tensorboard:
        folder = run.tensorboard_path if tensorboard is True else Path(tensorboard)
        observers.append(TensorBoardRuns(folder))
    observers.extend(extra)
    if progress:
        observers.append(ConsoleProgress())
    return observers
