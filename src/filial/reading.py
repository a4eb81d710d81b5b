"""Reading a run directory back, one schema check per file.

``filial report`` reads a run directory that may have been damaged, half deleted or edited by
hand. Each reader here checks one kind of file against what filial writes (the fields the
report uses, their types and how they relate) and returns plain data, or raises
:class:`RunFileError` naming the file and the field: the command exits 2 on it.

=====================  =========================================================
file                   reader
=====================  =========================================================
``recipe.toml``        :func:`read_saved_recipe` (the marker line, ``[run]``, ``run.seeds``)
``lineage.json``       :func:`read_state` (format, settings, every record, the decision)
``baseline.json``      :func:`read_baseline` (a record, ``epochs_matched``, its own settings)
``*.npy``              :func:`read_array` (``heldout_labels.npy``, ``genG/heldout.npy``,
                       ``baseline/NAME/heldout_epochs.npy``)
=====================  =========================================================

>>> import json, tempfile, pathlib
>>> path = pathlib.Path(tempfile.mkdtemp()) / "lineage.json"
>>> _ = path.write_text(json.dumps([]))
>>> read_state(path)  # doctest: +ELLIPSIS
Traceback (most recent call last):
...
filial.reading.RunFileError: .../lineage.json should hold a JSON object (a filial lineage file), \
but holds a list...
"""

from __future__ import annotations

import json
import math
import stat
import tomllib
from pathlib import Path, PurePosixPath
from typing import Any

import numpy as np

from .baselines import BASELINES
from .errors import InputError
from .losses import LOSS_KINDS
from .recipe import MARKER
from .rundir import STATE_FORMAT
from .stopping import STOP_REASONS

_EDITED = "the file was damaged or edited by hand"


class RunFileError(InputError):
    """A file of a run directory is missing, not a file, unreadable or not what filial wrote;
    the message names the file and the field."""


# -- files ---------------------------------------------------------------------------------------


def check_file(path: Path, hint: str = "") -> None:
    """A :class:`RunFileError` unless ``path`` is a regular file (it says what it is instead)."""
    try:
        mode = path.stat().st_mode
    except FileNotFoundError:
        raise RunFileError(f"{path} does not exist{hint}") from None
    except OSError as exc:
        raise RunFileError(f"{path} cannot be read ({exc})") from exc
    if stat.S_ISDIR(mode):
        raise RunFileError(f"{path} is a directory, not the file filial writes there")
    if not stat.S_ISREG(mode):
        raise RunFileError(f"{path} is not a regular file (a device, pipe or socket)")


def check_directory(path: Path) -> None:
    try:
        mode = path.stat().st_mode
    except FileNotFoundError:
        raise RunFileError(f"run directory {path} does not exist") from None
    except OSError as exc:
        raise RunFileError(f"run directory {path} cannot be read ({exc})") from exc
    if not stat.S_ISDIR(mode):
        raise RunFileError(f"{path} is not a directory; name a run directory")


def read_json(path: Path, hint: str = "") -> Any:
    check_file(path, hint)
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError) as exc:
        raise RunFileError(f"{path} cannot be read ({exc})") from exc
    except ValueError as exc:  # json.JSONDecodeError, or nesting past the recursion limit
        raise RunFileError(f"{path} is not valid JSON ({exc}); {_EDITED}") from exc
    except RecursionError:
        raise RunFileError(f"{path} nests too deeply to be a filial file; {_EDITED}") from None


def read_array(path: Path) -> np.ndarray:
    """A numpy array file, never unpickled; a truncated or foreign file is named."""
    check_file(path)
    try:
        array = np.load(path, allow_pickle=False)
    except (OSError, ValueError, EOFError) as exc:
        raise RunFileError(f"{path} cannot be read as a numpy array ({exc}); {_EDITED}") from exc
    if not isinstance(array, np.ndarray) or not (
        np.issubdtype(array.dtype, np.number) or array.dtype == np.bool_
    ):
        raise RunFileError(f"{path} should hold a numeric numpy array; {_EDITED}")
    return array


# -- fields --------------------------------------------------------------------------------------


def is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


_KINDS: dict[str, tuple[str, Any]] = {
    "int": ("an integer", lambda v: isinstance(v, int) and not isinstance(v, bool)),
    "number": ("a number", lambda v: isinstance(v, (int, float)) and not isinstance(v, bool)),
    "str": ("a string", lambda v: isinstance(v, str)),
    "bool": ("true or false", lambda v: isinstance(v, bool)),
    "dict": ("an object", lambda v: isinstance(v, dict)),
    "list": ("a list", lambda v: isinstance(v, list)),
    "null": ("null", lambda v: v is None),
}


def _shown(value: Any) -> str:
    text = json.dumps(value) if not isinstance(value, float) or math.isfinite(value) else str(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _json_type(value: Any) -> str:
    names = {dict: "an object", list: "a list", str: "a string", bool: "a boolean"}
    for kind, name in names.items():
        if isinstance(value, kind):
            return name
    return "null" if value is None else "a number"


class _Checker:
    """Field checks on one JSON object of one file; every message names ``path`` and the
    field's place (``records[2].seconds``)."""

    def __init__(self, path: Path, data: Any, where: str = "") -> None:
        self.path, self.where = path, where
        if not isinstance(data, dict):
            place = f"{where.rstrip('.')} " if where else ""
            raise RunFileError(
                f"{path}: {place}should be a JSON object, but is {_json_type(data)}; {_EDITED}"
            )
        self.data = data

    def fail(self, key: str, should: str, value: Any) -> RunFileError:
        return RunFileError(
            f"{self.path}: {self.where}{key} should be {should}, but got {_shown(value)}; {_EDITED}"
        )

    def get(self, key: str, *kinds: str, required: bool = True, default: Any = None) -> Any:
        if key not in self.data:
            if required:
                should = " or ".join(_KINDS[k][0] for k in kinds)
                raise RunFileError(
                    f"{self.path}: {self.where}{key} is missing (it should be {should}); {_EDITED}"
                )
            return default
        value = self.data[key]
        if not any(_KINDS[k][1](value) for k in kinds):
            raise self.fail(key, " or ".join(_KINDS[k][0] for k in kinds), value)
        return value


# -- the files of a run --------------------------------------------------------------------------

_SCORES = ("heldout", "test", "train", "ensemble", "agreement")


def check_record(path: Path, record: Any, where: str, generation: int) -> dict[str, Any]:
    """One generation's record (in ``lineage.json``, or a baseline's ``baseline.json``)."""
    fields = _Checker(path, record, where)
    number = fields.get("generation", "int")
    if number != generation:
        raise fields.fail("generation", f"{generation} (its place in the list)", number)
    for key in _SCORES:
        fields.get(key, "number", "null")
    for key in ("target_entropy", "output_norm"):
        fields.get(key, "number", "null", required=False)
    fields.get("diverged", "bool", required=False)
    seconds = fields.get("seconds", "number")
    if not (math.isfinite(seconds) and seconds >= 0):
        raise fields.fail("seconds", "a finite number >= 0", seconds)
    checkpoint = fields.get("checkpoint", "str")
    parts = PurePosixPath(checkpoint).parts
    if not parts or PurePosixPath(checkpoint).is_absolute() or ".." in parts:
        raise fields.fail("checkpoint", "a path inside the lineage folder", checkpoint)
    fields.get("epochs", "list", required=False)
    fields.get("stop", "dict", "null", required=False)
    return record


def read_state(path: Path, hint: str = "") -> dict[str, Any]:
    """``lineage.json``: format, settings the report uses, every record, the decision."""
    state = read_json(path, hint)
    if not isinstance(state, dict):
        raise RunFileError(
            f"{path} should hold a JSON object (a filial lineage file), but holds "
            f"{_json_type(state)}; {_EDITED}"
        )
    top = _Checker(path, state)
    if state.get("format") != STATE_FORMAT:
        raise top.fail("format", repr(STATE_FORMAT), state.get("format"))
    settings = _Checker(path, top.get("settings", "dict"), "settings.")
    targets = settings.get("targets", "str")
    if targets not in LOSS_KINDS:
        raise settings.fail("targets", " or ".join(repr(k) for k in LOSS_KINDS), targets)
    settings.get("metric", "str")
    seed = settings.get("seed", "int")
    if seed < 0:
        raise settings.fail("seed", "an integer >= 0", seed)
    records = top.get("records", "list")
    for i, record in enumerate(records):
        check_record(path, record, f"records[{i}].", i)
    decision = top.get("decision", "dict", "null", required=False)
    if decision is not None:
        _check_decision(path, decision, records)
    return state


def _check_decision(path: Path, decision: dict[str, Any], records: list[Any]) -> None:
    fields = _Checker(path, decision, "decision.")
    fields.get("stop", "bool")
    reason = fields.get("reason", "str", "null")
    if reason is not None and reason not in STOP_REASONS:
        raise fields.fail("reason", " or ".join(repr(r) for r in STOP_REASONS), reason)
    best = fields.get("best", "int", "null")
    if best is not None:
        if not 0 <= best < len(records):
            span = f"0..{len(records) - 1}" if records else "null (there are no records)"
            raise fields.fail("best", f"a finished generation, {span}", best)
        if records[best].get("diverged"):
            raise fields.fail("best", "a generation that did not diverge", best)
    fields.get("detail", "dict", "null", required=False)


def read_baseline(path: Path, name: str | None = None) -> dict[str, Any]:
    """A baseline's ``baseline.json`` (``RUN/baseline/NAME/``, or the matched baseline of the
    earlier layout, ``RUN/baseline/``): a record, its epoch count and its own settings.
    ``name``: the folder's name, which the record must carry."""
    record = check_record(path, read_json(path), "", 0)
    fields = _Checker(path, record)
    matched = fields.get("epochs_matched", "int")
    if matched < 1:
        raise fields.fail("epochs_matched", "an integer >= 1", matched)
    found = fields.get("name", "str", required=False)
    if name is not None and found != name:
        raise fields.fail("name", f"{name!r} (the name of its folder)", found)
    if found is not None and found not in BASELINES:
        raise fields.fail("name", " or ".join(repr(n) for n in BASELINES), found)
    every = fields.get("every", "int", required=False, default=1)
    if every < 1:
        raise fields.fail("every", "an integer >= 1", every)
    smoothing = fields.get("label_smoothing", "number", required=False, default=0.0)
    if not 0 <= smoothing < 1:
        raise fields.fail("label_smoothing", "a number in [0, 1)", smoothing)
    best = fields.get("best_epoch", "int", "null", required=False)
    if best is not None and not 0 <= best < matched:
        raise fields.fail("best_epoch", f"an epoch 0..{matched - 1}", best)
    evaluated = fields.get("evaluated", "list", required=False, default=[])
    if not all(is_int(e) and 0 <= e < matched for e in evaluated):
        raise fields.fail("evaluated", f"a list of epochs 0..{matched - 1}", evaluated)
    scores = fields.get("heldout_epochs", "str", "null", required=False)
    if scores is not None:
        parts = PurePosixPath(scores).parts
        if not parts or PurePosixPath(scores).is_absolute() or ".." in parts:
            raise fields.fail("heldout_epochs", "a path inside the lineage folder", scores)
    return record


def read_saved_recipe(path: Path) -> dict[str, Any]:
    """``recipe.toml`` as saved by ``filial run``: the marker line and the seeds."""
    check_file(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise RunFileError(f"{path} cannot be read ({exc})") from exc
    if text.split("\n", 1)[0].rstrip("\r") != MARKER:
        raise RunFileError(
            f"{path} was not written by filial run (its first line is not {MARKER!r}), so "
            f"{path.parent} is not a filial run directory"
        )
    try:
        recipe = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RunFileError(f"{path} is not valid TOML ({exc}); {_EDITED}") from exc
    except RecursionError:
        raise RunFileError(f"{path} nests too deeply to be a filial recipe; {_EDITED}") from None
    run = recipe.get("run")
    if not isinstance(run, dict):
        raise RunFileError(
            f"{path}: [run] should be a table, but is {_shown(run) if run else 'missing'}; "
            f"{_EDITED}"
        )
    seeds = run.get("seeds")
    if (
        not isinstance(seeds, list)
        or not seeds
        or not all(isinstance(s, int) and not isinstance(s, bool) and s >= 0 for s in seeds)
        or len(set(seeds)) != len(seeds)
    ):
        raise RunFileError(
            f"{path}: run.seeds should be a non-empty list of distinct integers >= 0, but got "
            f"{seeds!r}; {_EDITED}"
        )
    return recipe
