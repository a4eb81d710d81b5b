"""TOML recipes: a whole experiment as data, read with the standard library's ``tomllib``.

A recipe has five sections. ``[data]`` and ``[model]`` name a factory ``"package.module:function"``;
their other keys become its keyword arguments, so a user's own data or model plugs in without
editing filial. The data factory returns ``(train, heldout)`` or ``(train, heldout, test)``
DataLoaders (or a dict with those keys); the model factory returns a fresh ``nn.Module`` per call.

.. code-block:: toml

    [run]
    name = "digits-ce"
    seeds = [0, 1, 2]
    baseline = "matched"          # also train one model on the labels for as many epochs

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
    max = 6

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
import tomllib
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .losses import LOSS_KINDS
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


@dataclass(frozen=True)
class Field:
    kind: str  # "int", "float", "str", "bool", "seeds", or "choice"
    default: Any
    choices: tuple[str, ...] = ()
    minimum: float | None = None
    help: str = ""


_SCHEMA: dict[str, dict[str, Field]] = {
    "run": {
        "name": Field("str", "filial"),
        "run_dir": Field("str", ""),
        "seeds": Field("seeds", [0]),
        "baseline": Field("choice", "none", ("none", "matched")),
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
        "max": Field("int", 6, minimum=0),
        "patience": Field("int", 2, minimum=1),
        "min_gain": Field("float", 0.0, minimum=0.0),
        "views": Field("int", 1, minimum=1),
        "store_dtype": Field("choice", "float16", STORE_DTYPES),
        "top_k": Field("int", 0, minimum=0, help="0: every output; k: the k largest (ce only)"),
        "teacher": Field("choice", "cached", ("cached", "online")),
    },
}
_FACTORY_SECTIONS = ("data", "model")
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")
SECTIONS = ("run", "data", "model", "training", "generations")


def _describe(value: Any) -> str:
    return f"{value!r} ({type(value).__name__})"


def _check_field(name: str, field: Field, value: Any) -> Any:
    if field.kind == "int":
        if not isinstance(value, int) or isinstance(value, bool):
            raise RecipeError(f"{name} should be an integer, but got {_describe(value)}")
    elif field.kind == "float":
        if not isinstance(value, (int, float)) or isinstance(value, bool):
            raise RecipeError(f"{name} should be a number, but got {_describe(value)}")
        if not math.isfinite(value):
            raise RecipeError(f"{name} should be a finite number, but got {value!r}")
        value = float(value)
    elif field.kind == "str":
        if not isinstance(value, str):
            raise RecipeError(f"{name} should be a string, but got {_describe(value)}")
    elif field.kind == "choice":
        if value not in field.choices:
            options = ", ".join(repr(c) for c in field.choices)
            raise RecipeError(f"{name} should be one of {options}, but got {_describe(value)}")
    elif field.kind == "seeds":
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
    if field.minimum is not None and isinstance(value, (int, float)) and value < field.minimum:
        raise RecipeError(f"{name} should be >= {field.minimum:g}, but got {value!r}")
    return value


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
    try:
        value = tomllib.loads(f"value = {raw}")["value"]
    except tomllib.TOMLDecodeError:
        value = raw
    return parts[0], parts[1], value


def import_factory(spec: Any, key: str) -> Callable[..., Any]:
    """Import ``"package.module:function"`` (or a dotted attribute path after the colon)."""
    if not isinstance(spec, str) or spec.count(":") != 1:
        raise RecipeError(f"{key} should be 'package.module:function', but got {_describe(spec)}")
    module_name, attr = spec.split(":")
    try:
        target: Any = importlib.import_module(module_name)
    except ImportError as exc:
        raise RecipeError(
            f"{key} = {spec!r}: cannot import module {module_name!r} ({exc})"
        ) from exc
    for part in attr.split("."):
        if not hasattr(target, part):
            raise RecipeError(f"{key} = {spec!r}: module {module_name!r} has no {attr!r}")
        target = getattr(target, part)
    if not callable(target):
        raise RecipeError(f"{key} = {spec!r} is not callable")
    return target


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
        """The values that decide a run's results (not where it is written)."""
        values = copy.deepcopy(self.values)
        values["run"].pop("run_dir", None)
        values["training"].pop("device", None)  # where it trains; a run may move on resume
        return values

    def to_toml(self) -> str:
        """The recipe as TOML, with the marker line that makes its folder a filial run."""
        lines = [MARKER, ""]
        for section in SECTIONS:
            lines.append(f"[{section}]")
            for key, value in self.values[section].items():
                lines.append(f"{_toml_key(key)} = {_toml_value(value)}")
            lines.append("")
        return "\n".join(lines)


_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")


def _toml_key(key: str) -> str:
    return key if _BARE_KEY.fullmatch(key) else json.dumps(key, ensure_ascii=False)


def _toml_value(value: Any) -> str:
    """A TOML literal for a value tomllib can read back unchanged (JSON's string escapes are
    TOML basic-string escapes; dates and other types are refused)."""
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


def resolve(
    raw: dict[str, Any], overrides: Sequence[str] = (), source: Path | None = None
) -> Recipe:
    """Check a parsed recipe, apply ``--set`` overrides, fill defaults; return a :class:`Recipe`."""
    raw = copy.deepcopy(raw)
    for text in overrides:
        section, key, value = parse_override(text)
        if section not in SECTIONS:
            raise RecipeError(
                f"--set {section}.{key}: unknown section {section!r} "
                f"(sections: {', '.join(SECTIONS)})"
            )
        raw.setdefault(section, {})[key] = value
    unknown = [s for s in raw if s not in SECTIONS]
    if unknown:
        raise RecipeError(
            f"unknown section [{unknown[0]}]; a recipe has the sections {', '.join(SECTIONS)}"
        )
    values: dict[str, dict[str, Any]] = {}
    for section in SECTIONS:
        given = raw.get(section, {})
        if not isinstance(given, dict):
            raise RecipeError(f"[{section}] should be a table, but got {_describe(given)}")
        if section in _FACTORY_SECTIONS:
            if "factory" not in given:
                raise RecipeError(
                    f"[{section}] needs factory = 'package.module:function'"
                    + (" (e.g. 'filial.demo:mail_room_loaders')" if section == "data" else "")
                )
            values[section] = dict(given)
            continue
        schema = _SCHEMA[section]
        for key in given:
            if key not in schema:
                raise RecipeError(
                    f"{section}.{key} is not a recipe key; [{section}] takes {', '.join(schema)}"
                )
        values[section] = {
            key: _check_field(f"{section}.{key}", field, given.get(key, field.default))
            for key, field in schema.items()
        }
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
    if not values["run"]["run_dir"]:
        values["run"]["run_dir"] = os.path.join("runs", values["run"]["name"])
    recipe = Recipe(values, source)
    try:  # what is saved in the run directory must read back as the same recipe
        same = tomllib.loads(recipe.to_toml()) == values
    except tomllib.TOMLDecodeError:
        same = False
    if not same:
        raise RecipeError("the recipe cannot be saved and read back unchanged")
    return recipe


def load(path: str | os.PathLike[str], overrides: Sequence[str] = ()) -> Recipe:
    """Read and resolve the recipe file at ``path``."""
    path = Path(path)
    if not path.is_file():
        raise RecipeError(f"recipe file {path} does not exist")
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise RecipeError(f"{path} is not valid TOML: {exc}") from exc
    except (OSError, UnicodeDecodeError) as exc:
        raise RecipeError(f"{path} cannot be read: {exc}") from exc
    return resolve(raw, overrides, source=path)


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
        device = torch.device(name)
    except RuntimeError as exc:
        raise RecipeError(
            f"training.device = {name!r} is not a device; use auto, cpu, cuda or cuda:N"
        ) from exc
    if device.type == "cuda" and not torch.cuda.is_available():
        raise RecipeError(
            f"training.device = {name!r}, but this torch sees no CUDA device; use auto or cpu"
        )
    return device


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
