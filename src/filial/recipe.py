"""TOML recipes: a whole experiment as data, read with the standard library's ``tomllib``.

A recipe has five sections. ``[data]`` and ``[model]`` name a factory ``"package.module:function"``;
their other keys become its keyword arguments, so a user's own data or model plugs in without
editing filial. The data factory returns ``(train, heldout)`` or ``(train, heldout, test)``
DataLoaders (or a dict with those keys); the model factory returns a fresh ``nn.Module`` per call.

.. code-block:: toml

    [run]
    name = "digits-ce"
    seeds = [0, 1, 2]
    baseline = ["early-stopping", "matched"]   # models on the labels, as many epochs

    [data]
    factory = "filial.demo:mail_room_loaders"
    noise = 0.3

    [model]
    factory = "filial.demo:mlp"
    hidden = [256, 256]

    [training]
    epochs = 60
    optimizer = "sgd"
    lr = 0.05

    [generations]
    targets = "ce"
    max_generations = 6           # generations after generation 0: at most 7 models

Unknown keys, wrong types and keyword arguments a factory does not take are refused by name.
``--set section.key=value`` overrides any key (the value is read as TOML, else as a string).
Nothing here executes code other than importing and calling the two named factories.
"""

from __future__ import annotations

import copy
import importlib
import inspect
import json
import math
import os
import re
import stat
import tomllib
import traceback
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar

from .baselines import DEFAULT_LABEL_SMOOTHING, baseline_names
from .errors import InputError
from .losses import LOSS_KINDS
from .pool import KEEPS as POOL_KEEPS
from .pool import PSEUDO as POOL_PSEUDO
from .pool import SELECTIONS as POOL_SELECTIONS
from .store import STORE_DTYPES

if TYPE_CHECKING:
    import torch

MARKER = "# filial run recipe (filial.run/1): resolved by filial run, read by filial report"


def is_saved_recipe(path: Path) -> bool:
    """True when ``path`` is a recipe saved by ``filial run`` (it starts with the marker)."""
    try:
        with open(path, encoding="utf-8") as handle:
            return handle.readline().rstrip("\n") == MARKER
    except (OSError, UnicodeDecodeError):
        return False


class RecipeError(ValueError):
    """A recipe, an override or a factory is wrong; the message names the key."""


class FactoryError(RecipeError):
    """A recipe factory raised while it was imported or called.

    ``str()`` is one line naming the recipe key and the factory, then the factory's own
    traceback (the user needs it to fix their code); ``error`` is what it raised.
    """

    def __init__(self, key: str, spec: str, error: BaseException, importing: str = "") -> None:
        self.key, self.spec, self.error = key, spec, error
        self.user_traceback = _user_traceback(error)
        what = f": importing module {importing!r}" if importing else ""
        super().__init__(
            f"{key} = {spec!r}{what} raised {type(error).__name__}: {error}\n"
            f"The factory's traceback:\n{self.user_traceback}"
        )


def _user_traceback(error: BaseException) -> str:
    """The traceback of ``error`` without filial's calling frame and the import machinery's
    frames, so it starts in the user's code (a SyntaxError keeps its file, line and caret)."""
    summary = traceback.TracebackException.from_exception(error)
    kept = [
        frame
        for frame in list(summary.stack)[1:]  # the first is call_factory / import_factory
        if not frame.filename.startswith("<frozen importlib")
        and Path(frame.filename).parent.name != "importlib"
    ]
    summary.stack = traceback.StackSummary.from_list(kept)
    return "".join(summary.format()).rstrip("\n")


@dataclass(frozen=True)
class Field:
    kind: str  # "int", "float", "str", "bool", "seeds", "choice" or "baselines"
    default: Any
    choices: tuple[str, ...] = ()
    minimum: float | None = None
    help: str = ""
    maximum: float | None = None
    why_maximum: str = ""


# Each view is one more teacher pass over the training set per generation and one more row per
# sample in the store; caching more than a thousand augmented views is never worth that (a
# fresh augmentation per step is teacher = "online"). The exact check, once the data size and
# the output width are known, is filial.space.check_store_fits.
MAX_VIEWS = 1024
# No factory argument needs deeper values; bounding them keeps copying, saving and comparing a
# recipe (all recursive) far from Python's recursion limit, which tomllib itself reaches at
# about 500 nested lists.
MAX_NESTING = 32


_SCHEMA: dict[str, dict[str, Field]] = {
    "run": {
        "name": Field("str", "filial"),
        "run_dir": Field("str", ""),
        "seeds": Field("seeds", [0]),
        "baseline": Field(
            "baselines",
            [],
            help="none, or a list of early-stopping, label-smoothing, matched",
        ),
        "baseline_every": Field(
            "int", 1, minimum=1, help="early-stopped baselines: held-out after every k epochs"
        ),
        "label_smoothing": Field(
            "float", DEFAULT_LABEL_SMOOTHING, minimum=0.0, help="the label-smoothing baseline's"
        ),
    },
    "training": {
        "epochs": Field("int", 30, minimum=1),
        "optimizer": Field("choice", "sgd", ("sgd", "adam", "adamw")),
        "lr": Field("float", 0.05, minimum=0.0),
        "momentum": Field("float", 0.9, minimum=0.0),
        "weight_decay": Field("float", 0.0, minimum=0.0),
        "schedule": Field("choice", "none", ("none", "cosine", "step")),
        "step_size": Field("int", 30, minimum=1),
        "gamma": Field("float", 0.1, minimum=0.0),
        "device": Field(
            "str", "auto", help="auto (CUDA when available, else the CPU), cpu, cuda, cuda:1 ..."
        ),
    },
    "generations": {
        "targets": Field("choice", "ce", LOSS_KINDS),
        "temperature": Field("float", 1.0),
        "label_weight": Field("float", 0.0),
        "max_generations": Field(
            "int", 6, minimum=0, help="generations after generation 0 (so at most this + 1 models)"
        ),
        "patience": Field("int", 2, minimum=1),
        "min_gain": Field("float", 0.0, minimum=0.0),
        "views": Field(
            "int",
            1,
            minimum=1,
            maximum=MAX_VIEWS,
            why_maximum="each view is one more teacher pass over the training set and one more "
            "stored target per sample; for a fresh augmentation at every step use teacher = "
            "'online'",
        ),
        "store_dtype": Field("choice", "float16", STORE_DTYPES),
        "top_k": Field("int", 0, minimum=0, help="0: every output; k: the k largest (ce only)"),
        "teacher": Field("choice", "cached", ("cached", "online")),
        "spectrum_samples": Field(
            "int",
            0,
            minimum=0,
            help="0: no spectral view; m: its kernel on m training samples (e.g. 2000)",
        ),
        "spectrum_stop": Field(
            "bool", False, help="stop once the spectral forecast's best generation is trained"
        ),
    },
    # The unlabelled pool (filial.pool.Admission), used when the data factory returns one.
    "pool": {
        "select": Field("choice", "threshold", POOL_SELECTIONS),
        "threshold": Field(
            "float", 0.9, minimum=0.0, help="top probability at T=1; 0: none (per_class)"
        ),
        "count": Field("int", 0, minimum=0, help="top: k most confident; per_class: n a class"),
        "step": Field("float", 0.2, minimum=0.0, help="growing: share added per generation"),
        "keep": Field("choice", "relabel", POOL_KEEPS),
        "pseudo": Field("choice", "soft", POOL_PSEUDO),
        "weight": Field("float", 1.0, minimum=0.0),
        "audit": Field("bool", False, help="the pool's labels are for the audit figure only"),
        "batch_ratio": Field(
            "float", 0.0, minimum=0.0, help="pool rows per labelled row in a batch; 0: mixed"
        ),
    },
}
_FACTORY_SECTIONS = ("data", "model")
BASELINE_KEYS = ("baseline", "baseline_every", "label_smoothing")
ADDED_LATER = (("generations", "spectrum_samples"), ("generations", "spectrum_stop"))
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")
SECTIONS = ("run", "data", "model", "training", "generations", "pool")


_PLAIN_KINDS: dict[str, tuple[type, str]] = {
    "str": (str, "a string"),
    "bool": (bool, "true or false"),
}


def _describe(value: Any) -> str:
    return f"{value!r} ({type(value).__name__})"


def _check_kind(name: str, field: Field, value: Any) -> Any:
    """``value`` if it is of the field's kind (floats come back as float)."""
    if field.kind == "int" and (not isinstance(value, int) or isinstance(value, bool)):
        raise RecipeError(f"{name} should be an integer, but got {_describe(value)}")
    if field.kind == "float":
        if not isinstance(value, (int, float)) or isinstance(value, bool):
            raise RecipeError(f"{name} should be a number, but got {_describe(value)}")
        if not math.isfinite(value):
            raise RecipeError(f"{name} should be a finite number, but got {value!r}")
        return float(value)
    plain = _PLAIN_KINDS.get(field.kind)
    if plain is not None and not isinstance(value, plain[0]):
        raise RecipeError(f"{name} should be {plain[1]}, but got {_describe(value)}")
    if field.kind == "choice" and value not in field.choices:
        options = ", ".join(repr(c) for c in field.choices)
        raise RecipeError(f"{name} should be one of {options}, but got {_describe(value)}")
    if field.kind == "baselines":
        try:  # "none", one name or a list of names; kept as the list, in the training order
            return baseline_names(value, name)
        except ValueError as exc:
            raise RecipeError(str(exc)) from None
    if field.kind == "seeds":
        _check_seeds(name, value)
    return value


def _check_seeds(name: str, value: Any) -> None:
    if (
        not isinstance(value, list)
        or not value
        or not all(isinstance(s, int) and not isinstance(s, bool) and s >= 0 for s in value)
    ):
        raise RecipeError(
            f"{name} should be a non-empty list of integers >= 0, but got {_describe(value)}"
        )
    if len(set(value)) != len(value):
        raise RecipeError(f"{name} lists a seed twice: {value!r}")


def _check_field(name: str, field: Field, value: Any) -> Any:
    value = _check_kind(name, field, value)
    number = isinstance(value, (int, float)) and not isinstance(value, bool)
    if field.minimum is not None and number and value < field.minimum:
        raise RecipeError(f"{name} should be >= {field.minimum:g}, but got {value!r}")
    if field.maximum is not None and number and value > field.maximum:
        raise RecipeError(
            f"{name} should be <= {field.maximum:g} ({field.why_maximum}), but got {value!r}"
        )
    return value


def _key_path(path: str, key: Any) -> str:
    return (
        f"{path}.{key}"
        if isinstance(key, str) and _BARE_KEY.fullmatch(key)
        else (f"{path}[{json.dumps(key, ensure_ascii=False)}]")
    )


def check_values(name: str, value: Any) -> None:
    """Refuse what a recipe cannot hold, naming the key: values nested deeper than
    :data:`MAX_NESTING`, NaN (it never equals itself, so a saved recipe would never match on
    resume) and types TOML has but a recipe does not keep (dates and times).

    The walk keeps its own stack, so a value of any depth is refused without recursion.

    >>> check_values("data.noise", float("nan"))  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    filial.recipe.RecipeError: data.noise = nan: a recipe value should be a number that equals ...
    """
    stack: list[tuple[str, Any, int]] = [(name, value, 0)]
    while stack:
        path, item, depth = stack.pop()  # depth: how many lists or tables hold ``item``
        if isinstance(item, (dict, list)) and depth >= MAX_NESTING:
            raise RecipeError(
                f"{name} nests lists or tables more than {MAX_NESTING} levels deep; a recipe "
                f"value may nest at most {MAX_NESTING} levels"
            )
        if isinstance(item, float) and math.isnan(item):
            raise RecipeError(
                f"{path} = nan: a recipe value should be a number that equals itself (NaN never "
                "does, so the saved recipe would never match on resume), but got nan"
            )
        if isinstance(item, dict):
            stack.extend((_key_path(path, k), v, depth + 1) for k, v in item.items())
        elif isinstance(item, list):
            stack.extend((f"{path}[{i}]", v, depth + 1) for i, v in enumerate(item))
        elif not isinstance(item, (str, int, float)):  # bool is an int
            raise RecipeError(
                f"{path}: a recipe value must be a string, number, boolean, list or table, but "
                f"got {_describe(item)}"
            )


def _deeply_nested_key(text: str) -> tuple[int, str] | None:
    """(line, section.key) of the first value of a TOML text that nests deeper than
    :data:`MAX_NESTING`, found by counting brackets outside strings and comments.

    Note: only for the message after tomllib gave up with a RecursionError (it does not say
    where); multi-line strings holding brackets can mislead it, and then the message names no
    key.
    """
    section, key, depth = "", "", 0
    strings = re.compile(r'"(?:[^"\\\n]|\\.)*"|\'[^\'\n]*\'|#.*')
    for number, line in enumerate(text.splitlines(), 1):
        code = strings.sub("", line)
        if depth == 0:
            header = re.fullmatch(r"\s*\[\[?\s*([^\[\]]+?)\s*\]\]?\s*", code)
            if header:
                section = header.group(1)
                continue
            assignment = re.match(r"\s*([^=\[{]+?)\s*=(.*)", code)
            if not assignment:
                continue
            key, code = assignment.groups()
        for char in code:
            depth += (char in "[{") - (char in "]}")
            if depth > MAX_NESTING:
                return number, f"{section}.{key}" if section else key
        depth = max(depth, 0)
    return None


def parse_override(text: str) -> tuple[str, str, Any]:
    """``"section.key=value"`` -> (section, key, value read as TOML, else as a string)."""
    if "=" not in text:
        raise RecipeError(f"--set expects section.key=value, but got {text!r}")
    path, raw = text.split("=", 1)
    parts = path.strip().split(".")
    if len(parts) != 2 or not all(parts):
        raise RecipeError(
            f"--set expects section.key=value (e.g. training.epochs=10), got {text!r}"
        )
    name = ".".join(parts)
    try:
        parsed: dict[str, Any] | None = tomllib.loads(f"value = {raw}")
    except tomllib.TOMLDecodeError:
        parsed = None
    except RecursionError:
        raise RecipeError(
            f"--set {name}: the value nests lists or tables far more than {MAX_NESTING} levels "
            "deep; a recipe value may nest at most that deep"
        ) from None
    if parsed is None:
        if "\n" in raw or "\r" in raw:
            raise RecipeError(
                f"--set {name}: the value spans several lines but is not one TOML value; give "
                f"one --set per key, and a string with a line break as a TOML string "
                f"(--set '{name}=\"first\\nsecond\"')"
            )
        value: Any = raw
    else:
        extra = [k for k in parsed if k != "value"]
        if extra:
            raise RecipeError(
                f"--set {name}: the value carries more than one TOML line (it also sets "
                f"{', '.join(repr(k) for k in extra)}); give one --set per key"
            )
        value = parsed["value"]
    check_values(name, value)
    return parts[0], parts[1], value


_EXAMPLES = {"data": "filial.demo:mail_room_loaders", "model": "filial.demo:mlp"}


def check_factory_spec(spec: Any, key: str) -> tuple[str, str]:
    """``(module, attribute)`` of a factory spec ``"package.module:function"``, or a
    :class:`RecipeError` that says what the spec must look like.

    >>> check_factory_spec("filial.demo:mail_room_loaders", "data.factory")
    ('filial.demo', 'mail_room_loaders')
    >>> check_factory_spec(".demo:mlp", "model.factory")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    filial.recipe.RecipeError: model.factory should be ... the module '.demo' is relative; ...
    """
    example = _EXAMPLES.get(key.split(".")[0], "package.module:function")
    shape = (
        f"{key} should be 'package.module:function' (an absolute module path, one ':', then a "
        f"function of that module, e.g. {example!r}), but got {_describe(spec)}"
    )
    if not isinstance(spec, str):
        raise RecipeError(shape)
    shape = shape.removesuffix(f" ({type(spec).__name__})")
    if spec.count(":") != 1:
        raise RecipeError(f"{shape}: it has {spec.count(':') or 'no'} ':'")
    module, attr = spec.split(":")
    if not module:
        raise RecipeError(f"{shape}: the module before ':' is empty")
    if module.startswith("."):
        raise RecipeError(
            f"{shape}: the module {module!r} is relative; name it from its top-level package"
        )
    if not attr:
        raise RecipeError(f"{shape}: the function after ':' is empty")
    for what, dotted in (("module", module), ("function", attr)):
        bad = [part for part in dotted.split(".") if not part.isidentifier()]
        if bad:
            part = f"{bad[0]!r} in" if bad[0] else "an empty part of"
            raise RecipeError(
                f"{shape}: {part} the {what} {dotted!r} is not a Python name (letters, digits "
                "and '_', not starting with a digit; parts joined by single dots)"
            )
    return module, attr


def import_factory(spec: Any, key: str) -> Callable[..., Any]:
    """Import ``"package.module:function"`` (or a dotted attribute path after the colon).

    A module that is not there is one line; a module that fails while it is imported (a
    SyntaxError, an exception at import time) is a :class:`FactoryError` with its traceback.
    """
    module_name, attr = check_factory_spec(spec, key)
    try:
        target: Any = importlib.import_module(module_name)
    except ImportError as exc:
        raise RecipeError(
            f"{key} = {spec!r}: cannot import module {module_name!r} ({exc})"
        ) from exc
    except Exception as exc:  # the user's module raised while it was imported
        raise FactoryError(key, spec, exc, importing=module_name) from exc
    for part in attr.split("."):
        if not hasattr(target, part):
            raise RecipeError(f"{key} = {spec!r}: module {module_name!r} has no {attr!r}")
        target = getattr(target, part)
    if not callable(target):
        raise RecipeError(f"{key} = {spec!r} is not callable")
    return target


T = TypeVar("T")


def call_factory(
    section: str,
    spec: str,
    factory: Callable[..., T],
    kwargs: Mapping[str, Any] | None = None,
) -> T:
    """``factory(**kwargs)`` for the recipe's ``[section]``; what it raises names the key.

    An :class:`~filial.errors.InputError` or :class:`RecipeError` (the factory refused its
    arguments, and said why) and an ImportError (a missing package) become a one-line
    :class:`RecipeError`; anything else (a bug in the factory) a :class:`FactoryError` that
    keeps the factory's traceback. KeyboardInterrupt and SystemExit pass through.

    >>> try:
    ...     call_factory("model", "mymodels:make", lambda: 1 / 0)
    ... except FactoryError as exc:
    ...     print(str(exc).splitlines()[0])
    model.factory = 'mymodels:make' raised ZeroDivisionError: division by zero
    """
    key = f"{section}.factory"
    try:
        return factory(**(kwargs or {}))
    except (InputError, RecipeError, ImportError) as exc:
        raise RecipeError(f"{key} = {spec!r}: {exc}") from exc
    except Exception as exc:
        raise FactoryError(key, spec, exc) from exc


def _check_kwargs(factory: Callable[..., Any], kwargs: dict[str, Any], section: str) -> None:
    try:
        signature = inspect.signature(factory)
    except (TypeError, ValueError):
        return  # builtins without a signature: let the call report
    try:
        signature.bind(**kwargs)
    except TypeError as exc:
        accepted = [
            p.name
            for p in signature.parameters.values()
            if p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY)
        ]
        unknown = [k for k in kwargs if k not in accepted]
        named = f"{section}.{unknown[0]}" if unknown else section
        raise RecipeError(
            f"{named}: {exc}; {section}.factory accepts {', '.join(accepted) or 'no arguments'}"
        ) from exc


@dataclass
class Recipe:
    """A resolved recipe: every section with every key, defaults filled in."""

    values: dict[str, dict[str, Any]]
    source: Path | None = None

    def __getitem__(self, section: str) -> dict[str, Any]:
        return self.values[section]

    def factory(self, section: str) -> tuple[Callable[..., Any], dict[str, Any]]:
        """The imported factory of ``data`` or ``model`` and its keyword arguments."""
        entries = dict(self.values[section])
        spec = entries.pop("factory")
        factory = import_factory(spec, f"{section}.factory")
        _check_kwargs(factory, entries, section)
        return factory, entries

    def comparable(self) -> dict[str, dict[str, Any]]:
        """The values that decide a run's results (not where it is written); keys saved under
        an old name count under the new one."""
        values = copy.deepcopy(self.values)
        _renamed(values, "saved")
        values["run"].pop("run_dir", None)
        values["training"].pop("device", None)  # where it trains; a run may move on resume
        # Each baseline's record holds its own settings: a changed one trains that baseline
        # again, the others are kept, and the lineages are not touched.
        for key in BASELINE_KEYS:
            values["run"].pop(key, None)
        # Recipes saved before the pool existed have no [pool]: its defaults compare as absent.
        defaults = {key: field.default for key, field in _SCHEMA["pool"].items()}
        if values.get("pool", defaults) == defaults:
            values.pop("pool", None)
        # Keys added later: a recipe saved before them ran with their defaults.
        for section, key in ADDED_LATER:
            values.setdefault(section, {}).setdefault(key, _SCHEMA[section][key].default)
        return values

    def baselines(self) -> dict[str, Any]:
        """The baseline settings (``run.baseline`` as a list of names), read alike from a
        resolved recipe and from one saved by earlier versions (``baseline = "matched"``)."""
        run = self.values.get("run", {})
        defaults = {key: _SCHEMA["run"][key].default for key in BASELINE_KEYS}
        found = {**defaults, **{k: run[k] for k in BASELINE_KEYS if k in run}}
        found["baseline"] = baseline_names(found["baseline"], "run.baseline")
        return found

    def to_toml(self) -> str:
        """The recipe as TOML, with the marker line that makes its folder a filial run."""
        lines = [MARKER, ""]
        for section in SECTIONS:
            lines.append(f"[{section}]")
            for key, value in self.values.get(section, {}).items():
                lines.append(f"{_toml_key(key)} = {_toml_value(value)}")
            lines.append("")
        return "\n".join(lines)


_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")


def _toml_key(key: str) -> str:
    return key if _BARE_KEY.fullmatch(key) else json.dumps(key, ensure_ascii=False)


def _toml_value(value: Any) -> str:
    """A TOML literal for a value tomllib can read back unchanged (JSON's string escapes are
    TOML basic-string escapes; dates and other types are refused, by name, in
    :func:`check_values`)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        if isinstance(value, float) and not math.isfinite(value):
            return "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf")
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        items = ", ".join(f"{_toml_key(k)} = {_toml_value(v)}" for k, v in value.items())
        return "{ " + items + " }"
    raise RecipeError(
        f"a recipe value must be a string, number, boolean, list or table, but got "
        f"{_describe(value)}"
    )


# Keys renamed since recipes were first saved: old name -> new name, by section. An old name
# is still read (a saved recipe.toml of an earlier run must still compare equal on resume).
RENAMED = {"generations": {"max": "max_generations"}}


def _renamed(raw: dict[str, Any], where: str) -> None:
    """Rename old keys in place; refuse a recipe that sets both names of one key."""
    for section, names in RENAMED.items():
        table = raw.get(section)
        if not isinstance(table, dict):
            continue
        for old, new in names.items():
            if old in table and new in table:
                raise RecipeError(
                    f"{section}.{old} is the old name of {section}.{new}, and the recipe ({where}) "
                    f"sets both; keep {section}.{new}"
                )
            if old in table:
                table[new] = table.pop(old)


def resolve(
    raw: dict[str, Any], overrides: Sequence[str] = (), source: Path | None = None
) -> Recipe:
    """Check a parsed recipe, apply ``--set`` overrides, fill defaults; return a :class:`Recipe`."""
    for section, given in raw.items():  # before anything recursive (deepcopy) touches them
        if isinstance(given, dict):
            for key, value in given.items():
                check_values(f"{section}.{key}", value)
    raw = _overridden(raw, overrides)
    unknown = [s for s in raw if s not in SECTIONS]
    if unknown:
        raise RecipeError(
            f"unknown section [{unknown[0]}]; a recipe has the sections {', '.join(SECTIONS)}"
        )
    values = {section: _section(section, raw.get(section, {})) for section in SECTIONS}
    _check_across(values, raw)
    if not values["run"]["run_dir"]:
        values["run"]["run_dir"] = os.path.join("runs", values["run"]["name"])
    recipe = Recipe(values, source)
    try:  # what is saved in the run directory must read back as the same recipe
        back = tomllib.loads(recipe.to_toml())
    except tomllib.TOMLDecodeError as exc:
        raise RecipeError(f"the recipe cannot be saved as TOML and read back ({exc})") from exc
    if back != values:
        raise RecipeError(
            "the recipe cannot be saved and read back unchanged: "
            + "; ".join(differences(values, back))
        )
    return recipe


def _overridden(raw: dict[str, Any], overrides: Sequence[str]) -> dict[str, Any]:
    """A copy of ``raw`` with old key names renamed and the ``--set`` overrides applied."""
    raw = copy.deepcopy(raw)
    _renamed(raw, "file")
    for text in overrides:
        section, key, value = parse_override(text)
        if section not in SECTIONS:
            raise RecipeError(
                f"--set {section}.{key}: unknown section {section!r} "
                f"(sections: {', '.join(SECTIONS)})"
            )
        key = RENAMED.get(section, {}).get(key, key)  # --set generations.max=3 still works
        raw.setdefault(section, {})[key] = value
    return raw


def _section(section: str, given: Any) -> dict[str, Any]:
    """One section checked: a factory section as given, the others against the schema."""
    if not isinstance(given, dict):
        raise RecipeError(f"[{section}] should be a table, but got {_describe(given)}")
    if section in _FACTORY_SECTIONS:
        if "factory" not in given:
            raise RecipeError(
                f"[{section}] needs factory = 'package.module:function'"
                + (" (e.g. 'filial.demo:mail_room_loaders')" if section == "data" else "")
            )
        return dict(given)
    schema = _SCHEMA[section]
    for key in given:
        if key not in schema:
            raise RecipeError(
                f"{section}.{key} is not a recipe key; [{section}] takes {', '.join(schema)}"
            )
    return {
        key: _check_field(f"{section}.{key}", field, given.get(key, field.default))
        for key, field in schema.items()
    }


def _check_across(values: dict[str, dict[str, Any]], raw: dict[str, Any]) -> None:
    """The checks that involve several keys."""
    training = values["training"]
    if training["optimizer"] != "sgd" and "momentum" in raw.get("training", {}):
        raise RecipeError(
            f"training.momentum applies to optimizer = 'sgd' only, but optimizer = "
            f"{training['optimizer']!r}; remove training.momentum"
        )
    if not _NAME.fullmatch(values["run"]["name"]):
        raise RecipeError(
            f"run.name should be a plain name (letters, digits, '.', '_', '-'; no path), but got "
            f"{values['run']['name']!r}: it becomes a folder under runs/. Set run.run_dir for a "
            "path."
        )


def load(path: str | os.PathLike[str], overrides: Sequence[str] = ()) -> Recipe:
    """Read and resolve the recipe file at ``path``."""
    path = Path(path)
    check_regular_file(path, "recipe file")
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise RecipeError(f"recipe file {path} cannot be read: {exc}") from exc
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RecipeError(f"{path} is not valid TOML: {exc}") from exc
    except RecursionError:
        where = _deeply_nested_key(text)
        named = f"{where[1]} (line {where[0]})" if where else "a value"
        raise RecipeError(
            f"{path}: {named} nests lists or tables far more than {MAX_NESTING} levels deep "
            "(more than the TOML reader can follow); a recipe value may nest at most "
            f"{MAX_NESTING} deep"
        ) from None
    return resolve(raw, overrides, source=path)


def check_regular_file(path: Path, what: str) -> None:
    """A :class:`RecipeError` unless ``path`` is a regular file: it says whether it is absent,
    a directory or something else (a device such as /dev/null, a pipe, a socket), without
    opening it (a pipe would block)."""
    try:
        mode = path.stat().st_mode
    except FileNotFoundError:
        raise RecipeError(f"{what} {path} does not exist") from None
    except OSError as exc:
        raise RecipeError(f"{what} {path} cannot be read: {exc}") from exc
    if stat.S_ISDIR(mode):
        raise RecipeError(f"{what} {path} is a directory; name a TOML file in it")
    if not stat.S_ISREG(mode):
        raise RecipeError(
            f"{what} {path} is not a regular file (a device, pipe or socket); name a TOML file"
        )


def differences(old: dict[str, Any], new: dict[str, Any]) -> list[str]:
    """``section.key: old -> new`` for every key whose value differs."""
    found = []
    for section in sorted(set(old) | set(new)):
        a, b = old.get(section, {}), new.get(section, {})
        for key in sorted(set(a) | set(b)):
            if a.get(key) != b.get(key):
                found.append(f"{section}.{key}: {a.get(key)!r} in the run, {b.get(key)!r} now")
    return found


def training_device(training: dict[str, Any]) -> torch.device:
    """The device ``training.device`` names; ``auto`` is CUDA when available, else the CPU."""
    import torch

    name = training["device"]
    if name == "auto":
        return torch.device("cuda" if torch.cuda.is_available() else "cpu")
    try:
        with warnings.catch_warnings():  # torch warns about some deprecated device names
            warnings.simplefilter("ignore")
            device = torch.device(name)
    except RuntimeError as exc:
        raise RecipeError(
            f"training.device = {name!r} is not a device; use auto, cpu, cuda or cuda:N"
        ) from exc
    if device.type == "meta":
        raise RecipeError(
            f"training.device = {name!r}: meta tensors have shapes but no values, so nothing "
            "can be trained on them; use auto, cpu, cuda or cuda:N"
        )
    if device.type == "cuda":
        if not torch.cuda.is_available():
            raise RecipeError(
                f"training.device = {name!r}, but this torch sees no CUDA device; use auto or cpu"
            )
        count = torch.cuda.device_count()
        if device.index is not None and device.index >= count:
            raise RecipeError(
                f"training.device = {name!r}, but this torch sees {count} CUDA device(s) "
                f"(cuda:0 to cuda:{count - 1}); use one of them, cuda or auto"
            )
    _check_trainable(device, name)
    return device


def _check_trainable(device: torch.device, name: str) -> None:
    """One tiny forward and backward pass on ``device``: the honest test that this torch has
    the device and can train on it (torch.device parses names of backends it was not built
    with, such as mps on Linux or xpu without XPU support)."""
    import torch

    try:
        weight = torch.ones(2, device=device, requires_grad=True)
        (weight * 2.0).sum().backward()
        ok = weight.grad is not None and weight.grad.device.type == device.type
    except Exception as exc:  # each backend says "not there" in its own way
        reason = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise RecipeError(
            f"training.device = {name!r}, but this torch cannot train on it ({reason}); use "
            "auto, cpu, cuda or cuda:N"
        ) from exc
    if not ok:
        raise RecipeError(f"training.device = {name!r}: a backward pass there gave no gradient")


def build_optimizer(training: dict[str, Any]) -> Callable[[Any], Any]:
    """An optimizer factory ``params -> torch.optim.Optimizer`` from ``[training]``."""
    import torch

    name, lr, decay = training["optimizer"], training["lr"], training["weight_decay"]

    def make(params: Any) -> torch.optim.Optimizer:
        if name == "sgd":
            return torch.optim.SGD(params, lr=lr, momentum=training["momentum"], weight_decay=decay)
        if name == "adam":
            return torch.optim.Adam(params, lr=lr, weight_decay=decay)
        return torch.optim.AdamW(params, lr=lr, weight_decay=decay)

    return make


def build_scheduler(training: dict[str, Any], epochs: int) -> Callable[[Any], Any] | None:
    """A scheduler factory (stepped per epoch) from ``[training]``, or None."""
    import torch

    schedule = training["schedule"]
    if schedule == "cosine":
        return lambda opt: torch.optim.lr_scheduler.CosineAnnealingLR(opt, T_max=epochs)
    if schedule == "step":
        return lambda opt: torch.optim.lr_scheduler.StepLR(
            opt, step_size=training["step_size"], gamma=training["gamma"]
        )
    return None
