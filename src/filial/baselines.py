"""Models trained on the labels alone, to tell the gain of generations from other gains.

Generation 0 is the model "without generations". The question users bring is whether
generations beat what they would have done anyway with the same compute, so every baseline here
trains one model on the labels for as many epochs as the whole lineage used
(:func:`matched_epochs`), starting from generation 0's seed (the comparison is paired):

``matched``
    the model at its last epoch: tells the gain of generations apart from the gain of more
    training (on noisy labels more epochs usually overfit).
``early-stopping``
    the held-out metric after every ``every``-th epoch (and after the last), the best epoch's
    weights kept, ties to the earlier epoch: chosen on the same held-out set the lineage uses,
    so both are selected the same way. Its training is the matched baseline's (the evaluations
    run in eval mode and leave every random stream alone), so its last evaluated epoch is the
    matched baseline.
``label-smoothing``
    the same early stopping, trained with PyTorch's ``cross_entropy(label_smoothing=eps)``
    (``targets='ce'`` only: the smoothed one-hot target of Szegedy et al., CVPR 2016).

Each is a run of its own in ``RUN/baseline/NAME/``: ``baseline.json`` (its record, written last,
atomically), ``gen0/`` (checkpoint and held-out outputs) and, for the early-stopped ones with a
built-in metric, ``heldout_epochs.npy`` (the per-sample held-out scores of every evaluated
epoch, ``(evaluated epochs, held-out samples)`` float32, for the report's cross-fitted estimate;
4 bytes per sample and evaluated epoch). A crash before the record reruns the baseline from its
seed; a finished one is reused while its settings (name, epoch count, ``every``,
``label_smoothing``) match, and one whose settings changed is trained again alone. Runs made
before named baselines kept the matched baseline in ``RUN/baseline/baseline.json`` and
``RUN/baseline/gen0/``: it is still read and reused.
"""

from __future__ import annotations

import dataclasses
import json
import math
import shutil
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch import nn

from . import distributed
from ._io import atomic_write, atomic_write_json
from .checkpoint import unwrap
from .errors import InputError, Problems
from .evaluation import Predictions, evaluate
from .fit import EpochFit
from .generation import Generation, GenerationInputs, Measured
from .losses import StudentLoss
from .observers import Observer
from .records import BaselineRecord, GenerationRecord, is_number
from .rundir import BASELINE_EPOCHS_FILE, RunDirectory, generation_name
from .seeding import Stream, seed_generation, stream_seed
from .stopping import as_count

FitFactory = Callable[[int], Callable[[Generation], nn.Module | None]]
# Per-sample held-out scores whose mean is the metric (filial.metrics.sample_scores).
SampleScores = Callable[[torch.Tensor, torch.Tensor], torch.Tensor]

# The baselines, in the order they are trained and reported.
BASELINES = ("early-stopping", "label-smoothing", "matched")
EARLY_STOPPED = ("early-stopping", "label-smoothing")
# Szegedy et al. (CVPR 2016, section 7) smoothed ImageNet's labels with epsilon = 0.1.
DEFAULT_LABEL_SMOOTHING = 0.1


def baseline_names(value: Any, key: str = "baselines") -> list[str]:
    """The baselines ``value`` asks for, in the order of :data:`BASELINES`.

    ``"none"`` (or an empty list) asks for none, a name for that one, a list for those.

    >>> baseline_names("none"), baseline_names("matched")
    ([], ['matched'])
    >>> baseline_names(["matched", "early-stopping"])
    ['early-stopping', 'matched']
    """
    names = [value] if isinstance(value, str) else value
    should = (
        f"{key} should be one of 'none', "
        + ", ".join(repr(n) for n in BASELINES)
        + ", or a list of the last three"
    )
    if not isinstance(names, (list, tuple)) or not all(isinstance(n, str) for n in names):
        raise ValueError(f"{should}, but got {value!r} ({type(value).__name__})")
    if list(names) == ["none"]:
        return []
    unknown = [n for n in names if n not in BASELINES]
    if unknown:
        raise ValueError(f"{should}, but got {unknown[0]!r} ({type(unknown[0]).__name__})")
    if len(set(names)) != len(names):
        raise ValueError(f"{key} names a baseline twice: {list(names)!r}")
    return [n for n in BASELINES if n in names]


@dataclass(frozen=True)
class BaselineSpec:
    """One baseline and its own settings (see the module docstring)."""

    name: str
    every: int = 1  # early-stopped: held-out after every k-th epoch (and after the last)
    label_smoothing: float = DEFAULT_LABEL_SMOOTHING  # label-smoothing only

    @property
    def early_stopped(self) -> bool:
        return self.name in EARLY_STOPPED

    def settings(self, epochs: int) -> dict[str, Any]:
        """What a finished baseline's record must hold to be reused."""
        wanted: dict[str, Any] = {"name": self.name, "epochs_matched": epochs}
        if self.early_stopped:
            wanted["every"] = self.every
        if self.name == "label-smoothing":
            wanted["label_smoothing"] = self.label_smoothing
        return wanted


def baseline_specs(
    names: Any,
    *,
    every: Any = 1,
    label_smoothing: Any = DEFAULT_LABEL_SMOOTHING,
    targets: str = "ce",
) -> list[BaselineSpec]:
    """Check the baselines asked for and their settings together; one spec per baseline."""
    problems = Problems()
    chosen = problems.attempt(lambda: baseline_names(names)) or []
    checked_every = problems.attempt(lambda: as_count(every, "every", minimum=1))
    smoothing = label_smoothing
    if (
        not isinstance(smoothing, (int, float))
        or isinstance(smoothing, bool)
        or not 0.0 <= smoothing < 1.0
    ):
        problems.add(
            ValueError(f"label_smoothing should be a number in [0, 1), but got {label_smoothing!r}")
        )
    elif "label-smoothing" in chosen and smoothing == 0:
        problems.add(
            ValueError(
                "label_smoothing=0 trains the early-stopping baseline again; give the "
                "label-smoothing baseline a value in (0, 1), e.g. 0.1"
            )
        )
    if "label-smoothing" in chosen and targets != "ce":
        problems.add(
            ValueError(
                "the label-smoothing baseline smooths the targets of cross-entropy, but this "
                f"lineage has targets={targets!r}. With squared error to one-hot labels, "
                "smoothing is an affine change of the targets that a last linear layer with a "
                "bias absorbs (it rescales the outputs and changes no class), so it is no "
                "regulariser there: use the early-stopping baseline"
            )
        )
    problems.raise_if_any()
    assert checked_every is not None
    return [BaselineSpec(n, checked_every, float(smoothing)) for n in chosen]


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


class BestEpoch:
    """Held-out after every ``every``-th epoch and after the last; the best epoch's weights
    kept (ties to the earlier epoch). Called on every rank by :class:`~filial.fit.EpochFit`.

    Note: several processes. Every rank scores its shard of the held-out set
    (:func:`~filial.evaluation.evaluate`, after :func:`~filial.distributed.align_replicas` so
    that every shard is scored by rank 0's weights and buffers); rank 0 judges the epoch and
    tells the others whether it is the best so far, and each rank keeps its own copy of those
    weights (the same on every rank). The evaluation runs in eval mode inside a fork of the
    random generators, so training goes on exactly as without it.
    """

    def __init__(
        self, inputs: GenerationInputs, epochs: int, every: int, scores: SampleScores | None
    ) -> None:
        self.inputs = inputs
        self.epochs = epochs
        self.every = every
        self.scores = scores
        self.best_epoch: int | None = None
        self.best_value = -math.inf
        self.best_state: dict[str, torch.Tensor] | None = None
        self.evaluated: list[int] = []
        self.rows: list[np.ndarray] = []  # rank 0: per-sample scores of each evaluated epoch

    def due(self, epoch: int) -> bool:
        return (epoch + 1) % self.every == 0 or epoch + 1 == self.epochs

    def __call__(self, gen: Generation, model: nn.Module, epoch: int) -> Mapping[str, float]:
        if not self.due(epoch):
            return {}
        module = unwrap(model)
        distributed.align_replicas(module)
        seed = stream_seed(self.inputs.seed, Stream.PASSES, 0)
        heldout = evaluate(module, self.inputs.heldout_loader, seed)

        def judge() -> tuple[float | None, bool]:
            assert heldout is not None  # rank 0 (or one process) holds the whole set
            return self._judge(heldout)

        def tell(judged: tuple[float | None, bool]) -> list[int]:
            return [int(judged[1])]

        outcome = distributed.on_rank_zero_telling(
            judge, f"scoring epoch {epoch} of a baseline", tell, 1
        )
        judged, (better,) = outcome
        self.evaluated.append(epoch)
        if better:
            self.best_epoch = epoch
            self.best_state = {
                key: value.detach().to("cpu", copy=True)
                for key, value in module.state_dict().items()
            }
        value = judged[0] if judged is not None else None
        return {"heldout": value} if value is not None else {}

    def _judge(self, heldout: Predictions) -> tuple[float | None, bool]:
        outputs, labels = heldout.outputs, heldout.labels
        finite = bool(torch.isfinite(outputs).all())
        if self.scores is not None:
            row = self.scores(outputs, labels).numpy() if finite else np.full(len(labels), np.nan)
            self.rows.append(row.astype(np.float32))
        if not finite:
            return None, False  # a diverged epoch is never kept
        value = self.inputs.metric(outputs, labels)
        better = value > self.best_value  # strictly: ties go to the earlier epoch
        if better:
            self.best_value = value
        return value, better

    def restore(self, model: nn.Module) -> None:
        """Load the best epoch's weights into ``model`` (the last ones stay if no epoch had
        finite outputs: finish then records the baseline as diverged)."""
        if self.best_state is not None:
            unwrap(model).load_state_dict(self.best_state)

    def write_scores(self, path: Any) -> bool:
        """Write the per-sample scores of the evaluated epochs (rank 0); False without any."""
        if self.scores is None or not self.rows:
            return False
        stacked = np.stack(self.rows)
        atomic_write(path, lambda handle: np.save(handle, stacked, allow_pickle=False))
        return True


def _epoch_fit(fit: Any, keeper: BestEpoch, name: str) -> EpochFit:
    if not isinstance(fit, EpochFit):
        raise InputError(
            f"the {name} baseline scores the held-out set after every k-th epoch, so "
            "make_fit(epochs) must return filial.fit_epochs(epochs, ...), but it returned "
            f"{fit!r}"
        )
    return fit.with_epoch_end(keeper, title=f"baseline {name}")


def _stored(run: RunDirectory, spec: BaselineSpec, epochs: int) -> tuple[int, Any]:
    """(where, record) of a finished baseline with these settings: 1 its own folder, 2 the
    matched baseline of the earlier layout, 0 none."""
    wanted = spec.settings(epochs)
    stored = _readable(run.baseline_record(spec.name))
    if stored is not None and all(stored.get(k) == v for k, v in wanted.items()):
        return 1, stored
    legacy = _readable(run.baseline_state_path) if spec.name == "matched" else None
    if legacy is not None and legacy.get("epochs_matched") == epochs:
        return 2, legacy
    return 0, None


def _readable(path: Any) -> dict[str, Any] | None:
    """A record file's JSON object, or None when it is absent or cannot be one of filial's
    (a damaged record is a baseline that did not finish: it is trained again)."""
    try:
        stored = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return stored if isinstance(stored, dict) else None


def _drop_legacy_matched(run: RunDirectory) -> None:
    """The matched baseline of the earlier layout, once a new one replaces it (record first:
    a record never names files that are gone)."""
    run.baseline_state_path.unlink(missing_ok=True)
    shutil.rmtree(run.baseline_path / generation_name(0), ignore_errors=True)


def train_baseline(
    spec: BaselineSpec,
    inputs: GenerationInputs,
    model_fn: Callable[[], nn.Module],
    records: Sequence[GenerationRecord],
    make_fit: FitFactory,
    observer: Observer,
    scores: SampleScores | None = None,
) -> BaselineRecord:
    """Train, score and record one baseline of a finished lineage (see the module docstring);
    a finished one with the same settings is returned as it is.

    ``scores`` (per-sample scores of the lineage's metric, when it is a built-in one) makes an
    early-stopped baseline keep each evaluated epoch's per-sample held-out scores.
    """
    epochs = matched_epochs(records)
    reused = _reused(spec, inputs.run, epochs)
    if reused is not None:
        return reused
    keeper = BestEpoch(inputs, epochs, spec.every, scores) if spec.early_stopped else None
    loss = inputs.loss
    if spec.name == "label-smoothing":
        loss = StudentLoss("ce", label_smoothing=spec.label_smoothing)
    seed_generation(inputs.seed, 0, inputs.train_loader)
    baseline_inputs = dataclasses.replace(
        inputs,
        run=inputs.run.baseline(spec.name),
        write_targets=False,
        loss=loss,
        spectral=None,
    )
    conclude = _concluder(spec, inputs.run, epochs, keeper)
    gen = Generation(0, model_fn(), baseline_inputs, conclude)
    fit = make_fit(epochs)
    if keeper is not None:
        fit = _epoch_fit(fit, keeper, spec.name)
    elif isinstance(fit, EpochFit):
        fit = fit.with_epoch_end(None, title=f"baseline {spec.name}")
    fitted = fit(gen)
    model = fitted if fitted is not None else gen.model
    if keeper is not None:
        keeper.restore(model)
    record: Any = gen.finish(model)
    observer.baseline_ended(record, records)
    return record


def _reused(spec: BaselineSpec, lineage_run: RunDirectory, epochs: int) -> BaselineRecord | None:
    """A finished baseline of these settings, read on every rank (rank 0 looks, and drops a
    record of other settings before its files are replaced); None when it must train."""
    record_path = lineage_run.baseline_record(spec.name)

    def look() -> tuple[int, Any]:
        where, stored = _stored(lineage_run, spec, epochs)
        if where == 0:  # a record of other settings goes before the files are replaced
            record_path.unlink(missing_ok=True)
        return where, stored

    def tell(found: tuple[int, Any]) -> list[int]:
        return [found[0]]

    outcome = distributed.on_rank_zero_telling(
        look, f"looking for the {spec.name} baseline", tell, 1
    )
    found, (where,) = outcome
    if not where:
        return None
    if found is not None:
        return found[1]
    path = record_path if where == 1 else lineage_run.baseline_state_path
    return json.loads(path.read_text(encoding="utf-8"))


def _concluder(
    spec: BaselineSpec, lineage_run: RunDirectory, epochs: int, keeper: BestEpoch | None
) -> Callable[[Generation, Callable[[], Measured] | None], GenerationRecord]:
    """What finishing the baseline's generation does: rank 0 writes its files and record
    (the record last), the other ranks read the record."""
    record_path = lineage_run.baseline_record(spec.name)

    def save(write: Callable[[], Measured] | None) -> BaselineRecord:
        assert write is not None  # rank 0 (or one process) writes
        record: Any = write().record
        record.update(
            kind=f"{spec.name}-baseline",
            checkpoint=lineage_run.baseline_entry(spec.name, record["checkpoint"]),
            **spec.settings(epochs),
        )
        if keeper is not None:
            written = keeper.write_scores(lineage_run.baseline_epochs(spec.name))
            record.update(
                best_epoch=keeper.best_epoch,
                evaluated=list(keeper.evaluated),
                heldout_epochs=lineage_run.baseline_entry(spec.name, BASELINE_EPOCHS_FILE)
                if written
                else None,
            )
        atomic_write_json(record_path, record)
        if spec.name == "matched":
            _drop_legacy_matched(lineage_run)
        return record

    def conclude(gen: Generation, write: Callable[[], Measured] | None) -> GenerationRecord:
        saved = distributed.on_rank_zero(
            lambda: save(write), f"writing the {spec.name} baseline"
        )
        if saved is None:  # a rank other than 0: rank 0 has written the baseline's record
            saved = json.loads(record_path.read_text(encoding="utf-8"))
        return saved

    return conclude


def train_matched_baseline(
    inputs: GenerationInputs,
    model_fn: Callable[[], nn.Module],
    records: Sequence[GenerationRecord],
    make_fit: FitFactory,
    observer: Observer,
) -> BaselineRecord:
    """The matched baseline (see :func:`train_baseline`)."""
    return train_baseline(BaselineSpec("matched"), inputs, model_fn, records, make_fit, observer)


def kept_epoch_value(record: Mapping[str, Any]) -> float | None:
    """An early-stopped baseline's held-out figure at its kept epoch, as its curve logged it."""
    for entry in record.get("epochs") or []:
        if entry.get("epoch") == record.get("best_epoch") and is_number(entry.get("heldout")):
            return float(entry["heldout"])
    return None
