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
import logging
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import torch
from torch import nn
from torch.utils.data import DataLoader

from . import distributed, spectral
from .arguments import (
    check_ranks,
    check_stores_fit,
    check_top_k,
    checked_arguments,
    checked_pool,
    online,
    pool_for,
)
from .baselines import (
    DEFAULT_LABEL_SMOOTHING,
    FitFactory,
    baseline_specs,
    train_baseline,
)
from .checkpoint import load_model
from .concluding import Concluder
from .evaluation import HeldoutHistory
from .generation import Generation, GenerationInputs
from .metrics import Metric, as_float_metric, default_metric, metric_name, sample_scores
from .models import ModelChecks
from .observers import Observer, Observers, standard_observers
from .pool import (
    Admission,
    open_teacher,
)
from .probe import replay_for
from .records import BaselineRecord, GenerationRecord
from .rundir import LineageState, RunDirectory
from .seeding import seed_generation
from .settings import DataFacts, Settings, saved_settings
from .spectral import FeatureFn, SpectralOptions, SpectralView
from .stopping import StopRule
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

    ``unlabeled_loader`` (a DataLoader over a map-style dataset of inputs, or of ``(input,
    anything)`` pairs) is a pool for self-training: generation 0 learns from the labels alone;
    every finished generation labels the pool, ``admission`` (a :class:`filial.Admission`:
    which samples, stay or relabel, soft or hard pseudo-labels, their loss weight, an audit)
    picks those the next student learns from, and ``gen.loader`` then yields mixed batches in
    which pool rows carry the label ``-1`` (:data:`filial.pool.NO_LABEL`; a training label of
    -1 is refused) and ``gen.loss`` handles both kinds of row. An epoch covers each labelled
    and each admitted pool sample once. See :mod:`filial.pool`.

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
        unlabeled_loader: DataLoader | None = None,
        admission: Admission | None = None,
        spectrum_samples: int = 0,
        spectrum_stop: bool = False,
        spectrum_features: FeatureFn | None = None,
    ) -> None:
        # Long only for its arguments: each is checked elsewhere, and the rooms are built here.
        settings, train, heldout = checked_arguments(
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
        pool_settings = checked_pool(
            admission, unlabeled_loader, train_loader, targets, teacher_mode, train.labels
        )
        loss = settings.loss()
        self._checks = ModelChecks(model_fn, train.inputs, train.labels, loss)
        check_top_k(settings, self._checks.width)
        check_stores_fit(run_dir, settings, train_loader, self._checks.width)
        self.model_fn = model_fn
        self.run_dir = Path(run_dir)
        self._run = RunDirectory(self.run_dir)
        rule = settings.rule()
        replay = replay_for(train, settings.views, settings.seed) if not online(settings) else None
        facts = DataFacts.of(
            (train_loader, heldout_loader, test_loader), (train, heldout), replay, metric, model_fn
        )
        self.settings: dict[str, Any] = saved_settings(settings, facts)
        # The unlabelled pool (filial.pool): its settings and fingerprint; None without one.
        self._pool = pool_for(
            unlabeled_loader, pool_settings, replay, settings, run_dir, self._checks.width
        )
        self.settings["pool"] = None if self._pool is None else self._pool.saved()
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
            write_targets=not online(settings),  # online students never read a cache
            replay=replay,
            check_finished=self._checks.finished,
            pool=self._pool,
        )
        self._inputs = dataclasses.replace(
            self._inputs, spectral=spectral_view(self._inputs, settings, spectrum_features)
        )
        self._teachers = TeacherStores(
            self._run, model_fn, train_loader, replay, spec, settings.seed
        )
        self._heldout = HeldoutHistory(self._run.heldout, settings.targets, self._inputs.metric)
        self._observers = Observers(
            standard_observers(self._run, progress, tensorboard, observers)
        )
        self._observers.attached(self.run_dir, self.settings)
        self._state = LineageState(self._run, self.settings)
        if distributed.is_distributed():
            check_ranks(self.settings, train_loader)
        self._concluder = Concluder(
            self._state, self._run, rule, settings.spectrum_stop, self._heldout, self._teachers,
            self._observers,
        )
        self._state.open(fresh)
        if self._state.resumed:
            self._observers.resumed(self._run.root, self._state.records, self._state.decision)

    @property
    def rule(self) -> StopRule:
        """The stop rule (from the settings); a replacement given here is the one used."""
        return self._concluder.rule

    @rule.setter
    def rule(self, value: StopRule) -> None:
        self._concluder.rule = value

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
        online = store = pool_teacher = None
        if previous is not None and self.settings["teacher_mode"] == "online":
            online = load_generation(self.model_fn, self.run_dir, previous)
        elif previous is not None:
            store = self._teachers.open(previous)
            if self._pool is not None:
                pool_teacher = open_teacher(self._run, previous, self._pool)
        seed_generation(self.settings["seed"], index, self._inputs.train_loader)
        model = self._checks.new_model(index)
        teacher = previous["generation"] if previous is not None else None
        self._observers.generation_started(index, teacher)
        return Generation(
            index,
            model,
            self._inputs,
            self._concluder.conclude,
            teacher=teacher,
            store=store,
            online_teacher=online,
            observer=self._observers,
            pool_teacher=pool_teacher,
        )


def spectral_view(
    inputs: GenerationInputs, settings: Settings, feature_fn: FeatureFn | None
) -> SpectralView | None:
    """The spectral view when ``spectrum_samples`` asks for one (see :mod:`filial.spectral`)."""
    if not settings.spectrum_samples:
        return None
    return SpectralView(
        inputs.run.root / spectral.FOLDER,
        SpectralOptions(settings.spectrum_samples, settings.spectrum_stop, feature_fn),
        len(inputs.train_loader.dataset),  # type: ignore[arg-type]
        settings.views if inputs.replay is not None else 1,
        settings.seed,
        (inputs.train_loader, inputs.heldout_loader),
        inputs.metric,
        settings.max_generations,
    )
