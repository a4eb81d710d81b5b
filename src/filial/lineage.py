"""The generation loop: :class:`Lineage` hands out generations, collects what each finished,
decides, and (under a process group) tells every rank.

Hook mode is ``for gen in lineage: ...train gen.model...; gen.finish(model)``; managed mode is
``lineage.run(fit)`` with a fit function such as :func:`filial.fit_epochs`. Both go through
:meth:`Lineage.__iter__`, so they share one engine.

The state of a run lives in ``RUN/lineage.json`` (settings, one record per finished generation,
the decision), rewritten atomically after every generation (:mod:`filial.rundir`). A generation
counts as finished only once its record is there, so after a crash the run resumes at the first
generation without one. The other rooms: :mod:`filial.settings` (which settings exist),
:mod:`filial.generation` (one generation), :mod:`filial.teacher` (where targets come from),
:mod:`filial.evaluation` (held-out scoring), :mod:`filial.observers` (what is printed or logged).
"""

from __future__ import annotations

import dataclasses
import functools
import json
import logging
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.utils.data import DataLoader, DistributedSampler

from . import distributed, spectral
from ._io import atomic_write
from .baselines import (
    DEFAULT_LABEL_SMOOTHING,
    FitFactory,
    baseline_specs,
    train_baseline,
)
from .checkpoint import load_model
from .data import check_loader
from .errors import InputError, Problems
from .evaluation import HeldoutHistory
from .generation import Generation, GenerationInputs, Measured
from .metrics import Metric, as_float_metric, default_metric, metric_name, sample_scores
from .models import ModelChecks
from .observers import ConsoleProgress, Observer, Observers, TensorBoardRuns
from .probe import Probe, check_augmentation, probe, replay_for, say_once, warn_changing_heldout
from .records import BaselineRecord, DecisionState, GenerationRecord
from .rundir import LineageState, RunDirectory
from .seeding import samplers_of, seed_generation
from .settings import DataFacts, Settings, saved_settings
from .space import check_store_fits
from .spectral import FeatureFn, SpectralOptions, SpectralView
from .stopping import Decision, StopRule
from .store import TargetStore, index_dtype
from .teacher import StoreSpec, TeacherStores

log = logging.getLogger("filial")


@dataclass
class Result:
    """What a lineage found: a record per finished generation, the best one, why it stopped."""

    records: list[GenerationRecord]
    best: int | None
    stop_reason: str | None
    run_dir: Path
    model_fn: Callable[[], nn.Module]

    def checkpoint(self, generation: int | None = None) -> Path:
        """Path of a generation's checkpoint (default: the best)."""
        generation = self.best if generation is None else generation
        for record in self.records:
            if record["generation"] == generation:
                return self.run_dir / record["checkpoint"]
        raise ValueError(f"no finished generation {generation} in {self.run_dir}")

    def best_model(self) -> nn.Module:
        """A fresh ``model_fn()`` module holding the best generation's weights (on the CPU)."""
        if self.best is None:
            raise ValueError("no generation finished without diverging, so there is no best model")
        record = next(r for r in self.records if r["generation"] == self.best)
        return load_generation(self.model_fn, self.run_dir, record)


def load_generation(
    model_fn: Callable[[], nn.Module], run_dir: Path, record: GenerationRecord
) -> nn.Module:
    """A fresh ``model_fn()`` module with a finished generation's checkpoint, checked against
    its recorded sha256. Building the module draws initial weights: the caller's RNG is kept."""
    return load_model(
        model_fn, RunDirectory(run_dir).recorded(record["checkpoint"]), record["checkpoint_sha256"]
    )


class Lineage:
    """Multi-generation self-distillation around the user's own training code.

    ``model_fn()`` builds a fresh model; it is called once per generation under a seed derived from
    ``(seed, generation)`` (torch's, Python's and numpy's global generators are seeded then, so
    identical settings give identical runs on the CPU). ``train_loader`` and ``heldout_loader``
    are the user's DataLoaders over map-style datasets of ``(input, label)`` samples; the held-out
    data decide when to stop and which generation to keep, so never pass the test set there.
    ``test_loader`` is evaluated and reported, never used for a decision.

    Example (hook mode)::

        lineage = filial.Lineage(make_model, train_loader, heldout_loader, run_dir="runs/a")
        for gen in lineage:
            model, opt = gen.model, torch.optim.SGD(gen.model.parameters(), lr=0.05)
            for epoch in range(30):
                for inputs, labels, targets in gen.loader:   # targets is None in generation 0
                    loss = gen.loss(model(inputs), labels, targets)
                    opt.zero_grad(); loss.backward(); opt.step()
            gen.finish(model)
        print(lineage.result.best)

    An existing run directory with the same settings is resumed after its last finished
    generation; different settings are refused. ``fresh=True`` deletes an existing run directory
    (only one that filial made) and starts over. ``progress`` prints one line per finished
    generation on stderr; warnings go through the ``logging`` logger ``"filial"``.
    ``tensorboard`` is the folder for TensorBoard runs (True: ``run_dir/tb``; False: none).

    Training data that augment at random (from torch's, Python's or numpy's global generators)
    are replayed for the students: each sample comes in ``views`` fixed augmented views, each with
    its own cached target, and every epoch draws one per sample (see :class:`filial.data.Replay`).

    ``spectrum_samples`` (default 0: off) turns on the spectral view (:mod:`filial.spectral`)
    on a fixed subset of that many training samples: every record gets a ``spectrum`` (which
    eigencomponents of generation 0's feature kernel the outputs hold), and generation 0's a
    ``forecast`` of the generations to come. ``spectrum_features(model, inputs)`` replaces the
    default features (the input of the model's last ``nn.Linear``). ``spectrum_stop=True`` lets
    the lineage stop once the forecast's best generation is trained (never by default).
    """

    def __init__(
        self,
        model_fn: Callable[[], nn.Module],
        train_loader: DataLoader,
        heldout_loader: DataLoader,
        *,
        run_dir: str | Path = "runs/x",
        targets: str = "ce",
        temperature: float = 1.0,
        label_weight: float = 0.0,
        max_generations: int = 8,
        patience: int = 2,
        min_gain: float = 0.0,
        views: int = 1,
        store_dtype: str = "float16",
        top_k: int | None = None,
        metric: Metric | None = None,
        test_loader: DataLoader | None = None,
        seed: int = 0,
        teacher_mode: str = "cached",
        fresh: bool = False,
        progress: bool = True,
        tensorboard: bool | str | Path = True,
        observers: Sequence[Observer] = (),
        spectrum_samples: int = 0,
        spectrum_stop: bool = False,
        spectrum_features: FeatureFn | None = None,
    ) -> None:
        # Long only for its arguments: each is checked elsewhere, and the rooms are built here.
        settings, train, heldout = _checked_arguments(
            model_fn,
            (train_loader, heldout_loader, test_loader),
            metric,
            {
                "targets": targets,
                "temperature": temperature,
                "label_weight": label_weight,
                "max_generations": max_generations,
                "patience": patience,
                "min_gain": min_gain,
                "views": views,
                "store_dtype": store_dtype,
                "top_k": top_k,
                "teacher_mode": teacher_mode,
                "spectrum_samples": spectrum_samples,
                "spectrum_stop": spectrum_stop,
                "seed": seed,
            },
        )
        loss = settings.loss()
        self._checks = ModelChecks(model_fn, train.inputs, train.labels, loss)
        _check_top_k(settings, self._checks.width)
        if not _online(settings):  # the next generation's store must fit (online: no store)
            check_store_fits(
                run_dir,
                len(train_loader.dataset),  # type: ignore[arg-type]
                settings.views,
                self._checks.width,
                settings.store_dtype,
                settings.top_k,
            )
        self.model_fn = model_fn
        self.run_dir = Path(run_dir)
        self._run = RunDirectory(self.run_dir)
        self.rule: StopRule = settings.rule()
        replay = replay_for(train, settings.views, settings.seed) if not _online(settings) else None
        facts = DataFacts.of(
            (train_loader, heldout_loader, test_loader), (train, heldout), replay, metric, model_fn
        )
        self.settings: dict[str, Any] = saved_settings(settings, facts)
        metric_fn = metric or default_metric(torch.as_tensor(train.labels))
        # Per-sample scores of a built-in metric: the report's bootstrap and cross-fitting.
        self._sample_scores = sample_scores(metric_fn) if metric is None else None
        spec = StoreSpec(settings.store_dtype, settings.views, settings.top_k, train.fingerprint)
        self._inputs = GenerationInputs(
            run=self._run,
            train_loader=train_loader,
            heldout_loader=heldout_loader,
            test_loader=test_loader,
            loss=loss,
            metric=as_float_metric(metric_fn, metric_name(metric)),
            seed=settings.seed,
            store=spec,
            write_targets=not _online(settings),  # online students never read a cache
            replay=replay,
            check_finished=self._checks.finished,
        )
        self._inputs = dataclasses.replace(
            self._inputs, spectral=self._spectral_view(settings, spectrum_features)
        )
        self._teachers = TeacherStores(
            self._run, model_fn, train_loader, replay, spec, settings.seed
        )
        self._heldout = HeldoutHistory(self._run.heldout, settings.targets, self._inputs.metric)
        self._observers = Observers(self._observers_for(progress, tensorboard, observers))
        self._observers.attached(self.run_dir, self.settings)
        self._state = LineageState(self._run, self.settings)
        if distributed.is_distributed():
            self._check_ranks(train_loader)
        self._state.open(fresh)
        if self._state.resumed:
            self._observers.resumed(self._run.root, self._state.records, self._state.decision)

    def _spectral_view(
        self, settings: Settings, feature_fn: FeatureFn | None
    ) -> SpectralView | None:
        """The spectral view when ``spectrum_samples`` asks for one (see :mod:`filial.spectral`)."""
        if not settings.spectrum_samples:
            return None
        inputs = self._inputs
        return SpectralView(
            self._run.root / spectral.FOLDER,
            SpectralOptions(settings.spectrum_samples, settings.spectrum_stop, feature_fn),
            len(inputs.train_loader.dataset),  # type: ignore[arg-type]
            settings.views if inputs.replay is not None else 1,
            settings.seed,
            (inputs.train_loader, inputs.heldout_loader),
            inputs.metric,
            settings.max_generations,
        )

    def _observers_for(
        self, progress: bool, tensorboard: bool | str | Path, extra: Sequence[Observer]
    ) -> list[Observer]:
        """TensorBoard runs, the user's observers and progress lines, on rank 0 only under a
        process group."""
        if not distributed.is_main():
            return []
        observers: list[Observer] = []
        if tensorboard:
            folder = self._run.tensorboard_path if tensorboard is True else Path(tensorboard)
            observers.append(TensorBoardRuns(folder))
        observers.extend(extra)
        if progress:
            observers.append(ConsoleProgress())
        return observers

    # -- the run directory -------------------------------------------------------------------

    @property
    def state_path(self) -> Path:
        return self._run.state_path

    def close(self) -> None:
        """Release the run directory's lock and close the TensorBoard files. The lock is also
        released when this object is garbage collected or its process ends; a new Lineage over
        the same run directory resumes the run."""
        self._state.close()
        self._observers.close()

    def _check_ranks(self, train_loader: DataLoader) -> None:
        """Under a process group: every rank must build the same lineage over the same data,
        and the training loader should give each rank its own shard."""
        differing = distributed.ranks_differing(json.dumps(self.settings, sort_keys=True))
        if differing:
            raise InputError(
                f"rank(s) {differing} built the Lineage with other settings or data than rank 0 "
                "(compared: the settings saved in lineage.json, which include fingerprints of "
                "the training and held-out data). Every rank must pass the same arguments and "
                "the same datasets; shard the training set with a DistributedSampler instead of "
                "giving each rank a dataset of its own."
            )
        samplers = samplers_of(train_loader)
        if distributed.is_main() and not any(isinstance(s, DistributedSampler) for s in samplers):
            # A warning, not a refusal: a batch sampler of the user's own may shard as well.
            log.warning(
                "%d processes run this lineage, but the training loader has no "
                "DistributedSampler: unless its sampler shards the data itself, every rank "
                "trains on the whole training set in every epoch. Pass DataLoader(dataset, "
                "sampler=torch.utils.data.DistributedSampler(dataset), ...) to give each rank "
                "its shard.",
                distributed.world_size(),
            )

    # -- the loop ----------------------------------------------------------------------------

    @property
    def done(self) -> bool:
        """True once the stop rule has stopped the lineage."""
        return self._state.done

    def __iter__(self) -> Iterator[Generation]:
        while not self.done:
            gen = self._begin(len(self._state.records))
            yield gen
            if not gen.finished:
                raise RuntimeError(
                    f"generation {gen.index} was not finished: call gen.finish(model) after "
                    "training each generation, before the loop moves on"
                )

    def run(self, fit: Callable[[Generation], nn.Module | None]) -> Result:
        """Managed mode: ``fit(gen)`` trains ``gen.model`` (and may return the trained module)."""
        if not callable(fit):
            raise TypeError(
                f"run() needs a fit function such as filial.fit_epochs(...), got {fit!r}"
            )
        for gen in self:
            model = fit(gen)
            gen.finish(model if model is not None else gen.model)
        return self.result

    @property
    def result(self) -> Result:
        """The records so far, the best generation and (once stopped) the stop reason."""
        decision: Any = self._state.decision or {}
        records = self._state.records
        return Result(
            records=list(records),
            best=StopRule.best(records),
            stop_reason=decision.get("reason") if decision.get("stop") else None,
            run_dir=self.run_dir,
            model_fn=self.model_fn,
        )

    def baselines(
        self,
        names: str | Sequence[str],
        make_fit: FitFactory,
        *,
        every: int = 1,
        label_smoothing: float = DEFAULT_LABEL_SMOOTHING,
    ) -> dict[str, BaselineRecord]:
        """Train the baselines ``names`` of a finished lineage; their records by name.

        Each is one model trained on the labels for as many epochs as the whole lineage used,
        from generation 0's seed (so the comparison is paired): ``"matched"`` (its last
        epoch), ``"early-stopping"`` (held-out after every ``every``-th epoch and after the
        last, the best epoch kept, ties to the earlier) and ``"label-smoothing"`` (the same,
        trained with ``cross_entropy(label_smoothing=label_smoothing)``, ``targets='ce'``
        only); ``"none"`` asks for none. ``make_fit(epochs)`` returns the fit function, e.g.
        ``lambda n: filial.fit_epochs(n, optimizer)``; the early-stopped baselines need a
        :func:`filial.fit_epochs` there. Records go to ``RUN/baseline/NAME/baseline.json``; a
        finished baseline with the same settings is reused, one whose settings changed is
        trained again (alone). Every setting is checked before anything trains.

        Example::

            lineage.run(filial.fit_epochs(30, optimizer))
            found = lineage.baselines(
                ["early-stopping", "label-smoothing", "matched"],
                lambda n: filial.fit_epochs(n, optimizer),
            )
            found["early-stopping"]["heldout"], found["early-stopping"]["best_epoch"]
        """
        specs = baseline_specs(
            names, every=every, label_smoothing=label_smoothing, targets=self.settings["targets"]
        )
        if not self.done:
            raise RuntimeError("baselines need a finished lineage; run it first")
        if not callable(make_fit):
            raise TypeError(
                "make_fit should be a function of the epoch count returning a fit function, "
                f"e.g. lambda n: filial.fit_epochs(n, optimizer), but got {make_fit!r}"
            )
        found: dict[str, BaselineRecord] = {}
        for spec in specs:
            self._state.check_current(f"training the {spec.name} baseline")
            found[spec.name] = train_baseline(
                spec,
                self._inputs,
                self.model_fn,
                self._state.records,
                make_fit,
                self._observers,
                self._sample_scores,
            )
        return found

    def baseline(
        self,
        name: str,
        make_fit: FitFactory,
        *,
        every: int = 1,
        label_smoothing: float = DEFAULT_LABEL_SMOOTHING,
    ) -> BaselineRecord:
        """One baseline of :meth:`baselines` (``"early-stopping"``, ``"label-smoothing"`` or
        ``"matched"``); its record."""
        if not isinstance(name, str) or name == "none":
            raise ValueError(
                f"baseline() trains one baseline: 'early-stopping', 'label-smoothing' or "
                f"'matched', but got {name!r}"
            )
        found = self.baselines([name], make_fit, every=every, label_smoothing=label_smoothing)
        return found[name]

    def matched_baseline(self, make_fit: FitFactory) -> BaselineRecord:
        """Train one model on the labels for as many epochs as the whole lineage used, judged
        at its last epoch: ``baseline("matched", make_fit)`` (see :meth:`baselines`).

        Generation 0 is the baseline "without generations"; this one tells the gain of
        generations apart from the gain of more training.
        """
        return self.baseline("matched", make_fit)

    def _begin(self, index: int) -> Generation:
        """Hand out generation ``index``: its teacher's targets (or the teacher itself, online),
        every random stream seeded, a fresh checked model."""
        self._state.check_current(f"handing out generation {index}")
        records = self._state.records
        previous = records[-1] if records else None
        online = store = None
        if previous is not None and self.settings["teacher_mode"] == "online":
            online = load_generation(self.model_fn, self.run_dir, previous)
        elif previous is not None:
            store = self._teachers.open(previous)
        seed_generation(self.settings["seed"], index, self._inputs.train_loader)
        model = self._checks.new_model(index)
        teacher = previous["generation"] if previous is not None else None
        self._observers.generation_started(index, teacher)
        return Generation(
            index,
            model,
            self._inputs,
            self._conclude,
            teacher=teacher,
            store=store,
            online_teacher=online,
            observer=self._observers,
        )

    def _conclude(self, gen: Generation, write: Callable[[], Measured] | None) -> GenerationRecord:
        """``gen.finish``'s last step: rank 0 scores and writes the generation (``write``),
        records it and decides; every rank learns the decision.

        Note: several processes. The other ranks wait in one broadcast for ``[ok, stop,
        finished generations]``; ``ok = 0`` when rank 0 failed, so that they raise instead of
        waiting for a decision that never comes. They then read rank 0's records.
        """
        state = self._state
        state.check_current(f"finishing generation {gen.index}")
        if gen.index != len(state.records) or self.done:
            raise RuntimeError(
                f"generation {gen.index} finished out of turn (the lineage has "
                f"{len(state.records)} finished generations)"
            )

        def record_here() -> GenerationRecord:
            assert write is not None  # rank 0 (or one process) holds the passes
            return self._record(gen, write())

        def told(record: GenerationRecord) -> tuple[int, int]:
            return int("stop" in record), len(state.records)

        outcome = distributed.on_rank_zero_telling(
            record_here, f"finishing generation {gen.index}", told, 2
        )
        record, (stop, finished) = outcome
        return record if record is not None else state.follow(gen.index, stop, finished)

    def _record(self, gen: Generation, measured: Measured) -> GenerationRecord:
        """Add the figures that need earlier generations, decide, write ``lineage.json``, tell
        the observers. Memory follows the file: if the write fails, the generation can be
        finished again."""
        record, heldout = measured.record, measured.heldout
        records = self._state.records
        self._heldout.add(gen.index, heldout.outputs)
        labels_path = self._run.heldout_labels_path
        if not labels_path.is_file():
            labels = heldout.labels.numpy()
            atomic_write(labels_path, lambda handle: np.save(handle, labels, allow_pickle=False))
        if not record["diverged"]:
            members = [r["generation"] for r in records if not r.get("diverged")]
            record["ensemble"] = self._heldout.ensemble_metric(members, heldout)
            if gen.teacher is not None:
                record["agreement"] = self._heldout.agreement(gen.teacher, heldout)
            self._teachers.fresh = TargetStore(gen.directory)
        if self._state.resumed:
            _warn_about_other_passes(records, record)
        decision = self._forecast_stop(self.rule.decide([*records, record]), [*records, record])
        if decision.stop:
            record["stop"] = {"reason": decision.reason, "best": decision.best, **decision.detail}  # type: ignore[typeddict-item]
        state: DecisionState = {
            "stop": decision.stop,
            "reason": decision.reason,
            "best": decision.best,
            "detail": decision.detail,
        }
        self._state.commit(record, state)
        self._observers.generation_ended(record, self._state.records, state)
        return record


    def _forecast_stop(self, decision: Decision, records: list[GenerationRecord]) -> Decision:
        """With ``spectrum_stop``: stop once the spectral forecast's best generation (c held
        fixed) is trained, unless the rule stopped already. The kept generation is still the
        held-out best."""
        if decision.stop or not self.settings.get("spectrum_stop"):
            return decision
        predicted = records[0].get("forecast", {}).get("fixed", {}).get("best")
        generation = records[-1]["generation"]
        if predicted is None or generation < predicted:
            return decision
        return Decision(True, "forecast", decision.best, {"forecast_best": int(predicted)})


def _warn_about_other_passes(records: list[GenerationRecord], newest: GenerationRecord) -> None:
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


def _check_callables(problems: Problems, model_fn: Any, metric: Any) -> None:
    if isinstance(model_fn, nn.Module):
        problems.add(
            TypeError(
                f"model_fn must be a function that builds a new model each time it is called "
                f"(filial calls it once per generation), but got a {type(model_fn).__name__} "
                "module: pass make_model, not make_model()"
            )
        )
    elif not callable(model_fn):
        problems.add(TypeError(f"model_fn must be callable, but got {model_fn!r}"))
    if metric is not None and not callable(metric):
        problems.add(TypeError(f"metric must be callable or None, but got {metric!r}"))


def _check_loaders(problems: Problems, loaders: tuple[Any, Any, Any]) -> None:
    train_loader, heldout_loader, _ = loaders
    roles = ("train_loader", "heldout_loader", "test_loader")
    for role, loader in zip(roles, loaders, strict=True):
        if loader is not None or role != "test_loader":
            problems.attempt(functools.partial(check_loader, loader, role))
    if heldout_loader is train_loader or (
        isinstance(heldout_loader, DataLoader)
        and isinstance(train_loader, DataLoader)
        and heldout_loader.dataset is train_loader.dataset
    ):
        problems.add(
            ValueError(
                "heldout_loader is the training loader (or reads the same dataset object); "
                "held-out evidence must come from samples the students do not train on. "
                "Split off a held-out set, e.g. with torch.utils.data.random_split."
            )
        )


def _online(settings: Settings) -> bool:
    return settings.teacher_mode == "online"


def _checked_arguments(
    model_fn: Any, loaders: tuple[Any, Any, Any], metric: Any, given: dict[str, Any]
) -> tuple[Settings, Probe, Probe]:
    """Check every argument, then the data's first samples; raise all problems together."""
    train_loader, heldout_loader, _ = loaders
    problems = Problems()
    _check_callables(problems, model_fn, metric)
    _check_loaders(problems, loaders)
    settings = Settings.parse(problems, **given)
    train = heldout = None
    if not len(problems):
        train = problems.attempt(lambda: probe(train_loader))
        heldout = problems.attempt(lambda: probe(heldout_loader))
    if train is not None and settings is not None and not _online(settings):
        problems.attempt(lambda: check_augmentation(train, settings.views))
    if heldout is not None:
        warn_changing_heldout(heldout)
    labels = getattr(train, "labels", None)
    if isinstance(labels, torch.Tensor) and given["targets"] == "ce" and labels.is_floating_point():
        problems.add(
            ValueError(
                f"targets='ce' needs integer class labels, but the training labels are "
                f"{labels.dtype}. Use targets='l2' for regression."
            )
        )
    problems.raise_if_any()
    assert settings is not None and train is not None and heldout is not None  # checked above
    return settings, train, heldout


def _check_top_k(settings: Settings, width: int) -> None:
    """``top_k`` must fit the model's outputs; say when it saves nothing."""
    top_k = settings.top_k
    if top_k is None:
        return
    if top_k > width:
        raise InputError(
            f"top_k={top_k} is more than the model's {width} outputs; use at most top_k={width}"
        )
    value = np.dtype(settings.store_dtype).itemsize
    compact = top_k * (value + np.dtype(index_dtype(width)).itemsize)
    if compact >= width * value:
        say_once(
            f"top_k{top_k}:{width}:{settings.store_dtype}",
            f"top_k={top_k} stores {compact} bytes per sample and view (values and class "
            f"indices), no fewer than the {width * value} of the full store of {width} outputs; "
            "top_k=None keeps every output for less",
        )
