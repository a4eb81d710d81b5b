"""The holes a fuzzing campaign found (issue 17), each kind of case as a parametrised test.

Groups: recipe parsing, user factories that raise, the shipped factories' own arguments,
training devices, store sizes, ``filial report`` on damaged run directories, metrics that return
NaN. Every refused case must exit 2 with a ``filial:`` line that names the key or file, and
write nothing. The case counts per group are in the fault table's notes.
"""

from __future__ import annotations

import json
import os
import sys
import tomllib
from pathlib import Path

import pytest

from filial import cli
from filial.recipe import (
    MAX_NESTING,
    FactoryError,
    RecipeError,
    call_factory,
    check_factory_spec,
    parse_override,
    resolve,
)

RECIPE = """
[run]
name = "fuzz"
seeds = [0]

[data]
factory = "filial.demo:mail_room_loaders"
train_size = 300
heldout_size = 150

[model]
factory = "filial.demo:mlp"
hidden = [32]

[training]
epochs = 1
lr = 0.1

[generations]
max = 1
"""


@pytest.fixture
def recipe(tmp_path):
    path = tmp_path / "recipe.toml"
    path.write_text(RECIPE)
    return path


def _refused(capsys, tmp_path, recipe_path, *overrides: str) -> str:
    """Run ``filial run`` in this process; it must exit 2 and leave no run directory. Returns
    stderr, which must hold one ``filial:`` line."""
    run_dir = tmp_path / "run"
    argv = ["run", str(recipe_path), "--run-dir", str(run_dir)]
    for text in overrides:
        argv += ["--set", text]
    code = cli.main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.startswith("filial: "), err
    assert not run_dir.exists()
    return err


def _nested(depth: int, open_: str = "[", close: str = "]") -> str:
    return open_ * depth + close * depth


def _tables(depth: int) -> str:
    """``{ a = { a = ... { } ... } }``: ``depth`` nested inline tables."""
    return "{ a = " * (depth - 1) + "{ }" + " }" * (depth - 1)


# -- 1. recipe parsing ---------------------------------------------------------------------------

DEPTHS = [MAX_NESTING + 1, 100, 300, 499, 500, 2000]


@pytest.mark.parametrize("depth", DEPTHS)
@pytest.mark.parametrize("kind", ["lists", "tables"])
@pytest.mark.parametrize("where", ["--set", "file"])
def test_deeply_nested_values_are_refused_by_key(tmp_path, capsys, recipe, depth, kind, where):
    """Python's tomllib gives up near 500 nested lists with a RecursionError; copying and
    comparing a recipe recurse too. Any depth past MAX_NESTING is refused by key instead."""
    value = _nested(depth) if kind == "lists" else _tables(depth)
    if where == "--set":
        err = _refused(capsys, tmp_path, recipe, f"model.hidden={value}")
    else:
        recipe.write_text(RECIPE.replace("hidden = [32]", f"hidden = {value}"))
        err = _refused(capsys, tmp_path, recipe)
    assert "model.hidden" in err and f"{MAX_NESTING} levels" in err
    assert "RecursionError" not in err and "Traceback" not in err


def test_nesting_up_to_the_limit_is_kept_and_saved(recipe):
    deep = tomllib.loads(f"v = {_nested(MAX_NESTING)}")["v"]
    resolved = resolve(tomllib.loads(RECIPE), [f"data.options={_nested(MAX_NESTING)}"])
    assert resolved["data"]["options"] == deep
    assert tomllib.loads(resolved.to_toml()) == resolved.values
    # Dotted keys nest tables too.
    dotted = ".".join(["a"] * (MAX_NESTING + 2)) + " = 1"
    with pytest.raises(RecipeError, match="data.a nests lists or tables"):
        resolve(tomllib.loads(RECIPE.replace("train_size = 300", f"train_size = 300\n{dotted}")))


MULTI_LINE = [
    ('run.name="x"\nepochs = 3', "it also sets 'epochs'"),
    ("training.epochs=3\n[run]\nname = 'y'", "it also sets 'run'"),
    ("data.noise=0.3\nx.y = 1", "it also sets 'x'"),
    ("run.name=x\ny", "spans several lines"),
    ("run.name=x\r\nepochs = 3", "spans several lines"),
    ("data.note=a\nb = [", "spans several lines"),
]


@pytest.mark.parametrize("override, words", MULTI_LINE)
def test_an_override_carrying_more_than_one_line_is_refused(
    tmp_path, capsys, recipe, override, words
):
    err = _refused(capsys, tmp_path, recipe, override)
    key = override.split("=", 1)[0]
    assert f"--set {key}" in err and words in err and "one --set per key" in err


def test_one_toml_value_over_several_lines_is_still_one_value():
    assert parse_override("model.hidden=[32,\n16]") == ("model", "hidden", [32, 16])
    assert parse_override('data.note="a\\nb"') == ("data", "note", "a\nb")
    assert parse_override('data.note="""a\nb"""') == ("data", "note", "a\nb")


NANS = [
    (["data.noise=nan"], "data.noise = nan"),
    (["data.noise=-nan"], "data.noise = nan"),
    (["data.options=[1.0, nan]"], "data.options[1] = nan"),
    (["data.options={a = {b = nan}}"], "data.options.a.b = nan"),
    (["model.scale=nan"], "model.scale = nan"),
]


@pytest.mark.parametrize("overrides, words", NANS)
def test_nan_in_a_recipe_is_refused_naming_the_key(tmp_path, capsys, recipe, overrides, words):
    """NaN never equals itself, so a recipe holding one could never be resumed."""
    err = _refused(capsys, tmp_path, recipe, *overrides)
    assert words in err and "resume" in err
    assert "cannot be saved and read back" not in err


def test_nan_in_the_file_and_in_schema_keys(tmp_path, capsys, recipe):
    recipe.write_text(RECIPE.replace("train_size = 300", "train_size = 300\nnoise = nan"))
    assert "data.noise = nan" in _refused(capsys, tmp_path, recipe)
    recipe.write_text(RECIPE)
    for key in ("generations.temperature", "training.lr"):
        for value in ("nan", "inf", "-inf"):
            err = _refused(capsys, tmp_path, recipe, f"{key}={value}")
            words = f"{key} = nan" if value == "nan" else f"{key} should be a finite number"
            assert words in err
    resolved = resolve(tomllib.loads(RECIPE), ["data.options=[inf, -inf]"])
    assert tomllib.loads(resolved.to_toml()) == resolved.values  # infinities read back equal


def test_dates_are_refused_naming_the_key(tmp_path, capsys, recipe):
    for value in ("1979-05-27", "07:32:00", "1979-05-27T07:32:00Z", "[1979-05-27]"):
        err = _refused(capsys, tmp_path, recipe, f"data.when={value}")
        assert "data.when" in err and "a recipe value must be a string, number" in err


SPECS = [
    (":", "the module before ':' is empty"),
    (":mail_room_loaders", "the module before ':' is empty"),
    (".demo:mail_room_loaders", "the module '.demo' is relative"),
    ("..filial.demo:mail_room_loaders", "is relative"),
    ("filial.demo:", "the function after ':' is empty"),
    ("a.b:", "the function after ':' is empty"),
    ("filial.demo", "it has no ':'"),
    ("filial.demo:x:y", "it has 2 ':'"),
    ("my-pkg:loaders", "'my-pkg' in the module"),
    ("filial..demo:mail_room_loaders", "an empty part of the module"),
    ("filial.demo:mail_room_loaders.", "an empty part of the function"),
    ("1st:loaders", "'1st' in the module"),
    (" filial.demo:mail_room_loaders", "' filial' in the module"),
    ("filial.demo:mail room", "'mail room' in the function"),
    ("", "it has no ':'"),
]


@pytest.mark.parametrize("spec, words", SPECS)
def test_malformed_factory_specs_say_what_a_spec_looks_like(tmp_path, capsys, recipe, spec, words):
    err = _refused(capsys, tmp_path, recipe, f"data.factory={json.dumps(spec)}")
    assert "data.factory should be 'package.module:function'" in err
    assert "e.g. 'filial.demo:mail_room_loaders'" in err and words in err


@pytest.mark.parametrize("value", ["5", "true", "[]", "{}", '["filial.demo:mlp"]'])
def test_factory_specs_that_are_not_strings(tmp_path, capsys, recipe, value):
    err = _refused(capsys, tmp_path, recipe, f"model.factory={value}")
    assert "model.factory should be 'package.module:function'" in err
    assert "e.g. 'filial.demo:mlp'" in err


def test_a_good_spec_splits_into_module_and_function():
    assert check_factory_spec("filial.vision:cifar_resnet", "model.factory") == (
        "filial.vision",
        "cifar_resnet",
    )
    assert check_factory_spec("pkg.mod:Factory.build", "model.factory") == (
        "pkg.mod",
        "Factory.build",
    )


def _not_a_file(tmp_path: Path, kind: str) -> tuple[Path, str]:
    if kind == "directory":
        folder = tmp_path / "recipes.toml"
        folder.mkdir()
        return folder, "is a directory"
    if kind == "link to a directory":
        (tmp_path / "folder").mkdir()
        (tmp_path / "link.toml").symlink_to(tmp_path / "folder")
        return tmp_path / "link.toml", "is a directory"
    if kind == "/dev/null":
        return Path(os.devnull), "is not a regular file"
    if kind == "named pipe":  # opening it would block: it must be refused without opening
        os.mkfifo(tmp_path / "pipe.toml")
        return tmp_path / "pipe.toml", "is not a regular file"
    if kind == "missing":
        return tmp_path / "absent.toml", "does not exist"
    if kind == "dangling link":
        (tmp_path / "gone.toml").symlink_to(tmp_path / "nowhere.toml")
        return tmp_path / "gone.toml", "does not exist"
    if kind == "not UTF-8":
        (tmp_path / "latin.toml").write_bytes(b'[run]\nname = "caf\xe9"\n')
        return tmp_path / "latin.toml", "cannot be read"
    raise AssertionError(kind)


@pytest.mark.parametrize(
    "kind",
    [
        "directory",
        "link to a directory",
        "/dev/null",
        "named pipe",
        "missing",
        "dangling link",
        "not UTF-8",
    ],
)
def test_a_recipe_path_that_is_not_a_toml_file_is_named_for_what_it_is(tmp_path, capsys, kind):
    path, words = _not_a_file(tmp_path, kind)
    err = _refused(capsys, tmp_path, path)
    assert f"recipe file {path} {words}" in err


# -- 2. user factories that raise ----------------------------------------------------------------

FACTORY_MODULE = """
import torch
from torch import nn

def runtime_error(**kwargs):
    raise RuntimeError("the loader broke")

def zero_division(**kwargs):
    return 1 / 0

def attribute_error(**kwargs):
    return None.shape

def key_error(**kwargs):
    return {{}}["missing"]

def value_error(**kwargs):
    return int("not a number")

def recursion(**kwargs):
    return recursion()

def deep_inside(**kwargs):
    return _helper()

def _helper():
    raise LookupError("raised two frames down")
"""
KINDS = {
    "runtime_error": ("RuntimeError: the loader broke", 'raise RuntimeError("the loader broke")'),
    "zero_division": ("ZeroDivisionError: division by zero", "return 1 / 0"),
    "attribute_error": ("AttributeError: 'NoneType' object has no attribute", "None.shape"),
    "key_error": ("KeyError: 'missing'", '["missing"]'),
    "value_error": ("ValueError: invalid literal for int()", 'int("not a number")'),
    "recursion": ("RecursionError: maximum recursion depth", "return recursion()"),
    "deep_inside": ("LookupError: raised two frames down", "return _helper()"),
}


@pytest.fixture
def user_modules(tmp_path, monkeypatch):
    """Write modules into a folder on sys.path under names unique to this test, and forget
    them afterwards (so a module that failed to import is imported afresh next time)."""
    folder = tmp_path / "user_code"
    folder.mkdir()
    monkeypatch.syspath_prepend(str(folder))
    stem = f"fuzz_{abs(hash(str(tmp_path))) % 10**8}"
    written: list[str] = []

    def write(suffix: str, text: str) -> str:
        name = f"{stem}_{suffix}"
        (folder / f"{name}.py").write_text(text)
        written.append(name)
        return name

    yield write
    for name in written:
        sys.modules.pop(name, None)


def _check_user_traceback(err: str, key: str, spec: str, head: str, line: str, path: str):
    first = err.splitlines()[0]
    assert first.startswith(f"filial: {key} = {spec!r}"), err
    assert head.split(":")[0] in first
    assert "The factory's traceback:" in err
    assert path in err and line in err and head in err  # the user's frame and error are there
    assert "filial/cli.py" not in err and "importlib" not in err  # no frames of ours


@pytest.mark.parametrize("function", list(KINDS))
@pytest.mark.parametrize("section", ["data", "model"])
def test_a_factory_that_raises_keeps_its_traceback_under_a_filial_line(
    tmp_path, capsys, recipe, user_modules, function, section
):
    module = user_modules("factories", FACTORY_MODULE.format())
    spec = f"{module}:{function}"
    overrides = [f"{section}.factory={json.dumps(spec)}"]
    if section == "model":
        recipe.write_text(RECIPE.replace("hidden = [32]\n", ""))
    else:
        recipe.write_text(RECIPE.replace("train_size = 300\nheldout_size = 150\n", ""))
    err = _refused(capsys, tmp_path, recipe, *overrides)
    head, line = KINDS[function]
    _check_user_traceback(err, f"{section}.factory", spec, head, line, f"{module}.py")


IMPORT_FAILURES = {
    "syntax error": ("def loaders(:\n    pass\n", "SyntaxError", "def loaders(:"),
    "raises on import": (
        "raise RuntimeError('refuses to load')\n",
        "RuntimeError: refuses to load",
        "raise RuntimeError",
    ),
    "bad indentation": ("def loaders():\nreturn 1\n", "IndentationError", "return 1"),
    "error in a module it imports": ("import {other}\n", "ZeroDivisionError", "1 / 0"),
}


@pytest.mark.parametrize("kind", list(IMPORT_FAILURES))
def test_a_factory_module_that_fails_to_import_keeps_its_traceback(
    tmp_path, capsys, recipe, user_modules, kind
):
    text, head, line = IMPORT_FAILURES[kind]
    other = user_modules("helper", "x = 1 / 0\n")
    module = user_modules("broken", text.format(other=other))
    spec = f"{module}:loaders"
    err = _refused(capsys, tmp_path, recipe, f"data.factory={json.dumps(spec)}")
    _check_user_traceback(err, "data.factory", spec, head, line, ".py")
    assert f"importing module {module!r}" in err.splitlines()[0]


def test_missing_modules_and_refused_arguments_are_one_line(tmp_path, capsys, recipe, user_modules):
    missing = user_modules("needs", "import fuzz_no_such_dependency\n")
    for spec, words in [
        ("fuzz_no_such_module:loaders", "cannot import module 'fuzz_no_such_module'"),
        (f"{missing}:loaders", "No module named 'fuzz_no_such_dependency'"),
    ]:
        err = _refused(capsys, tmp_path, recipe, f"data.factory={json.dumps(spec)}")
        assert words in err and "Traceback" not in err


def test_call_factory_passes_interrupts_through_and_names_the_section():
    def interrupted():
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        call_factory("data", "m:f", interrupted)
    with pytest.raises(FactoryError) as info:
        call_factory("model", "m:f", lambda width: [][width], {"width": 3})
    assert info.value.key == "model.factory" and isinstance(info.value.error, IndexError)
    assert "lambda width: [][width]" in info.value.user_traceback
    assert call_factory("model", "m:f", lambda width: width * 2, {"width": 3}) == 6
