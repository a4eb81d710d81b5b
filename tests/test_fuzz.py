"""The holes a fuzzing campaign found (issue 17), each kind of case as a parametrised test.

Groups: recipe parsing, user factories that raise, the shipped factories' own arguments,
training devices, store sizes, ``filial report`` on damaged run directories, metrics that return
NaN. Every refused case must exit 2 with a ``filial:`` line that names the key or file, and
write nothing. The case counts per group are in the fault table's notes.
"""

from __future__ import annotations

import json
import math
import os
import re
import shutil
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest
import torch

from filial import cli
from filial.errors import InputError
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


# -- 3. the shipped factories check their own arguments -----------------------------------------

HIDDEN = [
    ([-1], "model.hidden[0] should be an integer >= 1"),
    ([0], "model.hidden[0] should be an integer >= 1"),
    ([32, 0], "model.hidden[1] should be an integer >= 1"),
    ([32.0], "model.hidden[0] should be an integer >= 1"),
    ([1.5], "model.hidden[0] should be an integer >= 1"),
    (["32"], "model.hidden[0] should be an integer >= 1"),
    ([True], "model.hidden[0] should be an integer >= 1"),
    ([[32]], "model.hidden[0] should be an integer >= 1"),
    (32, "model.hidden should be a list of integers >= 1 (e.g. [32])"),
    ("32", "model.hidden should be a list of integers >= 1"),
    ({}, "model.hidden should be a list of integers >= 1"),
    (None, "model.hidden should be a list of integers >= 1"),
    ([1_000_000_000_000], "would have 75,000,000,000,010 parameters"),
    ([100_000, 100_000], "would have 10,007,600,010 parameters"),
    ([1] * 1001, "model.hidden should list at most 1,000 values"),
]


@pytest.mark.parametrize("hidden, words", HIDDEN)
def test_mlp_widths_are_checked_before_anything_is_allocated(hidden, words):
    from filial import demo

    with pytest.raises(InputError, match=re.escape(words)):
        demo.mlp(hidden=hidden)
    plain = words.replace("model.", "")
    with pytest.raises(InputError, match=re.escape(plain)):
        demo.MLP(hidden=hidden)


@pytest.mark.parametrize(
    "inputs, words",
    [
        (0, "model.inputs should be an integer >= 1"),
        (-1, "model.inputs should be an integer >= 1"),
        (64.0, "model.inputs should be an integer >= 1"),
        (True, "model.inputs should be an integer >= 1"),
        (10**12, "an MLP 1000000000000 -> 32 -> 10 would have"),
    ],
)
def test_mlp_inputs_are_checked(inputs, words):
    from filial import demo

    with pytest.raises(InputError, match=re.escape(words)):
        demo.mlp(hidden=[32], inputs=inputs)


def test_the_parameter_bound_is_exact_and_numpy_integers_are_welcome():
    from filial import demo
    from filial._checks import MAX_PARAMETERS

    # 64 -> w -> 10 has 65 w + 10 (w + 1) parameters (weights and biases of two nn.Linear).
    widest = (MAX_PARAMETERS - 10) // 75
    demo.MLP(hidden=[widest])  # checked only: the factory builds nothing until called
    with pytest.raises(InputError, match="parameters"):
        demo.MLP(hidden=[widest + 1])
    model = demo.mlp(hidden=[np.int64(8), np.int32(4)])
    shapes = [(8, 64), (8,), (4, 8), (4,), (10, 4), (10,)]
    assert [tuple(p.shape) for p in model.parameters()] == shapes
    assert sum(p.numel() for p in model.parameters()) == 65 * 8 + 9 * 4 + 5 * 10
    assert demo.mlp(hidden=[]).__len__() == 1  # no hidden layer: one linear map


@pytest.mark.parametrize(
    "channels, words",
    [
        ([16], "model.channels should be a list of 2 integers in 1..4,096"),
        ([16, 32, 64], "model.channels should be a list of 2 integers"),
        ([0, 32], "model.channels[0] should be an integer in 1..4,096"),
        ([16, 4097], "model.channels[1] should be an integer in 1..4,096"),
        ([16.0, 32], "model.channels[0] should be an integer"),
        (16, "model.channels should be a list of 2 integers"),
    ],
)
def test_cnn_channels_are_checked(channels, words):
    from filial import demo

    with pytest.raises(InputError, match=re.escape(words)):
        demo.cnn(channels=channels)
    with pytest.raises(InputError, match=re.escape(words.replace("model.", ""))):
        demo.CNN(channels=channels)


ROOM = [
    ("noise", -0.1, "data.noise should be a number in [0, 1)"),
    ("noise", 1.0, "data.noise should be a number in [0, 1)"),
    ("noise", math.inf, "data.noise should be a number in [0, 1)"),
    ("noise", "0.3", "data.noise should be a number in [0, 1)"),
    ("noise", True, "data.noise should be a number in [0, 1)"),
    ("split_seed", -1, "data.split_seed should be an integer in 0..18,446,744,073,709,551,615"),
    ("split_seed", 2**64, "data.split_seed should be an integer in 0.."),
    ("split_seed", 1.5, "data.split_seed should be an integer"),
    ("batch_size", 0, "data.batch_size should be an integer in 1..1,797"),
    ("batch_size", -1, "data.batch_size should be an integer in 1..1,797"),
    ("batch_size", 1798, "data.batch_size should be an integer in 1..1,797"),
    ("batch_size", 10**12, "data.batch_size should be an integer in 1..1,797"),
    ("batch_size", 10**30, "data.batch_size should be an integer in 1..1,797"),
    ("batch_size", 64.0, "data.batch_size should be an integer"),
    ("batch_size", True, "data.batch_size should be an integer"),
    ("train_size", 0, "data.train_size should be an integer in 1..1,795"),
    ("train_size", 1796, "data.train_size should be an integer in 1..1,795"),
    ("train_size", 10**12, "data.train_size should be an integer in 1..1,795"),
    ("train_size", 300.5, "data.train_size should be an integer"),
    ("heldout_size", 0, "data.heldout_size should be an integer in 1..796"),
    ("heldout_size", 797, "data.heldout_size should be an integer in 1..796"),
    ("heldout_size", True, "data.heldout_size should be an integer"),
    ("images", 0, "data.images should be true or false"),
    ("images", 1, "data.images should be true or false"),
    ("images", "yes", "data.images should be true or false"),
    ("images", [], "data.images should be true or false"),
]


@pytest.mark.parametrize("key, value, words", ROOM)
def test_mail_room_arguments_are_checked_by_their_recipe_keys(key, value, words):
    from filial.demo import mail_room_loaders

    with pytest.raises(InputError, match=re.escape(words)):
        mail_room_loaders(**{"train_size": 1000, "heldout_size": 300, key: value})


def test_mail_room_bounds_are_accepted_at_the_edges():
    from filial.demo import mail_room, mail_room_loaders, symmetric_noise

    train, heldout, test = mail_room_loaders(train_size=1795, heldout_size=1, batch_size=1797)
    assert len(train.dataset) == 1795 and len(heldout.dataset) == 1 and len(test.dataset) == 1
    assert len(next(iter(train))[0]) == 1795  # one batch: the whole training set
    with pytest.raises(InputError, match=r"^seed should be an integer"):
        mail_room(seed=-1)  # the API's own names, without the recipe's prefix
    with pytest.raises(InputError, match=r"rate should be a number in \[0, 1\)"):
        symmetric_noise(np.zeros(3, dtype=np.int64), float("nan"), 10, seed=0)


VISION_MODEL = [
    ({"depth": 1208}, "depth should be 6n+2 for a whole n >= 1, at most 1202"),
    ({"depth": 6 * 10**11 + 2}, "at most 1202"),
    ({"classes": 0}, "classes should be an integer >= 1"),
    ({"classes": -1}, "classes should be an integer >= 1"),
    ({"classes": 10.0}, "classes should be an integer >= 1"),
    ({"classes": True}, "classes should be an integer >= 1"),
    ({"classes": "10"}, "classes should be an integer >= 1"),
    ({"classes": 10**12}, "a ResNet-20 with 1,000,000,000,000 classes would have"),
]


@pytest.mark.parametrize("kwargs, words", VISION_MODEL)
def test_cifar_resnet_arguments_are_checked(kwargs, words):
    from filial.vision import cifar_resnet

    with pytest.raises(InputError, match=re.escape(words)):
        cifar_resnet(**kwargs)


@pytest.mark.parametrize("depth, classes", [(8, 1), (20, 10), (32, 100), (56, 7)])
def test_the_resnet_parameter_count_is_the_models_own(depth, classes):
    """The bound is computed without building the model; here it is checked against the
    built model's parameters (He et al. 2016, table 6, gives 0.27M for depth 20)."""
    from filial.vision import cifar_resnet, resnet_parameters

    model = cifar_resnet(depth, classes)
    assert resnet_parameters(depth, classes) == sum(p.numel() for p in model.parameters())


VISION_DATA = [
    ("dataset", 5, "data.dataset should be 'cifar10' or 'cifar100'"),
    ("dataset", ["cifar10"], "data.dataset should be 'cifar10' or 'cifar100'"),
    ("source", None, "data.source should be 'folder' or 'fake'"),
    ("root", 5, "data.root should be a folder name"),
    ("root", "", "data.root should be a folder name"),
    ("heldout_size", 50_000, "data.heldout_size should be an integer in 1..49,999"),
    ("heldout_size", 1.5, "data.heldout_size should be an integer in 1..49,999"),
    ("subset", -1, "data.subset should be an integer in 0..30,000"),
    ("subset", 30_001, "data.subset should be an integer in 0..30,000"),
    ("subset", True, "data.subset should be an integer"),
    ("test_subset", 10_001, "data.test_subset should be an integer in 0..10,000"),
    ("split_seed", 2**64, "data.split_seed should be an integer in 0.."),
    ("batch_size", 0, "data.batch_size should be an integer in 1..50,000"),
    ("batch_size", 50_001, "data.batch_size should be an integer in 1..50,000"),
    ("batch_size", 10**12, "data.batch_size should be an integer in 1..50,000"),
    ("workers", -1, "data.workers should be an integer in 0.."),
    ("workers", 10**6, "each worker is a process"),
    ("workers", 2.0, "data.workers should be an integer"),
]


@pytest.mark.parametrize("key, value, words", VISION_DATA)
def test_cifar_loader_arguments_are_checked_before_any_data_are_read(key, value, words):
    """No dataset files and no torchvision are needed to refuse these."""
    from filial.vision import cifar_loaders

    with pytest.raises(InputError, match=re.escape(words)):
        cifar_loaders(**{"heldout_size": 20_000, "source": "fake", key: value})


@pytest.mark.parametrize(
    "override, words",
    [
        ("model.hidden=[-1]", "model.hidden[0] should be an integer >= 1"),
        ("model.hidden=[1000000000000]", "parameters"),
        ("model.hidden=[32.5]", "model.hidden[0] should be an integer"),
        ("data.batch_size=1000000000000", "data.batch_size should be an integer in 1..1,797"),
        ("data.images=1", "data.images should be true or false"),
        ("data.split_seed=true", "data.split_seed should be an integer"),
    ],
)
def test_shipped_factory_refusals_are_one_filial_line(tmp_path, capsys, recipe, override, words):
    err = _refused(capsys, tmp_path, recipe, override)
    assert words in err and "Traceback" not in err and len(err.strip().splitlines()) == 1


# -- 4. training devices -------------------------------------------------------------------------

# Backends torch.device parses but a stock torch build cannot train on here; mps and xpu are
# skipped on a machine whose torch has them.
MISSING_BACKENDS = ["mps", "xpu", "hpu", "xla", "ipu", "vulkan", "mtia", "lazy", "hip", "maia"]


def _has(name: str) -> bool:
    if name == "mps":
        return torch.backends.mps.is_available()
    if name == "xpu":
        return hasattr(torch, "xpu") and torch.xpu.is_available()
    return False


@pytest.mark.parametrize("name", MISSING_BACKENDS)
def test_a_device_this_torch_cannot_train_on_is_refused_before_anything_is_written(
    tmp_path, capsys, recipe, name
):
    if _has(name):
        pytest.skip(f"this torch has {name}")
    err = _refused(capsys, tmp_path, recipe, f"training.device={json.dumps(name)}")
    assert f"training.device = {name!r}, but this torch cannot train on it" in err


def test_meta_is_refused_and_cuda_indices_are_checked(tmp_path, capsys, recipe, monkeypatch):
    from filial.recipe import training_device

    err = _refused(capsys, tmp_path, recipe, 'training.device="meta"')
    assert "meta tensors have shapes but no values" in err
    beyond = f"cuda:{torch.cuda.device_count()}"  # never a device, whatever the machine has
    err = _refused(capsys, tmp_path, recipe, f"training.device={json.dumps(beyond)}")
    assert f"training.device = {beyond!r}, but this torch sees" in err
    # The index check itself, as on a machine with one GPU (no GPU is touched: it fails first).
    monkeypatch.setattr(torch.cuda, "is_available", lambda: True)
    monkeypatch.setattr(torch.cuda, "device_count", lambda: 1)
    with pytest.raises(RecipeError, match=re.escape("sees 1 CUDA device(s) (cuda:0 to cuda:0)")):
        training_device({"device": "cuda:7"})


@pytest.mark.parametrize("name", ["gpu0", "CUDA", " cpu", "cpu ", "cuda:-1", "", "cuda:x"])
def test_names_that_are_no_device_are_refused(tmp_path, capsys, recipe, name):
    err = _refused(capsys, tmp_path, recipe, f"training.device={json.dumps(name)}")
    assert f"training.device = {name!r} is not a device" in err


def test_devices_torch_has_are_accepted():
    from filial.recipe import training_device

    assert training_device({"device": "cpu"}) == torch.device("cpu")
    expected = "cuda" if torch.cuda.is_available() else "cpu"
    assert training_device({"device": "auto"}).type == expected
    if torch.cuda.is_available():
        assert training_device({"device": "cuda:0"}) == torch.device("cuda:0")


# -- 5. store sizes ------------------------------------------------------------------------------


@pytest.mark.parametrize("views", [1025, 10**6, 10**12, 10**30])
def test_views_past_the_recipe_bound_are_refused(tmp_path, capsys, recipe, views):
    err = _refused(capsys, tmp_path, recipe, f"generations.views={views}")
    assert "generations.views should be <= 1024" in err and "teacher pass" in err


def test_the_largest_view_count_is_a_valid_recipe():
    assert (
        resolve(tomllib.loads(RECIPE), ["generations.views=1024"])["generations"]["views"] == 1024
    )


@pytest.mark.parametrize(
    "samples, views, outputs, dtype, top_k",
    [
        (7, 1, 10, "float16", None),
        (7, 3, 10, "float32", None),
        (5, 2, 40, "float16", 4),
        (5, 1, 40_000, "float32", 3),  # int32 class indices past 32,767 classes
        (1, 1, 1, "float16", None),
    ],
)
def test_store_bytes_are_the_bytes_the_store_writes(
    tmp_path, samples, views, outputs, dtype, top_k
):
    """Reference: numpy's own ``nbytes`` of the arrays TargetStore.write put on disk."""
    from filial.space import store_bytes
    from filial.store import TargetStore

    outputs_array = np.random.default_rng(0).normal(size=(samples, views, outputs))
    store = TargetStore.write(
        tmp_path / "store",
        outputs_array,
        dtype=dtype,
        fingerprint="f",
        teacher_sha256="t",
        top_k=top_k,
    )
    written = store.array.nbytes + (store.index_array.nbytes if top_k else 0)
    assert store_bytes(samples, views, outputs, dtype, top_k) == written


@pytest.mark.parametrize(
    "sizes, words",
    [
        ({"samples": 300, "views": 10**12, "outputs": 10}, "5.3 PiB"),
        ({"samples": 10**9, "views": 1, "outputs": 1000}, "1.8 TiB"),
        ({"samples": 5 * 10**7, "views": 4, "outputs": 10**6, "top_k": 10}, "11.2 GiB"),
        ({"samples": 50_000, "views": 1, "outputs": 10**5, "dtype": "float32"}, "18.6 GiB"),
        (
            {"samples": 1000, "views": 1, "outputs": 1000, "stores": 10**6},
            "1,000,000 such stores take 1.8 TiB",
        ),
    ],
)
def test_a_store_that_cannot_fit_is_refused_with_both_figures(tmp_path, monkeypatch, sizes, words):
    from filial import space

    usage = shutil.disk_usage(tmp_path)
    monkeypatch.setattr(
        space.shutil,
        "disk_usage",
        lambda path: usage._replace(free=2**30),  # 1 GiB free
    )
    with pytest.raises(space.StoreTooLarge) as info:
        space.check_store_fits(tmp_path / "not" / "yet" / "made", **sizes)
    message = str(info.value)
    assert f"{tmp_path} has 1.0 GiB free" in message  # the nearest folder that exists
    assert f"takes {words}" in message if "stores" not in sizes else words in message
    assert "lower views" in message and "teacher_mode='online'" in message


def test_a_store_that_fits_is_measured_against_the_real_free_space(tmp_path):
    from filial import space

    assert space.nearest_existing(tmp_path / "a" / "b") == tmp_path
    assert space.nearest_existing(tmp_path / ("x" * 300) / "run") == tmp_path  # ENAMETOOLONG
    (tmp_path / "afile").write_text("")
    assert space.nearest_existing(tmp_path / "afile" / "run") == tmp_path / "afile"
    assert space.free_bytes(tmp_path) == shutil.disk_usage(tmp_path).free
    assert space.check_store_fits(tmp_path / "run", 1000, 1, 10) == 1000 * 10 * 2
    with pytest.raises(ValueError, match="views should be an integer >= 0"):
        space.store_bytes(10, 1.5, 10)


# -- 7. metrics that return NaN or an infinity --------------------------------------------------


def _one_generation(loaders, tmp_path, metric, generations=0):
    from conftest import TinyNet

    import filial

    train, heldout, test = loaders
    lineage = filial.Lineage(
        TinyNet(),
        train,
        heldout,
        run_dir=tmp_path / "run",
        max_generations=generations,
        metric=metric,
        tensorboard=False,
    )
    for gen in lineage:
        gen.finish(gen.model)
    return lineage


def nan_metric(outputs, labels):
    return float("nan")


@pytest.mark.parametrize(
    "value",
    [
        float("nan"),
        float("inf"),
        float("-inf"),
        np.float32("nan"),
        np.float64("inf"),
        torch.tensor(float("nan")),
        torch.tensor([float("-inf")]),
    ],
    ids=["nan", "inf", "-inf", "numpy nan", "numpy inf", "tensor nan", "1-element tensor -inf"],
)
def test_a_non_finite_metric_is_refused_at_generation_0_naming_the_metric(loaders, tmp_path, value):
    def my_metric(outputs, labels):
        return value

    with pytest.raises(InputError, match=r"metric .*my_metric returned (nan|inf|-inf) on 48"):
        _one_generation(loaders, tmp_path, my_metric)
    # Nothing of generation 0 was written: no record, no folder, no checkpoint.
    state = json.loads((tmp_path / "run" / "lineage.json").read_text())
    assert state["records"] == [] and not (tmp_path / "run" / "gen0").exists()


def test_a_metric_that_turns_nan_later_keeps_the_finished_generations(loaders, tmp_path):
    calls = []

    def flaky(outputs, labels):
        # Generation 0 calls it for held-out, train and the ensemble; generation 1's held-out
        # call is the fourth, its train call the fifth.
        calls.append(1)
        return 0.5 if len(calls) <= 4 else float("nan")

    with pytest.raises(InputError, match="flaky returned nan"):
        _one_generation(loaders, tmp_path, flaky, generations=2)
    state = json.loads((tmp_path / "run" / "lineage.json").read_text())
    assert [r["generation"] for r in state["records"]] == [0]


@pytest.mark.parametrize(
    "value, words",
    [
        ("0.5", "returned the string '0.5'"),
        (torch.zeros(3), "Tensor of shape (3,)"),
        (None, "NoneType"),
    ],
)
def test_a_metric_that_returns_no_number_is_a_type_error(loaders, tmp_path, value, words):
    def odd(outputs, labels):
        return value

    with pytest.raises(TypeError, match=re.escape(words)):
        _one_generation(loaders, tmp_path, odd)


# -- 6. filial report on damaged or hand-edited run directories ---------------------------------

FIXTURES = Path(__file__).resolve().parent / "fixtures" / "format1"


def _edit_json(path: Path, change) -> None:
    data = json.loads(path.read_text())
    change(data)
    path.write_text(json.dumps(data))


def _state(seed: int, change):
    return lambda run: _edit_json(run / f"seed{seed}" / "lineage.json", change)


def _record(field, value=None, drop=False, index=1):
    def change(state):
        if drop:
            del state["records"][index][field]
        else:
            state["records"][index][field] = value

    return _state(0, change)


def _decision(field, value):
    return _state(0, lambda state: state["decision"].__setitem__(field, value))


def _write(relative: str, text: str | bytes):
    def damage(run: Path) -> None:
        path = run / relative
        if path.is_dir():
            shutil.rmtree(path)
        else:
            path.unlink(missing_ok=True)
        if isinstance(text, bytes):
            path.write_bytes(text)
        else:
            path.write_text(text)

    return damage


def _make_directory(relative: str):
    def damage(run: Path) -> None:
        (run / relative).unlink()
        (run / relative).mkdir()

    return damage


def _truncate(relative: str, keep: int):
    def damage(run: Path) -> None:
        path = run / relative
        path.write_bytes(path.read_bytes()[:keep])

    return damage


def _recipe_text(old: str, new: str):
    def damage(run: Path) -> None:
        path = run / "recipe.toml"
        text = path.read_text()
        assert old in text
        path.write_text(text.replace(old, new, 1))

    return damage


def _remove(relative: str):
    return lambda run: shutil.rmtree(run / relative)


def _swap_seeds(run: Path) -> None:
    (run / "seed0").rename(run / "tmp")
    (run / "seed1").rename(run / "seed0")
    (run / "tmp").rename(run / "seed1")


def _baseline(change):
    return lambda run: _edit_json(run / "seed0" / "baseline" / "baseline.json", change)


def _npy(relative: str, array: np.ndarray):
    return lambda run: np.save(run / relative, array, allow_pickle=False)


DAMAGE = {
    # lineage.json as a whole
    "lineage.json is []": (
        _write("seed0/lineage.json", "[]"),
        "seed0/lineage.json",
        "holds a list",
    ),
    "lineage.json is {}": (_write("seed0/lineage.json", "{}"), "seed0/lineage.json", "format"),
    "lineage.json is null": (_write("seed0/lineage.json", "null"), "seed0/lineage.json", "null"),
    "lineage.json is a string": (
        _write("seed0/lineage.json", '"x"'),
        "seed0/lineage.json",
        "holds a string",
    ),
    "lineage.json is a directory": (
        _make_directory("seed0/lineage.json"),
        "seed0/lineage.json",
        "is a directory",
    ),
    "lineage.json is cut short": (
        _truncate("seed0/lineage.json", 200),
        "seed0/lineage.json",
        "is not valid JSON",
    ),
    "lineage.json is not UTF-8": (
        _write("seed0/lineage.json", b'{"format": "\xff"}'),
        "seed0/lineage.json",
        "cannot be read",
    ),
    "lineage.json of another format": (
        _state(0, lambda s: s.__setitem__("format", "filial.lineage/9")),
        "seed0/lineage.json",
        "format should be 'filial.lineage/1'",
    ),
    "settings missing": (
        _state(0, lambda s: s.pop("settings")),
        "seed0/lineage.json",
        "settings is missing",
    ),
    "settings.targets unknown": (
        _state(0, lambda s: s["settings"].__setitem__("targets", "kl")),
        "seed0/lineage.json",
        "settings.targets should be 'ce' or 'l2'",
    ),
    "settings.seed not a number": (
        _state(0, lambda s: s["settings"].__setitem__("seed", "0")),
        "seed0/lineage.json",
        "settings.seed should be an integer",
    ),
    "records not a list": (
        _state(0, lambda s: s.__setitem__("records", {"0": {}})),
        "seed0/lineage.json",
        "records should be a list",
    ),
    "a record that is a number": (
        _state(0, lambda s: s["records"].__setitem__(1, 5)),
        "seed0/lineage.json",
        "records[1] should be a JSON object",
    ),
    # one record
    "a record without seconds": (
        _record("seconds", drop=True),
        "seed0/lineage.json",
        "records[1].seconds is missing",
    ),
    "seconds: null": (
        _record("seconds", None),
        "seed0/lineage.json",
        "records[1].seconds should be a number, but got null",
    ),
    "seconds as a string": (
        _record("seconds", "0.4"),
        "seed0/lineage.json",
        "records[1].seconds should be a number",
    ),
    "negative seconds": (
        _record("seconds", -1),
        "seed0/lineage.json",
        "records[1].seconds should be a finite number >= 0",
    ),
    "a record without checkpoint": (
        _record("checkpoint", drop=True),
        "seed0/lineage.json",
        "records[1].checkpoint is missing",
    ),
    "checkpoint outside the lineage": (
        _record("checkpoint", "../../etc/passwd"),
        "seed0/lineage.json",
        "records[1].checkpoint should be a path inside the lineage folder",
    ),
    "checkpoint as a number": (
        _record("checkpoint", 1),
        "seed0/lineage.json",
        "records[1].checkpoint should be a string",
    ),
    "held-out as a string": (
        _record("heldout", "0.5"),
        "seed0/lineage.json",
        "records[1].heldout should be a number or null",
    ),
    "a record without held-out": (
        _record("heldout", drop=True, index=0),
        "seed0/lineage.json",
        "records[0].heldout is missing",
    ),
    "generations out of order": (
        _record("generation", 5),
        "seed0/lineage.json",
        "records[1].generation should be 1 (its place in the list), but got 5",
    ),
    "diverged as a string": (
        _record("diverged", "no"),
        "seed0/lineage.json",
        "records[1].diverged should be true or false",
    ),
    # the decision
    "decision.best = 99": (
        _decision("best", 99),
        "seed0/lineage.json",
        "decision.best should be a finished generation, 0..1, but got 99",
    ),
    "decision.best = -1": (_decision("best", -1), "seed0/lineage.json", "decision.best"),
    "decision.best as a string": (
        _decision("best", "0"),
        "seed0/lineage.json",
        "decision.best should be an integer or null",
    ),
    "decision.best names a diverged generation": (
        _state(0, lambda s: s["records"][0].__setitem__("diverged", True)),
        "seed0/lineage.json",
        "decision.best should be a generation that did not diverge",
    ),
    "an unknown stop reason": (
        _decision("reason", "bored"),
        "seed0/lineage.json",
        "decision.reason should be 'no-gain' or",
    ),
    "decision.stop as a string": (
        _decision("stop", "yes"),
        "seed0/lineage.json",
        "decision.stop should be true or false",
    ),
    "a best without records": (
        _state(0, lambda s: s.__setitem__("records", [])),
        "seed0/lineage.json",
        "null (there are no records)",
    ),
    # baseline.json
    "baseline.json without epochs_matched": (
        _baseline(lambda b: b.pop("epochs_matched")),
        "seed0/baseline/baseline.json",
        "epochs_matched is missing",
    ),
    "epochs_matched as a string": (
        _baseline(lambda b: b.__setitem__("epochs_matched", "4")),
        "seed0/baseline/baseline.json",
        "epochs_matched should be an integer",
    ),
    "epochs_matched = 0": (
        _baseline(lambda b: b.__setitem__("epochs_matched", 0)),
        "seed0/baseline/baseline.json",
        "epochs_matched should be an integer >= 1",
    ),
    "baseline.json is []": (
        _write("seed0/baseline/baseline.json", "[]"),
        "seed0/baseline/baseline.json",
        "should be a JSON object, but is a list",
    ),
    "baseline.json is a directory": (
        _make_directory("seed0/baseline/baseline.json"),
        "seed0/baseline/baseline.json",
        "is a directory",
    ),
    "baseline held-out as a string": (
        _baseline(lambda b: b.__setitem__("heldout", "high")),
        "seed0/baseline/baseline.json",
        "heldout should be a number or null",
    ),
    # recipe.toml and the seed folders
    "seeds = 5": (
        _recipe_text("seeds = [0, 1]", "seeds = 5"),
        "recipe.toml",
        "run.seeds should be a non-empty list of distinct integers >= 0, but got 5",
    ),
    "seeds = []": (_recipe_text("seeds = [0, 1]", "seeds = []"), "recipe.toml", "run.seeds"),
    'seeds = ["0"]': (_recipe_text("seeds = [0, 1]", 'seeds = ["0"]'), "recipe.toml", "run.seeds"),
    "seeds = [0, 0]": (
        _recipe_text("seeds = [0, 1]", "seeds = [0, 0]"),
        "recipe.toml",
        "run.seeds",
    ),
    "seeds = [99]": (
        _recipe_text("seeds = [0, 1]", "seeds = [99]"),
        "seed99/lineage.json",
        "does not exist, but",
    ),
    "no [run] table": (
        _recipe_text("[run]", "[runs]"),
        "recipe.toml",
        "[run] should be a table, but is missing",
    ),
    "recipe.toml is not TOML": (
        _recipe_text("[run]", "[run"),
        "recipe.toml",
        "is not valid TOML",
    ),
    "recipe.toml without filial's first line": (
        _recipe_text("# filial run recipe", "# my recipe"),
        "recipe.toml",
        "was not written by filial run",
    ),
    "recipe.toml is a directory": (
        _make_directory("recipe.toml"),
        "recipe.toml",
        "is a directory",
    ),
    "one seed folder gone": (
        _remove("seed1"),
        "seed1/lineage.json",
        "lists seed 1 (run.seeds = [0, 1])",
    ),
    "every seed folder gone": (
        lambda run: (_remove("seed0")(run), _remove("seed1")(run)),
        "seed0/lineage.json",
        "does not exist",
    ),
    "seed folders swapped": (
        _swap_seeds,
        "seed0/lineage.json",
        "settings.seed is 1, but the folder is seed0 of seed 0",
    ),
    # the arrays the gain interval reads
    "heldout_labels.npy cut short": (
        _truncate("seed0/heldout_labels.npy", 100),
        "seed0/heldout_labels.npy",
        "cannot be read as a numpy array",
    ),
    "heldout_labels.npy empty": (
        _truncate("seed0/heldout_labels.npy", 0),
        "seed0/heldout_labels.npy",
        "cannot be read as a numpy array",
    ),
    "heldout_labels.npy gone": (
        lambda run: (run / "seed0" / "heldout_labels.npy").unlink(),
        "seed0/heldout_labels.npy",
        "does not exist",
    ),
    "gen0/heldout.npy cut short": (
        _truncate("seed1/gen0/heldout.npy", 1000),
        "seed1/gen0/heldout.npy",
        "cannot be read as a numpy array",
    ),
    "gen0/heldout.npy of other rows": (
        _npy("seed1/gen0/heldout.npy", np.zeros((7, 10), dtype=np.float32)),
        "seed1/gen0/heldout.npy",
        "holds 7 held-out outputs",
    ),
    "the kept generation's heldout.npy of another width": (
        lambda run: (
            _state(1, lambda s: s["decision"].__setitem__("best", 1))(run),
            _npy("seed1/gen1/heldout.npy", np.zeros((300, 5), dtype=np.float32))(run),
        ),
        "seed1/gen1/heldout.npy",
        "holds outputs of shape (300, 5)",
    ),
    "heldout_labels.npy of other rows": (
        _npy("seed1/heldout_labels.npy", np.zeros(7, dtype=np.int64)),
        "seed1/heldout_labels.npy",
        "holds labels of shape (7,)",
    ),
    "heldout.npy holding text": (
        _write("seed1/gen0/heldout.npy", "not numpy"),
        "seed1/gen0/heldout.npy",
        "cannot be read as a numpy array",
    ),
    "heldout.npy holding an object array": (
        lambda run: np.save(run / "seed1/gen0/heldout.npy", np.array([{}], dtype=object)),
        "seed1/gen0/heldout.npy",
        "cannot be read as a numpy array",
    ),
}


@pytest.fixture
def recipe_run(tmp_path):
    """A run directory written by `filial run` (two seeds, a matched baseline each)."""
    run = tmp_path / "recipe_run"
    shutil.copytree(FIXTURES / "recipe_run", run)
    return run


def _report_refuses(capsys, run: Path, file: str, words: str) -> None:
    code = cli.main(["report", str(run)])
    captured = capsys.readouterr()
    assert code == 2, captured.out
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("filial: "), captured.err
    assert file in lines[0] and words in lines[0], lines[0]
    assert "lineage(s)" not in captured.out


def test_the_undamaged_fixture_reports(capsys, recipe_run):
    assert cli.main(["report", str(recipe_run)]) == 0
    assert "2 lineage(s)" in capsys.readouterr().out
    assert cli.main(["report", str(recipe_run), "--json"]) == 0
    assert [x["seed"] for x in json.loads(capsys.readouterr().out)["lineages"]] == [0, 1]


@pytest.mark.parametrize("kind", list(DAMAGE))
def test_report_on_a_damaged_run_names_the_file_and_field_and_exits_2(capsys, recipe_run, kind):
    damage, file, words = DAMAGE[kind]
    damage(recipe_run)
    _report_refuses(capsys, recipe_run, file, words)


@pytest.mark.parametrize(
    "damage, words",
    [
        (_write("lineage.json", "[]"), "holds a list"),
        (_write("lineage.json", "{}"), "format should be"),
        (_make_directory("lineage.json"), "is a directory"),
        (_truncate("heldout_labels.npy", 50), "heldout_labels.npy cannot be read"),
    ],
)
def test_report_on_a_damaged_plain_lineage(tmp_path, capsys, damage, words):
    run = tmp_path / "partial"
    shutil.copytree(FIXTURES / "partial", run)
    assert cli.main(["report", str(run)]) == 0
    capsys.readouterr()
    damage(run)
    _report_refuses(capsys, run, str(run), words)


def test_report_on_what_is_no_run_directory(tmp_path, capsys):
    _report_refuses(capsys, tmp_path / "absent", "absent", "does not exist")
    (tmp_path / "file").write_text("x")
    _report_refuses(capsys, tmp_path / "file", "file", "is not a directory")
    _report_refuses(capsys, tmp_path, str(tmp_path), "is not a filial run directory")
