"""Which settings a lineage has, how they are checked, and what ``lineage.json`` keeps of them.

:class:`Settings` holds the knobs a user chooses (``Lineage(targets=..., views=...)``, or a
recipe's ``[generations]``), checked together by :meth:`Settings.parse`, which the
:class:`~filial.Lineage` and the ``filial`` command's planning both call. :class:`DataFacts` holds
what the lineage learns from the data and the callables (sizes, fingerprints, whether views are
replayed, the names of ``model_fn`` and ``metric``). :func:`saved_settings` is the dict that
``lineage.json`` stores, and :func:`differences` compares it with a run's saved one: every key
counts, so a resumed run has the same settings and the same data.

>>> problems = Problems()
>>> Settings.parse(problems, targets="l2", temperature=2.0) is None
True
>>> print(problems.found[0])  # doctest: +ELLIPSIS
temperature=2.0 applies to targets='ce' only; ...
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any

from .errors import Problems
from .losses import StudentLoss
from .metrics import metric_name
from .stopping import StopRule, as_count
from .store import STORE_DTYPES

TEACHER_MODES = ("cached", "online")
# Settings added after the first format of lineage.json: a run written before them used these.
_ADDED_LATER: dict[str, Any] = {
    "teacher_mode": "cached",
    "replayed": False,
    "spectrum_samples": 0,
    "spectrum_stop": False,
    "pool": None,
}


@dataclass(frozen=True)
class Settings:
    """The knobs of one lineage (see :class:`filial.Lineage` for each one's meaning)."""

    targets: str = "ce"
    temperature: float = 1.0
    label_weight: float = 0.0
    max_generations: int = 8
    patience: int = 2
    min_gain: float = 0.0
    views: int = 1
    store_dtype: str = "float16"
    top_k: int | None = None
    teacher_mode: str = "cached"
    spectrum_samples: int = 0  # the spectral view's subset size (0: no view; filial.spectral)
    spectrum_stop: bool = False  # the stop rule may end the lineage at the forecast's best
    seed: int = 0

    @classmethod
    def parse(cls, problems: Problems, **given: Any) -> Settings | None:
        """Check ``given`` (keyword arguments named as the fields) and return the normalised
        settings, or None with every problem added to ``problems``."""
        before = len(problems)
        values = {**{f.name: f.default for f in dataclasses.fields(cls)}, **given}
        _check_loss_and_rule(problems, values)
        _check_store(problems, values)
        _check_teacher(problems, values)
        _check_spectrum(problems, values)
        values["seed"] = problems.attempt(lambda: as_count(values["seed"], "seed", minimum=0))
        if len(problems) > before:
            return None
        rule = StopRule(values["max_generations"], values["patience"], values["min_gain"])
        return cls(
            **{
                **values,
                "temperature": float(values["temperature"]),
                "label_weight": float(values["label_weight"]),
                "max_generations": rule.max_generations,
                "patience": rule.patience,
                "min_gain": rule.min_gain,
            }
        )

    def loss(self) -> StudentLoss:
        return StudentLoss(self.targets, self.temperature, self.label_weight)

    def rule(self) -> StopRule:
        return StopRule(self.max_generations, self.patience, self.min_gain)


def _check_loss_and_rule(problems: Problems, values: dict[str, Any]) -> None:
    problems.attempt(
        lambda: StudentLoss(values["targets"], values["temperature"], values["label_weight"])
    )
    problems.attempt(
        lambda: StopRule(values["max_generations"], values["patience"], values["min_gain"])
    )
    if values["targets"] == "l2" and values["temperature"] != 1.0:
        problems.add(
            ValueError(
                f"temperature={values['temperature']!r} applies to targets='ce' only; with "
                "targets='l2' students regress on the raw outputs. Leave temperature at 1.0."
            )
        )


def _check_store(problems: Problems, values: dict[str, Any]) -> None:
    values["views"] = problems.attempt(lambda: as_count(values["views"], "views", minimum=1))
    if values["store_dtype"] not in STORE_DTYPES:
        problems.add(
            ValueError(
                f"store_dtype must be one of {STORE_DTYPES}, but got {values['store_dtype']!r}"
            )
        )
    if values["top_k"] is not None:
        values["top_k"] = problems.attempt(lambda: as_count(values["top_k"], "top_k", minimum=1))
        if values["targets"] == "l2":
            problems.add(
                ValueError(
                    "top_k keeps only the k largest outputs, which suits soft cross-entropy; "
                    "with targets='l2' students regress on every output. Use top_k=None."
                )
            )


def _check_teacher(problems: Problems, values: dict[str, Any]) -> None:
    mode, views = values["teacher_mode"], values["views"]
    if mode not in TEACHER_MODES:
        problems.add(ValueError(f"teacher_mode must be one of {TEACHER_MODES}, but got {mode!r}"))
    elif mode == "online" and values["top_k"] is not None:
        problems.add(
            ValueError(
                "top_k compacts the cached targets; teacher_mode='online' caches none. Use "
                "one or the other."
            )
        )
    elif mode == "online" and views not in (None, 1):
        problems.add(
            ValueError(
                f"views={views} caches several augmented views per sample; "
                "teacher_mode='online' caches none (its teacher sees every augmented batch). "
                "Use views=1 with it."
            )
        )


def _check_spectrum(problems: Problems, values: dict[str, Any]) -> None:
    values["spectrum_samples"] = problems.attempt(
        lambda: as_count(values["spectrum_samples"], "spectrum_samples", minimum=0)
    )
    stop = values["spectrum_stop"]
    if not isinstance(stop, bool):
        problems.add(ValueError(f"spectrum_stop must be True or False, but got {stop!r}"))
    elif stop and not values["spectrum_samples"]:
        problems.add(
            ValueError(
                "spectrum_stop=True stops at the spectral forecast's best generation, which "
                "needs the spectral view: give spectrum_samples (e.g. 2000) as well"
            )
        )


@dataclass(frozen=True)
class DataFacts:
    """What a lineage's settings record about its data and callables."""

    replayed: bool  # replayed targets and targets of unreplayed augmentation must not be mixed
    metric: str  # qualified names: a resumed run must score and build models the same way
    model_fn: str
    train_size: int
    heldout_size: int
    test_size: int | None
    train_fingerprint: str
    heldout_fingerprint: str

    @classmethod
    def of(
        cls,
        loaders: tuple[Any, Any, Any],
        probes: tuple[Any, Any],
        replay: Any,
        metric: Any,
        model_fn: Any,
    ) -> DataFacts:
        """The facts of the ``(train, heldout, test)`` loaders and their probes."""
        train, heldout, test = loaders
        return cls(
            replayed=replay is not None,
            metric=metric_name(metric),
            model_fn=metric_name(model_fn),
            train_size=len(train.dataset),
            heldout_size=len(heldout.dataset),
            test_size=None if test is None else len(test.dataset),
            train_fingerprint=probes[0].fingerprint,
            heldout_fingerprint=probes[1].fingerprint,
        )


def saved_settings(settings: Settings, facts: DataFacts) -> dict[str, Any]:
    """The ``settings`` object of ``lineage.json`` (keys in the order the file has always had)."""
    knobs = dataclasses.asdict(settings)
    seed = knobs.pop("seed")
    data = dataclasses.asdict(facts)
    replayed = data.pop("replayed")
    return {**knobs, "replayed": replayed, "seed": seed, **data}


def differences(saved: dict[str, Any], current: dict[str, Any]) -> list[str]:
    """``key: old in the run, new now`` for every setting that differs (keys newer than the
    run's file count as their old default).

    ``model_fn`` and ``metric`` are compared by qualified name; a script run as ``python
    script.py`` names its functions ``__main__:...`` and the same script imported names them
    ``script:...``, so a ``__main__`` module matches any module with the same qualified name.

    >>> differences({"model_fn": "__main__:make"}, {"model_fn": "mail:make"})
    []
    """
    saved = {**_ADDED_LATER, **saved}
    return [
        f"{key}: {saved.get(key)!r} in the run, {value!r} now"
        for key, value in current.items()
        if not _same(key, saved.get(key), value)
    ]


def _same(key: str, old: Any, new: Any) -> bool:
    if old == new:
        return True
    if key in ("model_fn", "metric") and isinstance(old, str) and isinstance(new, str):
        (old_module, _, old_name), (new_module, _, new_name) = (
            old.rpartition(":"),
            new.rpartition(":"),
        )
        return old_name == new_name and "__main__" in (old_module, new_module)
    return False
