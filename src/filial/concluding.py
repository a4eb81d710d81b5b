"""What happens between two generations: the figures that need earlier generations, the
stop decision, the record committed to ``lineage.json``, the observers told, and (under a
process group) every rank told the decision.

A :class:`Concluder` is handed to each :class:`~filial.generation.Generation` as its last step
(``conclude(gen, write)``); the generation only measures and writes its own files.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from . import distributed
from ._io import atomic_write
from .evaluation import HeldoutHistory
from .generation import Generation, Measured
from .observers import Observer
from .records import DecisionState, GenerationRecord
from .rundir import LineageState, RunDirectory
from .stopping import Decision, StopRule
from .store import TargetStore
from .teacher import TeacherStores

log = logging.getLogger("filial")


@dataclass
class Concluder:
    """How a lineage concludes a generation (see the module docstring)."""

    state: LineageState
    run: RunDirectory
    rule: StopRule
    forecast_stop: bool  # spectrum_stop: stop once the spectral forecast's best is trained
    heldout: HeldoutHistory
    teachers: TeacherStores
    observers: Observer

    def conclude(self, gen: Generation, write: Callable[[], Measured] | None) -> GenerationRecord:
        """``gen.finish``'s last step: rank 0 scores and writes the generation (``write``),
        records it and decides; every rank learns the decision.

        Note: several processes. The other ranks wait in one broadcast for ``[ok, stop,
        finished generations]``; ``ok = 0`` when rank 0 failed, so that they raise instead of
        waiting for a decision that never comes. They then read rank 0's records.
        """
        state = self.state
        state.check_current(f"finishing generation {gen.index}")
        if gen.index != len(state.records) or state.done:
            raise RuntimeError(
                f"generation {gen.index} finished out of turn (the lineage has "
                f"{len(state.records)} finished generations)"
            )

        def record_here() -> GenerationRecord:
            assert write is not None  # rank 0 (or one process) holds the passes
            return self.record(gen, write())

        def told(record: GenerationRecord) -> tuple[int, int]:
            return int("stop" in record), len(state.records)

        outcome = distributed.on_rank_zero_telling(
            record_here, f"finishing generation {gen.index}", told, 2
        )
        record, (stop, finished) = outcome
        return record if record is not None else state.follow(gen.index, stop, finished)

    def record(self, gen: Generation, measured: Measured) -> GenerationRecord:
        """Add the figures that need earlier generations, decide, write ``lineage.json``, tell
        the observers. Memory follows the file: if the write fails, the generation can be
        finished again."""
        record, heldout = measured.record, measured.heldout
        records = self.state.records
        self.heldout.add(gen.index, heldout.outputs)
        labels_path = self.run.heldout_labels_path
        if not labels_path.is_file():
            labels = heldout.labels.numpy()
            atomic_write(labels_path, lambda handle: np.save(handle, labels, allow_pickle=False))
        if not record["diverged"]:
            members = [r["generation"] for r in records if not r.get("diverged")]
            record["ensemble"] = self.heldout.ensemble_metric(members, heldout)
            if gen.teacher is not None:
                record["agreement"] = self.heldout.agreement(gen.teacher, heldout)
            self.teachers.fresh = TargetStore(gen.directory)
        if self.state.resumed:
            warn_about_other_passes(records, record)
        decision = self._forecast_stop(self.rule.decide([*records, record]), [*records, record])
        if decision.stop:
            record["stop"] = {"reason": decision.reason, "best": decision.best, **decision.detail}  # type: ignore[typeddict-item]
        state: DecisionState = {
            "stop": decision.stop,
            "reason": decision.reason,
            "best": decision.best,
            "detail": decision.detail,
        }
        self.state.commit(record, state)
        self.observers.generation_ended(record, self.state.records, state)
        return record

    def _forecast_stop(self, decision: Decision, records: list[GenerationRecord]) -> Decision:
        """With ``spectrum_stop``: stop once the spectral forecast's best generation (c held
        fixed) is trained, unless the rule stopped already. The kept generation is still the
        held-out best."""
        if decision.stop or not self.forecast_stop:
            return decision
        predicted = records[0].get("forecast", {}).get("fixed", {}).get("best")
        generation = records[-1]["generation"]
        if predicted is None or generation < predicted:
            return decision
        return Decision(True, "forecast", decision.best, {"forecast_best": int(predicted)})


def warn_about_other_passes(records: list[GenerationRecord], newest: GenerationRecord) -> None:
    """After a resume the lineage cannot see the user's loop: say when a new generation trained
    a different number of passes over ``gen.loader`` than the earlier ones all did."""
    earlier = {r.get("passes") for r in records}
    if len(earlier) != 1 or None in earlier or newest.get("passes") in earlier:
        return
    (passes,) = earlier
    log.warning(
        "generation %d trained %s passes over gen.loader, generations %d-%d trained %s each: "
        "after a resume filial cannot see your loop, so check that it trains as before (the "
        "generations are compared as if it did)",
        newest["generation"],
        newest.get("passes"),
        records[0]["generation"],
        records[-1]["generation"],
        passes,
    )
