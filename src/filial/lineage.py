"""The generation loop: :class:`Lineage` hands out generations, records them, decides, resumes.

Hook mode is ``for gen in lineage: ...train gen.model...; gen.finish(model)``; managed mode is
``lineage.run(fit)`` with a fit function such as :func:`filial.fit_epochs`. Both go through
:meth:`Lineage.__iter__`, so they share one engine.

The state of a run lives in ``RUN/lineage.json`` (settings, one record per finished generation,
the decision), rewritten atomically after every generation. A generation counts as finished only
once its record is there, so after a crash the run resumes at the first generation without one.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import math
import random
import re
import shutil
import sys
import weakref
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.utils.data import DataLoader, DistributedSampler
from tqdm.auto import tqdm

from . import distributed
from ._io import LockedError, RunLock, atomic_write, atomic_write_json, sweep_temporaries
from .checkpoint import load_checkpoint
from .data import Probe, Replay, check_loader, derive_seed, preserved_rng, probe, samplers_of
from .errors import InputError
from .generation import (
    HELDOUT_FILE,
    Generation,
    Predictions,
    Setup,
    probe_outputs,
    training_pass,
    write_targets,
)
from .losses import StudentLoss
from .metrics import Metric, as_float_metric, default_metric, metric_name
from .stopping import StopRule, as_count
from .store import STORE_DTYPES, StoreError, TargetStore, index_dtype
from .tb import TensorBoardLog

log = logging.getLogger("filial")

STATE_FILE = "lineage.json"
STATE_FORMAT = "filial.lineage/1"
HELDOUT_LABELS_FILE = "heldout_labels.npy"
BASELINE_DIR = "baseline"
BASELINE_FILE = "baseline.json"
TEACHER_MODES = ("cached", "online")
# Settings added after the first format: a run written before them used these values.
_SETTING_DEFAULTS: dict[str, Any] = {"teacher_mode": "cached", "replayed": False}
# What a lineage writes in its run directory, and so all that fresh=True deletes.
_WRITTEN_HERE = re.compile(r"lineage\.json|heldout_labels\.npy|gen\d+|baseline|tb")


@dataclass
class Result:
    """What a lineage found: a record per finished generation, the best one, why it stopped."""

    records: list[dict[str, Any]]
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
    model_fn: Callable[[], nn.Module], run_dir: Path, record: dict[str, Any]
) -> nn.Module:
    """A fresh ``model_fn()`` module with a finished generation's checkpoint, checked against
    its recorded sha256. Building the module draws initial weights: the caller's RNG is kept."""
    with preserved_rng():
        model = model_fn()
    model.load_state_dict(
        load_checkpoint(run_dir / record["checkpoint"], record.get("checkpoint_sha256"))
    )
    return model


def _seed_everything(seed: int) -> None:
    torch.manual_seed(seed)
    random.seed(seed)
    np.random.seed(seed)


def _ensemble(stack: list[torch.Tensor], kind: str) -> torch.Tensor:
    """Averaged outputs of several generations: probabilities for ce (returned as log-probs,
    which are valid logits for any metric), raw outputs for l2."""
    if kind == "ce":
        probs = torch.stack([torch.softmax(o, dim=1) for o in stack]).mean(dim=0)
        return probs.clamp_min(1e-30).log()
    return torch.stack(stack).mean(dim=0)


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
    ) -> None:
        problems: list[Exception] = []

        def attempt(check: Callable[[], Any]) -> Any:
            try:
                return check()
            except (TypeError, ValueError) as exc:
                problems.append(exc)
                return None

        if not callable(model_fn):
            problems.append(TypeError(f"model_fn must be callable, but got {model_fn!r}"))
        attempt(lambda: check_loader(train_loader, "train_loader"))
        attempt(lambda: check_loader(heldout_loader, "heldout_loader"))
        if test_loader is not None:
            attempt(lambda: check_loader(test_loader, "test_loader"))
        if heldout_loader is train_loader or (
            isinstance(heldout_loader, DataLoader)
            and isinstance(train_loader, DataLoader)
            and heldout_loader.dataset is train_loader.dataset
        ):
            problems.append(
                ValueError(
                    "heldout_loader is the training loader (or reads the same dataset object); "
                    "held-out evidence must come from samples the students do not train on. "
                    "Split off a held-out set, e.g. with torch.utils.data.random_split."
                )
            )
        loss = attempt(lambda: StudentLoss(targets, temperature, label_weight))
        rule = attempt(lambda: StopRule(max_generations, patience, min_gain))
        if targets == "l2" and temperature != 1.0:
            problems.append(
                ValueError(
                    f"temperature={temperature!r} applies to targets='ce' only; with targets='l2' "
                    "students regress on the raw outputs. Leave temperature at 1.0."
                )
            )
        views = attempt(lambda: as_count(views, "views", minimum=1))
        if store_dtype not in STORE_DTYPES:
            problems.append(
                ValueError(f"store_dtype must be one of {STORE_DTYPES}, but got {store_dtype!r}")
            )
        if top_k is not None:
            top_k = attempt(lambda: as_count(top_k, "top_k", minimum=1))
            if targets == "l2":
                problems.append(
                    ValueError(
                        "top_k keeps only the k largest outputs, which suits soft cross-entropy; "
                        "with targets='l2' students regress on every output. Use top_k=None."
                    )
                )
        if teacher_mode not in TEACHER_MODES:
            problems.append(
                ValueError(f"teacher_mode must be one of {TEACHER_MODES}, but got {teacher_mode!r}")
            )
        elif teacher_mode == "online" and top_k is not None:
            problems.append(
                ValueError(
                    "top_k compacts the cached targets; teacher_mode='online' caches none. Use "
                    "one or the other."
                )
            )
        elif teacher_mode == "online" and views not in (None, 1):
            problems.append(
                ValueError(
                    f"views={views} caches several augmented views per sample; "
                    "teacher_mode='online' caches none (its teacher sees every augmented batch). "
                    "Use views=1 with it."
                )
            )
        if metric is not None and not callable(metric):
            problems.append(TypeError(f"metric must be callable or None, but got {metric!r}"))
        seed = attempt(lambda: as_count(seed, "seed", minimum=0))
        train_probe = heldout_probe = None
        if not problems:
            train_probe = attempt(lambda: probe(train_loader))
            heldout_probe = attempt(lambda: probe(heldout_loader))
        if train_probe is not None and views is not None and teacher_mode == "cached":
            attempt(lambda: _check_augmentation(train_probe, views))
        if heldout_probe is not None and (
            heldout_probe.varies or heldout_probe.collate_draws or not heldout_probe.deterministic
        ):
            _say_once(
                "heldout:" + heldout_probe.fingerprint,
                "the held-out samples change from fetch to fetch (random augmentation in the "
                "held-out dataset?), so held-out figures carry that noise too; build the "
                "held-out dataset without augmentation",
            )
        labels = getattr(train_probe, "labels", None)
        if isinstance(labels, torch.Tensor) and targets == "ce" and labels.is_floating_point():
            problems.append(
                ValueError(
                    f"targets='ce' needs integer class labels, but the training labels are "
                    f"{labels.dtype}. Use targets='l2' for regression."
                )
            )
        if problems:
            if len(problems) == 1:
                raise problems[0]
            raise ValueError(
                "several settings are wrong:\n" + "\n".join(f"  - {p}" for p in problems)
            )
        # guaranteed by the checks above
        assert loss is not None and rule is not None and seed is not None and views is not None
        assert train_probe is not None and heldout_probe is not None

        self._probe = train_probe
        self._width = self._check_model(model_fn, loss)
        if top_k is not None and top_k > self._width:
            raise InputError(
                f"top_k={top_k} is more than the model's {self._width} outputs; use at most "
                f"top_k={self._width}"
            )
        if top_k is not None:
            value = np.dtype(store_dtype).itemsize
            compact = top_k * (value + np.dtype(index_dtype(self._width)).itemsize)
            if compact >= self._width * value:
                _say_once(
                    f"top_k{top_k}:{self._width}:{store_dtype}",
                    f"top_k={top_k} stores {compact} bytes per sample and view (values and "
                    f"class indices), no fewer than the {self._width * value} of the full store "
                    f"of {self._width} outputs; top_k=None keeps every output for less",
                )
        self.model_fn = model_fn
        self.run_dir = Path(run_dir)
        # Under a process group only rank 0 prints and writes TensorBoard runs.
        self.progress = bool(progress) and distributed.is_main()
        if tensorboard is True:
            tensorboard = self.run_dir / "tb"
        main = distributed.is_main()
        self.tensorboard = TensorBoardLog(tensorboard) if tensorboard and main else None
        self.rule = rule
        train_print = train_probe.fingerprint
        replay = _replay(train_probe, views, seed) if teacher_mode == "cached" else None
        self.settings: dict[str, Any] = {
            "targets": targets,
            "temperature": float(temperature),
            "label_weight": float(label_weight),
            "max_generations": rule.max_generations,
            "patience": rule.patience,
            "min_gain": float(min_gain),
            "views": views,
            "store_dtype": store_dtype,
            "top_k": top_k,
            "teacher_mode": teacher_mode,
            # Replayed targets and targets of unreplayed augmentation must not be mixed.
            "replayed": replay is not None,
            "seed": seed,
            "metric": metric_name(metric),
            "model_fn": metric_name(model_fn),
            "train_size": len(train_loader.dataset),  # type: ignore[arg-type]
            "heldout_size": len(heldout_loader.dataset),  # type: ignore[arg-type]
            "test_size": None if test_loader is None else len(test_loader.dataset),  # type: ignore[arg-type]
            "train_fingerprint": train_print,
            "heldout_fingerprint": heldout_probe.fingerprint,
        }
        self._setup = Setup(
            run_dir=self.run_dir,
            train_loader=train_loader,
            heldout_loader=heldout_loader,
            test_loader=test_loader,
            loss=loss,
            metric=as_float_metric(
                metric or default_metric(torch.as_tensor(train_probe.labels)), metric_name(metric)
            ),
            store_dtype=store_dtype,
            views=views,
            fingerprint=train_print,
            seed=seed,
            top_k=top_k,
            write_targets=teacher_mode != "online",  # online students never read a cache
            replay=replay,
        )
        self._records: list[dict[str, Any]] = []
        self._decision: dict[str, Any] | None = None
        self._heldout: dict[int, torch.Tensor] = {}
        self._fresh_store: TargetStore | None = None
        self._previous_model: weakref.ref[nn.Module] | None = None
        if distributed.is_distributed():
            self._check_ranks(train_loader)
        self._open_run_dir(fresh)

    # -- the run directory -------------------------------------------------------------------

    @property
    def state_path(self) -> Path:
        return self.run_dir / STATE_FILE

    def _open_run_dir(self, fresh: bool) -> None:
        run_dir = self.run_dir
        if run_dir.exists() and not run_dir.is_dir():
            raise InputError(f"run_dir {run_dir} exists and is not a directory")
        is_run = self.state_path.is_file()
        if run_dir.is_dir() and not is_run and _foreign_entries(run_dir):
            raise InputError(
                f"run_dir {run_dir} is not empty and holds no {STATE_FILE}: it is not a filial "
                "run directory, and filial will not write into it. Choose another run_dir."
            )
        if is_run and not fresh:
            self._refuse_other_settings(self._read_state())  # before touching anything
        if distributed.is_distributed():
            # Note: several processes. Every rank has made the read-only checks above, so bad
            # settings fail on all of them; once all have looked, rank 0 alone takes the lock and
            # resumes or starts the run, and the other ranks then read the state it left.
            distributed.barrier()
            distributed.on_rank_zero(
                lambda: self._take_run_dir(fresh, is_run), f"opening the run directory {run_dir}"
            )
            if not distributed.is_main():
                if not self.state_path.is_file():
                    raise RuntimeError(
                        f"rank {distributed.rank()} finds no {self.state_path}, which rank 0 has "
                        "written: every rank must see the same run directory (one machine, or a "
                        "file system shared by the machines)"
                    )
                state = self._read_state()
                self._records = list(state["records"])
                self._decision = state.get("decision")
            return
        self._take_run_dir(fresh, is_run)

    def _take_run_dir(self, fresh: bool, is_run: bool) -> None:
        """Lock the run directory, then resume the run in it or start one (rank 0's job)."""
        run_dir = self.run_dir
        created = not run_dir.exists()
        run_dir.mkdir(parents=True, exist_ok=True)
        self._lock = RunLock(run_dir)
        try:
            self._lock.acquire()
        except LockedError:
            if created:
                shutil.rmtree(run_dir, ignore_errors=True)
            raise
        if self._lock.previous:
            log.warning(
                "took over the lock of %s left by process %s, which is no longer running",
                run_dir,
                self._lock.previous.get("pid"),
            )
        try:
            self._resume_or_start(fresh, is_run)
        except BaseException:
            self.close()
            raise

    def _resume_or_start(self, fresh: bool, is_run: bool) -> None:
        run_dir = self.run_dir
        for path in sweep_temporaries(run_dir):
            log.warning("removed %s, a temporary file left by a process that died", path)
        if fresh and is_run:
            log.warning("fresh=True: deleting the earlier run in %s", run_dir)
            for entry in run_dir.iterdir():  # only what filial writes; never the lock
                if _WRITTEN_HERE.fullmatch(entry.name):
                    shutil.rmtree(entry) if entry.is_dir() else entry.unlink()
            is_run = False
        if not is_run:
            self._write_state()
            return
        state = self._read_state()
        differences = self._refuse_other_settings(state)
        if differences:
            log.warning(
                "%s: no generation had finished, so the new settings replace the old (%s)",
                run_dir,
                "; ".join(differences),
            )
            self._write_state()
            return
        self._records = list(state["records"])
        self._decision = state.get("decision")
        if self._records:
            self._say(f"resuming {run_dir} after generation {self._records[-1]['generation']}")

    def _refuse_other_settings(self, state: dict[str, Any]) -> list[str]:
        """Raise if ``state`` has finished generations under other settings; else return the
        differences (which may then replace the old settings)."""
        saved = {**_SETTING_DEFAULTS, **state["settings"]}  # keys newer than the run's file
        differences = [
            f"{key}: {saved.get(key)!r} in the run, {value!r} now"
            for key, value in self.settings.items()
            if saved.get(key) != value
        ]
        if differences and state["records"]:
            raise InputError(
                f"{self.run_dir} holds a run made with other settings, so it cannot be "
                "resumed:\n  "
                + "\n  ".join(differences)
                + "\nUse the run's settings, another run_dir, or fresh=True to start over."
            )
        return differences

    def close(self) -> None:
        """Release the run directory's lock (also released when the object or process ends)."""
        lock = getattr(self, "_lock", None)
        if lock is not None:
            lock.release()
        if self.tensorboard is not None:
            self.tensorboard.close()

    def _session_settings(self) -> dict[str, Any]:
        keys = ("seed", "targets", "temperature", "label_weight", "max_generations", "patience")
        return {key: self.settings[key] for key in keys}

    def _session_metrics(self) -> dict[str, float]:
        """The hparams-table metrics: generation 0 against the kept generation."""
        records = self._records
        best = StopRule.best(records)
        if best is None:
            return {}
        kept, first = records[best], records[0]
        metrics = {
            "best_generation": float(best),
            "generations": float(len(records) - 1),
            "heldout_best": kept["heldout"],
            "heldout_generation_0": first["heldout"],
            "heldout_gain": kept["heldout"] - first["heldout"]
            if first["heldout"] is not None
            else None,
        }
        if kept.get("test") is not None and first.get("test") is not None:
            metrics["test_best"] = kept["test"]
            metrics["test_gain"] = kept["test"] - first["test"]
        return {k: v for k, v in metrics.items() if v is not None}

    def _say(self, line: str) -> None:
        """One line of progress on stderr (through tqdm, so that open progress bars survive)."""
        if self.progress:
            tqdm.write(f"filial: {line}", file=sys.stderr)

    def _read_state(self) -> dict[str, Any]:
        try:
            state = json.loads(self.state_path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise ValueError(f"{self.state_path} cannot be read ({exc})") from exc
        if not isinstance(state, dict) or state.get("format") != STATE_FORMAT:
            raise ValueError(f"{self.state_path} is not a filial lineage file ({STATE_FORMAT})")
        return state

    def _write_state(
        self, records: list[dict[str, Any]] | None = None, decision: dict[str, Any] | None = None
    ) -> None:
        atomic_write_json(
            self.state_path,
            {
                "format": STATE_FORMAT,
                "settings": self.settings,
                "records": self._records if records is None else records,
                "decision": self._decision if decision is None else decision,
            },
        )

    # -- the loop ----------------------------------------------------------------------------

    @property
    def done(self) -> bool:
        """True once the stop rule has stopped the lineage."""
        return bool(self._decision and self._decision.get("stop"))

    def __iter__(self) -> Iterator[Generation]:
        while not self.done:
            gen = self._begin(len(self._records))
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
        decision = self._decision or {}
        return Result(
            records=list(self._records),
            best=StopRule.best(self._records),
            stop_reason=decision.get("reason") if decision.get("stop") else None,
            run_dir=self.run_dir,
            model_fn=self.model_fn,
        )

    def matched_baseline(
        self, make_fit: Callable[[int], Callable[[Generation], nn.Module | None]]
    ) -> dict[str, Any]:
        """Train one model on the labels for as many epochs as the whole lineage used.

        Generation 0 is the baseline "without generations"; this one tells the gain of
        generations apart from the gain of more training. ``make_fit(epochs)`` returns a fit
        function (e.g. ``lambda n: filial.fit_epochs(n, optimizer)``). The model starts from
        generation 0's seed, so the comparison is paired. Its record goes to
        ``RUN/baseline/baseline.json``; a finished baseline for the same epoch count is reused.
        """
        if not self.done:
            raise RuntimeError("the matched baseline needs a finished lineage; run it first")
        epochs = sum(len(r.get("epochs") or []) for r in self._records)
        if epochs == 0:
            raise ValueError(
                "the lineage logged no epochs, so the matched epoch count is unknown: train with "
                "filial.fit_epochs or call gen.log_epoch(epoch, loss=...) in your loop"
            )
        directory = self.run_dir / BASELINE_DIR
        state_path = directory / BASELINE_FILE
        if state_path.is_file():
            stored = json.loads(state_path.read_text(encoding="utf-8"))
            if stored.get("epochs_matched") == epochs:
                return stored

        def on_finish(
            gen: Generation, record: dict[str, Any] | None, _: Predictions | None
        ) -> dict[str, Any]:
            if record is None:  # a rank other than 0: rank 0 has written the baseline's record
                return json.loads(state_path.read_text(encoding="utf-8"))
            record.update(
                kind="matched-baseline",
                epochs_matched=epochs,
                checkpoint=f"{BASELINE_DIR}/{record['checkpoint']}",
            )
            atomic_write_json(state_path, record)
            return record

        self._seed_generation(0)
        setup = dataclasses.replace(self._setup, run_dir=directory, write_targets=False)
        gen = Generation(0, self.model_fn(), setup, None, None, on_finish)
        fitted = make_fit(epochs)(gen)
        record = gen.finish(fitted if fitted is not None else gen.model)
        if self.tensorboard is not None:
            self.tensorboard.baseline(record, [r["generation"] for r in self._records])
            self.tensorboard.close()
        self._say(
            f"matched baseline ({epochs} epochs on the labels): held-out "
            f"{_fmt(record['heldout'])}, {record['seconds']:.1f} s"
        )
        return record

    def _begin(self, index: int) -> Generation:
        teacher = self._records[-1]["generation"] if self._records else None
        teacher_model = store = None
        if self._records and self.settings["teacher_mode"] == "online":
            teacher_model = load_generation(self.model_fn, self.run_dir, self._records[-1])
        elif self._records:
            store = self._open_teacher_store(self._records[-1])
        self._seed_generation(index)
        model = self.model_fn()
        if not isinstance(model, nn.Module):
            raise InputError(
                f"model_fn must return an nn.Module, but returned {type(model).__name__}"
            )
        previous = self._previous_model() if self._previous_model is not None else None
        if previous is not None:
            if previous is model:
                raise InputError(
                    "model_fn returned the same module object as for the previous generation; it "
                    "must build a new, freshly initialised module on every call"
                )
            shared = {id(p) for p in previous.parameters()} & {id(p) for p in model.parameters()}
            if shared:
                raise InputError(
                    f"model_fn returned a module sharing {len(shared)} parameter tensors with the "
                    "previous generation's; every generation needs its own parameters"
                )
        width = self._probe_model(model).shape[1]
        if width != self._width:
            raise InputError(
                f"generation {index}'s model has {width} outputs, but the lineage's models have "
                f"{self._width}: model_fn must build the same architecture every generation"
            )
        self._previous_model = weakref.ref(model)
        return Generation(
            index, model, self._setup, teacher, store, self._record, teacher_model=teacher_model
        )

    def _check_model(self, model_fn: Callable[[], nn.Module], loss: StudentLoss) -> int:
        """Build one model and run it on the probe samples: its output width, and labels that
        fit it, are checked before any run directory is touched."""
        with preserved_rng():
            model = model_fn()
        if not isinstance(model, nn.Module):
            raise InputError(
                f"model_fn must return an nn.Module, but returned {type(model).__name__}"
            )
        outputs = self._probe_model(model)
        loss.check(outputs, torch.as_tensor(self._probe.labels))
        return int(outputs.shape[1])

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

    def _probe_model(self, model: nn.Module) -> torch.Tensor:
        """The model's outputs on the probe samples; a model that cannot run on them is an
        input error named here, before any training."""
        try:
            outputs = probe_outputs(model, self._probe.inputs)
        except Exception as exc:  # whatever the user's forward raises
            raise InputError(
                f"the model from model_fn fails on a batch of the training data: "
                f"{type(exc).__name__}: {exc}"
            ) from exc
        if not isinstance(outputs, torch.Tensor) or outputs.ndim != 2:
            found = tuple(outputs.shape) if isinstance(outputs, torch.Tensor) else type(outputs)
            raise InputError(
                f"the model must return a tensor of shape (batch, outputs), but returned {found}"
            )
        return outputs

    def _seed_generation(self, index: int) -> None:
        """Seed every random stream the generation draws from, from ``(seed, index)``.

        Besides torch's, Python's and numpy's global generators this reseeds the generators that
        the user's training loader and its sampler hold, so that generation ``index`` sees the
        same shuffling whether the run went straight through or was resumed in a new process.
        """
        seed = self.settings["seed"]
        _seed_everything(derive_seed(seed, index))
        loader = self._setup.train_loader
        samplers = samplers_of(loader)
        candidates = [loader.generator] + [getattr(s, "generator", None) for s in samplers]
        held = {id(g): g for g in candidates}
        for generator in held.values():
            if isinstance(generator, torch.Generator):
                generator.manual_seed(derive_seed(seed, index, 2))
        # Note: DistributedSampler holds no generator; it shuffles with seed + epoch. Its seed
        # is derived here per generation (the same on every rank, so the shards stay
        # complementary): generations see different orders and a resumed run repeats them.
        for sampler in samplers:
            if isinstance(sampler, DistributedSampler):
                sampler.seed = derive_seed(seed, index, 2)

    def _open_teacher_store(self, record: dict[str, Any]) -> TargetStore:
        """The teacher's store, verified (rebuilt from its checkpoint if damaged)."""
        if not distributed.is_distributed():
            return self._teacher_store(record)
        # Note: several processes. Rank 0 verifies the store while the others wait; a damaged
        # one is rebuilt by all ranks together (each scores its shard, as in every teacher
        # pass), so that no rank idles through a whole pass inside a collective's timeout; rank
        # 0 writes it, and then the other ranks open the store it vouched for.
        what = f"checking generation {record['generation']}'s targets"
        store = distributed.on_rank_zero(lambda: self._checked_store(record), what)
        (rebuild,) = distributed.broadcast_ints(
            [int(store is None)] if distributed.is_main() else None, 1
        )
        if rebuild:
            store = self._rebuilt_store(record)
        if store is None:
            store = TargetStore(self.run_dir / f"gen{record['generation']}")
            if not store.exists() or store.manifest["teacher_sha256"] != record.get(
                "checkpoint_sha256"
            ):
                raise StoreError(
                    f"rank {distributed.rank()} finds no targets of generation "
                    f"{record['generation']}'s checkpoint in {store.directory}, which rank 0 has "
                    "written: every rank must see the same run directory (one machine, or a file "
                    "system shared by the machines)"
                )
        return store

    def _teacher_store(self, record: dict[str, Any]) -> TargetStore:
        """The teacher ``record``'s targets, verified; rebuilt from its checkpoint if damaged."""
        store = self._checked_store(record)
        if store is None:
            store = self._rebuilt_store(record)
        assert store is not None  # one process: the whole pass is here
        return store

    def _checked_store(self, record: dict[str, Any]) -> TargetStore | None:
        """The teacher ``record``'s targets if they verify; None if they are missing or damaged
        and can be recomputed from its checkpoint. Targets of other training data raise."""
        directory = self.run_dir / f"gen{record['generation']}"
        fresh = self._fresh_store
        if fresh is not None and fresh.directory == directory:
            return fresh
        store = TargetStore(directory)
        expected = self._setup.fingerprint
        try:
            store.verify(fingerprint=expected)
            if store.manifest["teacher_sha256"] != record.get("checkpoint_sha256"):
                raise StoreError(f"the targets in {directory} were not made by its checkpoint")
            return store
        except StoreError as exc:
            if store.exists() and store.manifest.get("fingerprint") != expected:
                raise  # other training data: recomputing would hide the user's mistake
            log.warning(
                "%s; recomputing generation %d's targets from its checkpoint",
                exc,
                record["generation"],
            )
        return None

    def _rebuilt_store(self, record: dict[str, Any]) -> TargetStore | None:
        """Recompute the teacher ``record``'s targets from its checkpoint and write them; under a
        process group every rank takes part and rank 0 writes (None on the other ranks)."""
        model = load_generation(self.model_fn, self.run_dir, record)
        seed = derive_seed(self.settings["seed"], record["generation"], 1)
        passes = training_pass(model, self._setup, seed)
        directory = self.run_dir / f"gen{record['generation']}"

        def write() -> TargetStore:
            assert passes is not None  # rank 0 (or one process) holds the whole pass
            return write_targets(self._setup, directory, passes[1], record["checkpoint_sha256"])

        return distributed.on_rank_zero(
            write, f"writing generation {record['generation']}'s recomputed targets"
        )

    def _heldout_outputs(self, generation: int) -> torch.Tensor:
        if generation not in self._heldout:
            path = self.run_dir / f"gen{generation}" / HELDOUT_FILE
            self._heldout[generation] = torch.from_numpy(np.load(path, allow_pickle=False))
        return self._heldout[generation]

    def _record(
        self, gen: Generation, record: dict[str, Any] | None, heldout: Predictions | None
    ) -> dict[str, Any]:
        """Called by ``gen.finish``: add cross-generation figures, decide, write the state."""
        if gen.index != len(self._records) or self.done:
            raise RuntimeError(
                f"generation {gen.index} finished out of turn (the lineage has "
                f"{len(self._records)} finished generations)"
            )
        if record is None or heldout is None:  # a rank other than 0 under a process group
            return self._follow(gen)
        self._heldout[gen.index] = heldout.outputs
        labels_path = self.run_dir / HELDOUT_LABELS_FILE
        if not labels_path.is_file():
            atomic_write(
                labels_path,
                lambda handle: np.save(handle, heldout.labels.numpy(), allow_pickle=False),
            )
        if not record["diverged"]:
            metric = self._setup.metric
            members = [r["generation"] for r in self._records if not r.get("diverged")]
            stack = [self._heldout_outputs(g) for g in members] + [heldout.outputs]
            record["ensemble"] = metric(_ensemble(stack, self.settings["targets"]), heldout.labels)
            if gen.teacher is not None and heldout.outputs.shape[1] > 1:
                teacher = self._heldout_outputs(gen.teacher)
                agree = heldout.outputs.argmax(dim=1) == teacher.argmax(dim=1)
                record["agreement"] = float(agree.double().mean())
            self._fresh_store = TargetStore(gen.directory)
        decision = self.rule.decide([*self._records, record])
        if decision.stop:
            record["stop"] = {"reason": decision.reason, "best": decision.best, **decision.detail}
        state = {
            "stop": decision.stop,
            "reason": decision.reason,
            "best": decision.best,
            "detail": decision.detail,
        }
        # On disk first: if the write fails, memory still agrees with the file and the
        # generation can be finished again.
        self._write_state([*self._records, record], state)
        self._records.append(record)
        self._decision = state
        if self.tensorboard is not None:
            self.tensorboard.generation(record, self._records[0])
            if decision.stop:
                self.tensorboard.session(self._session_settings(), self._session_metrics())
                self.tensorboard.close()
        self._say(
            f"generation {gen.index}: held-out {_fmt(record['heldout'])}, train vs labels "
            f"{_fmt(record['train'])}, ensemble {_fmt(record['ensemble'])}, "
            f"{record['seconds']:.1f} s"
            + (
                f"; stop ({decision.reason}), best generation {decision.best}"
                if decision.stop
                else ""
            )
        )
        return record  # Generation.finish sends the other ranks the word (see _follow)

    def _follow(self, gen: Generation) -> dict[str, Any]:
        """A rank other than 0: take rank 0's stop decision (broadcast by ``Generation.finish``),
        then its records from ``lineage.json``, so that every rank holds the same records and
        leaves the loop at the same generation."""
        assert gen.decided is not None  # set by finish from rank 0's broadcast
        stop, finished = gen.decided
        state = self._read_state()
        records, decision = list(state["records"]), state.get("decision") or {}
        if (
            len(records) != finished
            or records[-1]["generation"] != gen.index
            or bool(decision.get("stop")) != bool(stop)
        ):
            raise RuntimeError(
                f"rank {distributed.rank()} reads {len(records)} finished generations in "
                f"{self.state_path}, but rank 0 has just recorded generation {gen.index} of "
                f"{finished}: every rank must see the same run directory (one machine, or a file "
                "system shared by the machines)"
            )
        self._records, self._decision = records, decision
        return records[-1]


def _replay(train: Probe, views: int, seed: int) -> Replay | None:
    """Replayed views when the training samples draw from the random streams (or several views
    are asked for); none for a deterministic dataset, which then costs no per-sample seeding."""
    if train.replayable and (views > 1 or train.varies):
        return Replay(derive_seed(seed, 3), views)
    return None


_AUGMENTATION_WARNED: set[str] = set()


def _say_once(key: str, message: str) -> None:
    """A warning about the data, once per dataset in this process, and on rank 0 only."""
    if key not in _AUGMENTATION_WARNED and distributed.is_main():
        _AUGMENTATION_WARNED.add(key)
        log.warning("%s", message)


def _check_augmentation(train: Probe, views: int) -> None:
    """Refuse views that cannot be replayed; say once per dataset what a single view means."""
    if not train.replayable:
        if train.collate_draws:
            why = (
                "the collate_fn draws from the global random generators, after each sample's "
                "replayed fetch. Move that augmentation into the dataset's __getitem__, or use "
                "teacher_mode='online'."
            )
        else:
            why = (
                "the training samples change even under the same seeds (the dataset draws from "
                "a generator of its own, or from the CUDA generator). Draw augmentation on the "
                "CPU from the global generators, or use teacher_mode='online'."
            )
        if views > 1:
            raise ValueError(
                f"views={views} replays random augmentation by seeding torch's, Python's and "
                f"numpy's global generators before each sample is fetched, but {why}"
            )
        _say_once(train.fingerprint, f"cached targets cannot match a student's inputs: {why}")
    elif not train.varies and views > 1:
        _say_once(
            f"copies{views}:{train.fingerprint}",
            f"views={views}: the training samples do not change with the random seeds, so the "
            f"{views} views of a sample are the same input and the cache holds {views} copies of "
            "each target; views=1 gives the same training at a fraction of the teacher pass",
        )
    elif train.varies and views == 1:
        _say_once(
            train.fingerprint,
            "the training samples change from fetch to fetch (random augmentation): with views=1 "
            "each student sees every sample in a single replayed augmented view, the one its "
            "cached target was made for. Pass views=4 (say) for more views per sample, or "
            "teacher_mode='online' for a fresh augmentation with an exact target every step.",
        )


def _foreign_entries(directory: Path) -> list[Path]:
    """Entries of ``directory`` that filial did not put there (its lock file does not count)."""
    return [p for p in directory.iterdir() if p.name != RunLock.NAME]


def _fmt(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    return f"{value:.4f}"
