"""The ``filial`` command.

``filial run RECIPE.toml [--set key=value ...] [--run-dir DIR] [--fresh]``
    runs one lineage per seed of the recipe under one run directory (``DIR/seedS/``), the matched
    baseline when the recipe asks for it, writes TensorBoard runs under ``DIR/tb`` and prints the
    report. Rerunning the same command resumes after the last finished generation.
``filial report RUN_DIR [--json] [--plot FILE.png]``
    prints what a run found, or draws it (``--plot``, with the ``plot`` extra).

Exit codes: 0 success; 2 a bad recipe, bad arguments or bad input, or a run directory in use by
another process (the message names the key or the problem; a run directory this call created is
removed, and finished generations of an earlier run are kept as they were); 1 a failure during
the run (finished generations are kept); 130 interrupted (the run directory is resumable, and
the message says how).
"""

from __future__ import annotations

import argparse
import functools
import json
import shlex
import shutil
import sys
import tomllib
import traceback
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from torch import nn
from torch.utils.data import DataLoader
from tqdm.auto import tqdm

from . import recipe as recipes
from ._io import LockedError, RunLock, atomic_write, sweep_temporaries
from .data import check_loader
from .errors import InputError
from .fit import fit_epochs
from .lineage import Lineage
from .losses import StudentLoss
from .report import RECIPE_FILE, format_report, summarize
from .stopping import StopRule
from .tb import SeedView, write_arms

EXIT_OK, EXIT_FAILED, EXIT_USAGE, EXIT_INTERRUPTED = 0, 1, 2, 130


@dataclass
class Plan:
    """A checked recipe with its loaders and model factory, before anything is written."""

    recipe: recipes.Recipe
    train: DataLoader
    heldout: DataLoader
    test: DataLoader | None
    model_fn: Any


def _loaders(value: Any, spec: str) -> tuple[DataLoader, DataLoader, DataLoader | None]:
    if isinstance(value, dict):
        missing = [k for k in ("train", "heldout") if k not in value]
        if missing:
            raise recipes.RecipeError(
                f"data.factory {spec!r} returned a dict without {missing}; it needs 'train' and "
                "'heldout' (and optionally 'test') DataLoaders"
            )
        value = (value["train"], value["heldout"], value.get("test"))
    if not isinstance(value, (tuple, list)) or len(value) not in (2, 3):
        raise recipes.RecipeError(
            f"data.factory {spec!r} should return (train, heldout) or (train, heldout, test) "
            f"DataLoaders, but returned {type(value).__name__}"
        )
    train, heldout, *rest = value
    test = rest[0] if rest else None
    for role, loader in (("train", train), ("heldout", heldout), ("test", test)):
        if loader is None and role == "test":
            continue
        try:
            check_loader(loader, f"the {role} loader from data.factory {spec!r}")
        except TypeError as exc:
            raise recipes.RecipeError(str(exc)) from exc
    return train, heldout, test


def plan(recipe_path: str, overrides: Sequence[str], run_dir: str | None) -> Plan:
    """Everything that can be checked before a run directory is touched."""
    recipe = recipes.load(recipe_path, overrides)
    if run_dir:
        recipe.values["run"]["run_dir"] = run_dir
    data_factory, data_kwargs = recipe.factory("data")
    model_factory, model_kwargs = recipe.factory("model")
    spec = recipe["data"]["factory"]
    try:
        loaders = data_factory(**data_kwargs)
    except (OSError, ImportError, ValueError, TypeError, KeyError) as exc:
        raise recipes.RecipeError(f"data.factory {spec!r} failed: {exc}") from exc
    train, heldout, test = _loaders(loaders, spec)
    model_fn = functools.partial(model_factory, **model_kwargs)
    try:
        probe = model_fn()
    except (ImportError, ValueError, TypeError, KeyError) as exc:
        raise recipes.RecipeError(
            f"model.factory {recipe['model']['factory']!r} failed: {exc}"
        ) from exc
    if not isinstance(probe, nn.Module):
        raise recipes.RecipeError(
            f"model.factory {recipe['model']['factory']!r} should return a fresh nn.Module, but "
            f"returned {type(probe).__name__}"
        )
    g = recipe["generations"]
    try:
        StudentLoss(g["targets"], g["temperature"], g["label_weight"])
        if g["top_k"] and g["targets"] == "l2":
            raise ValueError("generations.top_k goes with targets = 'ce' only")
        StopRule(g["max"], g["patience"], g["min_gain"])
    except ValueError as exc:
        raise recipes.RecipeError(f"[generations]: {exc}") from exc
    recipes.training_device(recipe["training"])  # a wrong device is a recipe error, here
    if g["views"] != 1 and g["teacher"] == "online":
        raise recipes.RecipeError(
            "generations.views caches several augmented views per sample, but teacher = "
            "'online' caches none; use views = 1 with it"
        )
    return Plan(recipe, train, heldout, test, model_fn)


def _prepare_run_dir(recipe: recipes.Recipe, fresh: bool) -> tuple[Path, bool, RunLock]:
    """Check and lock the run directory; nothing in it is changed here.

    Returns the directory, whether this call created it, and the lock held on it. A folder that
    is neither empty nor a filial run (its ``recipe.toml`` starts with filial's marker) is
    refused, with or without ``--fresh``.
    """
    run_dir = Path(recipe["run"]["run_dir"])
    saved = run_dir / RECIPE_FILE
    if run_dir.exists() and not run_dir.is_dir():
        raise recipes.RecipeError(f"run_dir {run_dir} exists and is not a directory")
    used = run_dir.is_dir() and any(p.name != RunLock.NAME for p in run_dir.iterdir())
    if used and not recipes.is_saved_recipe(saved):
        raise recipes.RecipeError(
            f"{run_dir} is not empty and is not a filial run directory (no {RECIPE_FILE} "
            "written by filial run). Choose another one with --run-dir."
        )
    if used and not fresh:
        try:
            old = recipes.Recipe(tomllib.loads(saved.read_text(encoding="utf-8"))).comparable()
        except (OSError, ValueError, KeyError) as exc:
            raise recipes.RecipeError(f"{saved} cannot be read ({exc})") from exc
        changed = recipes.differences(old, recipe.comparable())
        if changed:
            raise recipes.RecipeError(
                f"{run_dir} holds a run of another recipe, so it cannot be resumed:\n  "
                + "\n  ".join(changed)
                + "\nUse --fresh to start over there, or another --run-dir."
            )
    new = not run_dir.exists()
    run_dir.mkdir(parents=True, exist_ok=True)
    try:
        lock = RunLock(run_dir).acquire()
    except LockedError:
        if new:
            shutil.rmtree(run_dir, ignore_errors=True)
        raise
    if lock.previous:
        print(
            f"filial: took over the lock of {run_dir} left by process "
            f"{lock.previous.get('pid')}, which is no longer running",
            file=sys.stderr,
        )
    for path in sweep_temporaries(run_dir):
        print(f"filial: removed {path}, left by a process that died", file=sys.stderr)
    return run_dir, new, lock


def _start_over(run_dir: Path, seeds: Sequence[int]) -> None:
    """``--fresh``, once every check has passed: remove the earlier run's TensorBoard runs and
    the lineages of seeds the recipe no longer has (each kept seed's lineage cleared itself)."""
    shutil.rmtree(run_dir / "tb", ignore_errors=True)
    for entry in run_dir.glob("seed*"):
        stale = entry.name not in {f"seed{s}" for s in seeds}
        if stale and entry.is_dir() and (entry / "lineage.json").is_file():
            shutil.rmtree(entry)


def _save_recipe(recipe: recipes.Recipe, run_dir: Path) -> None:
    text = recipe.to_toml()
    atomic_write(run_dir / RECIPE_FILE, lambda handle: handle.write(text.encode("utf-8")))


def _lineage(p: Plan, run_dir: Path, seed: int, quiet: bool, fresh: bool = False) -> Lineage:
    g = p.recipe["generations"]
    lineage = Lineage(
        p.model_fn,
        p.train,
        p.heldout,
        run_dir=run_dir / f"seed{seed}",
        targets=g["targets"],
        temperature=g["temperature"],
        label_weight=g["label_weight"],
        max_generations=g["max"],
        patience=g["patience"],
        min_gain=g["min_gain"],
        views=g["views"],
        store_dtype=g["store_dtype"],
        top_k=g["top_k"] or None,
        teacher_mode=g["teacher"],
        test_loader=p.test,
        seed=seed,
        progress=not quiet,
        tensorboard=run_dir / "tb" / f"seed{seed}",
        fresh=fresh,
    )
    if lineage.tensorboard is not None:  # the arms view across seeds is written by _train
        lineage.tensorboard.alone = False
    return lineage


def _train(p: Plan, run_dir: Path, lineages: list[Lineage], on_terminal: bool) -> None:
    training = p.recipe["training"]
    optimizer = recipes.build_optimizer(training)
    device = recipes.training_device(training)

    def make_fit(count: int):
        scheduler = recipes.build_scheduler(training, count)
        return fit_epochs(count, optimizer, scheduler, progress=on_terminal, device=device)

    fit = make_fit(training["epochs"])
    views: list[SeedView] = []
    for lineage in lineages:
        seed = lineage.settings["seed"]
        # On a terminal: a bar for the generations and one for the epochs, cleared when done;
        # otherwise the lineage prints one plain line per generation. Never both.
        bar = tqdm(
            total=lineage.settings["max_generations"] + 1,
            initial=len(lineage.result.records),
            desc=f"seed {seed} generations",
            unit="gen",
            leave=False,
            disable=not on_terminal,
        )
        for gen in lineage:
            model = fit(gen)
            record = gen.finish(model)
            bar.update(1)
            bar.set_postfix(heldout=f"{record['heldout'] or float('nan'):.4f}", refresh=True)
        bar.close()
        baselines: dict[str, dict[str, Any]] = {}
        if p.recipe["run"]["baseline"] == "matched" and lineage.result.best is not None:
            baselines["matched"] = lineage.matched_baseline(make_fit)
        # TensorBoard's arms view, from the records of the seeds finished so far.
        result = lineage.result
        views.append(SeedView(seed, result.records, result.best, baselines))
        write_arms(run_dir / "tb", views, finished=len(views) == len(lineages))


def _resume_command(argv: Sequence[str]) -> str:
    kept = [a for a in argv if a != "--fresh"]
    return "filial " + shlex.join(kept)


def _run(args: argparse.Namespace, argv: Sequence[str]) -> int:
    created: Path | None = None
    lock: RunLock | None = None
    on_terminal = sys.stderr.isatty()
    try:
        p = plan(args.recipe, args.set, args.run_dir)
        run_dir, new, lock = _prepare_run_dir(p.recipe, args.fresh)
        created = run_dir if new else None
        seeds = p.recipe["run"]["seeds"]
        # Each Lineage checks the data and the model before it touches its folder (and, with
        # --fresh, clears it); the rest of an earlier run goes only after all of them passed.
        lineages = [_lineage(p, run_dir, s, quiet=on_terminal, fresh=args.fresh) for s in seeds]
        if args.fresh:
            _start_over(run_dir, seeds)
        if args.fresh or not (run_dir / RECIPE_FILE).is_file():
            _save_recipe(p.recipe, run_dir)
    except (recipes.RecipeError, InputError, LockedError, ValueError, TypeError) as exc:
        if lock is not None:
            lock.release()
        if created is not None:
            shutil.rmtree(created, ignore_errors=True)
        print(f"filial: {exc}", file=sys.stderr)
        return EXIT_USAGE
    try:
        _train(p, run_dir, lineages, on_terminal)
    except InputError as exc:  # found while running (e.g. a model whose width changes)
        print(
            f"\nfilial: {exc}\nFinished generations are kept in {run_dir}; fix the input and "
            f"rerun\n  {_resume_command(argv)}",
            file=sys.stderr,
        )
        return EXIT_USAGE
    except KeyboardInterrupt:
        print(
            f"\nfilial: interrupted. {run_dir} keeps every finished generation; resume with:\n"
            f"  {_resume_command(argv)}",
            file=sys.stderr,
        )
        return EXIT_INTERRUPTED
    except Exception as exc:  # report, keep the run directory, exit 1
        traceback.print_exc(file=sys.stderr)
        print(
            f"filial: the run failed: {type(exc).__name__}: {exc}\n"
            f"Finished generations are kept in {run_dir}; fix the cause and rerun\n"
            f"  {_resume_command(argv)}",
            file=sys.stderr,
        )
        return EXIT_FAILED
    finally:
        for lineage in lineages:
            lineage.close()
        lock.release()
    print(format_report(summarize(run_dir)))
    return EXIT_OK


def _report(args: argparse.Namespace) -> int:
    try:
        summary = summarize(args.run_dir)
    except (ValueError, OSError, KeyError, tomllib.TOMLDecodeError) as exc:
        print(f"filial: {exc}", file=sys.stderr)
        return EXIT_USAGE
    if args.plot and _plot(summary, args.plot) != EXIT_OK:
        return EXIT_USAGE
    print(json.dumps(summary, indent=2) if args.json else format_report(summary))
    return EXIT_OK


def _plot(summary: dict[str, Any], path: str) -> int:
    """``filial report RUN --plot FILE.png``: the run's picture (needs the plot extra)."""
    from . import plot

    try:
        written = plot.save([SeedView.from_summary(x) for x in summary["lineages"]], path)
    except plot.PlotUnavailable as exc:
        print(f"filial: --plot: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except (ValueError, OSError) as exc:
        print(f"filial: --plot {path}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    print(f"filial: wrote {written}", file=sys.stderr)
    return EXIT_OK


def parser() -> argparse.ArgumentParser:
    top = argparse.ArgumentParser(
        prog="filial",
        description="Multi-generation self-distillation from TOML recipes.",
    )
    sub = top.add_subparsers(dest="command", required=True)
    run = sub.add_parser("run", help="run (or resume) the lineages of a recipe")
    run.add_argument("recipe", help="a TOML recipe, e.g. recipes/digits_ce.toml")
    run.add_argument(
        "--set",
        action="append",
        default=[],
        metavar="KEY=VALUE",
        help="override a recipe key, e.g. --set generations.temperature=4 (repeatable)",
    )
    run.add_argument("--run-dir", help="where to write the run (default: the recipe's run_dir)")
    run.add_argument("--fresh", action="store_true", help="delete an earlier run there first")
    report = sub.add_parser("report", help="print what a run found")
    report.add_argument("run_dir")
    report.add_argument("--json", action="store_true", help="print the report as JSON")
    report.add_argument(
        "--plot",
        metavar="FILE.png",
        help="also draw the metric by generation against generation 0 and each baseline into "
        "FILE.png (needs matplotlib: pip install 'filial[plot]')",
    )
    return top


def main(argv: Sequence[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    args = parser().parse_args(argv)
    if args.command == "run":
        return _run(args, argv)
    return _report(args)
