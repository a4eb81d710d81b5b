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

Under ``torchrun`` (``torchrun --nproc-per-node=N -m filial run RECIPE``) every process runs the
command: it joins the process group (gloo on the CPU, nccl when training on CUDA, each process
on ``cuda:LOCAL_RANK``), gives the recipe's training loader a ``DistributedSampler`` and each
process ``batch_size / N`` samples per step (:func:`filial.data.sharded_loader`), and rank 0
alone locks and writes the run directory, prints progress and the report; the lineages
coordinate the rest (see :mod:`filial.distributed`).
"""

from __future__ import annotations

import argparse
import functools
import json
import os
import shlex
import shutil
import sys
import tomllib
import traceback
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import torch
from torch import nn
from torch.utils.data import DataLoader
from tqdm.auto import tqdm

from . import __version__, distributed
from . import recipe as recipes
from ._faults import fault_point
from ._io import atomic_write
from .baselines import BaselineSpec, baseline_specs
from .data import check_loader, sharded_loader
from .distributed import RankZeroFailed
from .errors import InputError, LockedError, Problems
from .fit import EpochFit, fit_epochs
from .lineage import Lineage
from .observers import TensorBoardRuns
from .pool import Admission
from .report import format_report, summarize
from .rundir import (
    RECIPE_FILE,
    Claim,
    RecipeRunDirectory,
    RunDirectory,
    claim,
    foreign_entries,
    refuse_unusable,
    seed_name,
)
from .settings import Settings
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
    pool: DataLoader | None = None  # the data factory's unlabelled pool (recipe [pool])


def _pool_of(value: Any, spec: str) -> tuple[Any, DataLoader | None]:
    """The data factory's value without its pool loader (dict key ``unlabeled``, or the
    fourth of ``(train, heldout, test, unlabeled)``), and that loader."""
    pool = None
    if isinstance(value, dict) and "unlabeled" in value:
        value = dict(value)
        pool = value.pop("unlabeled")
    elif isinstance(value, (tuple, list)) and len(value) == 4:
        value, pool = tuple(value[:3]), value[3]
    if pool is not None and not isinstance(pool, DataLoader):
        raise recipes.RecipeError(
            f"data.factory {spec!r} returned an unlabeled pool that is a "
            f"{type(pool).__name__}, not a DataLoader"
        )
    return value, pool


def pool_admission(recipe: recipes.Recipe) -> Admission:
    """The recipe's ``[pool]`` as :class:`~filial.pool.Admission`."""
    p = recipe["pool"]
    return Admission(
        select=p["select"],
        threshold=p["threshold"] or None,
        count=p["count"] or None,
        step=p["step"],
        keep=p["keep"],
        pseudo=p["pseudo"],
        weight=p["weight"],
        audit=p["audit"],
        batch_ratio=p["batch_ratio"] or None,
    )


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
    # Whatever a factory raises names its recipe key (exit 2); a bug keeps its traceback.
    loaders = recipes.call_factory("data", spec, data_factory, data_kwargs)
    loaders, pool = _pool_of(loaders, spec)
    train, heldout, test = _loaders(loaders, spec)
    model_fn = functools.partial(model_factory, **model_kwargs)
    probe = recipes.call_factory("model", recipe["model"]["factory"], model_fn)
    if not isinstance(probe, nn.Module):
        raise recipes.RecipeError(
            f"model.factory {recipe['model']['factory']!r} should return a fresh nn.Module, but "
            f"returned {type(probe).__name__}"
        )
    problems = Problems()
    Settings.parse(problems, **generation_settings(recipe))
    if len(problems):
        found = "; ".join(str(p) for p in problems.found)
        raise recipes.RecipeError(f"[generations]: {found}")
    recipes.training_device(recipe["training"])  # a wrong device is a recipe error, here
    baseline_plan(recipe)
    if pool is not None:
        wrong = pool_admission(recipe).problems()
        if wrong:
            raise recipes.RecipeError("[pool]: " + "; ".join(str(p) for p in wrong))
    return Plan(recipe, train, heldout, test, model_fn, pool)


def baseline_plan(recipe: recipes.Recipe) -> list[BaselineSpec]:
    """The recipe's baselines, checked against its targets (a bad one names its key)."""
    run, targets = recipe["run"], recipe["generations"]["targets"]
    try:
        return baseline_specs(
            run["baseline"],
            every=run["baseline_every"],
            label_smoothing=run["label_smoothing"],
            targets=targets,
        )
    except ValueError as exc:
        text = str(exc).replace("label_smoothing", "run.label_smoothing", 1)
        raise recipes.RecipeError(f"run.baseline = {run['baseline']!r}: {text}") from exc


def generation_settings(recipe: recipes.Recipe, seed: int = 0) -> dict[str, Any]:
    """The recipe's ``[generations]`` as :class:`~filial.settings.Settings` keywords."""
    g = recipe["generations"]
    return {
        "targets": g["targets"],
        "temperature": g["temperature"],
        "label_weight": g["label_weight"],
        "max_generations": g["max_generations"],
        "patience": g["patience"],
        "min_gain": g["min_gain"],
        "views": g["views"],
        "store_dtype": g["store_dtype"],
        "top_k": g["top_k"] or None,
        "teacher_mode": g["teacher"],
        "spectrum_samples": g["spectrum_samples"],
        "spectrum_stop": g["spectrum_stop"],
        "seed": seed,
    }


def _prepare_run_dir(recipe: recipes.Recipe, fresh: bool) -> tuple[RecipeRunDirectory, Claim]:
    """Check and lock the run directory; nothing in it is changed here.

    A folder that is neither empty nor a filial run (its ``recipe.toml`` starts with filial's
    marker) is refused, with or without ``--fresh``; a run of another recipe is refused
    without ``--fresh``.
    """
    run = RecipeRunDirectory(recipe["run"]["run_dir"])
    saved = run.recipe_path
    ours = recipes.is_saved_recipe(saved)
    refuse_unusable(run.root, lambda: ours, f"{RECIPE_FILE} written by filial run", "--run-dir")
    if ours and not fresh:
        try:
            old = recipes.Recipe(tomllib.loads(saved.read_text(encoding="utf-8"))).comparable()
        except (OSError, ValueError, KeyError) as exc:
            raise recipes.RecipeError(f"{saved} cannot be read ({exc})") from exc
        changed = recipes.differences(old, recipe.comparable())
        if changed:
            raise recipes.RecipeError(
                f"{run.root} holds a run of another recipe, so it cannot be resumed:\n  "
                + "\n  ".join(changed)
                + "\nUse --fresh to start over there, or another --run-dir."
            )
    taken = claim(run.root)
    for note in taken.notes:
        print(f"filial: {note}", file=sys.stderr)
    return run, taken


def _start_over(run: RecipeRunDirectory, seeds: Sequence[int]) -> None:
    """``--fresh``, once every check has passed: remove the earlier run's TensorBoard runs and
    the lineages of seeds the recipe no longer has (each kept seed's lineage cleared itself)."""
    shutil.rmtree(run.tensorboard_path, ignore_errors=True)
    kept = {run.seed(s).root for s in seeds}
    for folder in run.seed_folders():
        if folder not in kept:
            shutil.rmtree(folder)


def _save_recipe(recipe: recipes.Recipe, run: RecipeRunDirectory) -> None:
    text = recipe.to_toml()
    atomic_write(run.recipe_path, lambda handle: handle.write(text.encode("utf-8")))


def _lineage(
    p: Plan, run: RecipeRunDirectory, seed: int, quiet: bool, fresh: bool = False
) -> Lineage:
    # Each seed's TensorBoard runs; the arms view across seeds is written by _train.
    tensorboard = TensorBoardRuns(run.seed_tensorboard(seed), alone=False)
    return Lineage(
        p.model_fn,
        p.train,
        p.heldout,
        run_dir=run.seed(seed).root,
        test_loader=p.test,
        progress=not quiet,
        tensorboard=False,
        observers=[tensorboard],
        fresh=fresh,
        unlabeled_loader=p.pool,
        admission=pool_admission(p.recipe) if p.pool is not None else None,
        **generation_settings(p.recipe, seed),
    )


def _train(
    p: Plan,
    run: RecipeRunDirectory,
    lineages: list[Lineage],
    on_terminal: bool,
    device: torch.device,
) -> None:
    training = p.recipe["training"]
    optimizer = recipes.build_optimizer(training)

    def make_fit(count: int) -> EpochFit:
        scheduler = recipes.build_scheduler(training, count)
        return fit_epochs(count, optimizer, scheduler, progress=on_terminal, device=device)

    fit = make_fit(training["epochs"])
    specs = baseline_plan(p.recipe)
    views: list[SeedView] = []
    on_terminal = on_terminal and distributed.is_main()
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
        baselines: dict[str, Mapping[str, Any]] = {}
        if specs and lineage.result.best is not None:
            run_settings = p.recipe["run"]
            baselines.update(
                lineage.baselines(
                    [spec.name for spec in specs],
                    make_fit,
                    every=run_settings["baseline_every"],
                    label_smoothing=run_settings["label_smoothing"],
                )
            )
        if distributed.is_main():  # TensorBoard's arms view, from the seeds finished so far
            result = lineage.result
            views.append(SeedView(seed, result.records, result.best, baselines))
            write_arms(run.tensorboard_path, views, finished=len(views) == len(lineages))


def _resume_command(argv: Sequence[str]) -> str:
    kept = [a for a in argv if a != "--fresh"]
    return "filial " + shlex.join(kept)


@dataclass
class Launch:
    """How this process runs the command: alone, or as one rank of a ``torchrun`` launch."""

    device: torch.device  # where the students train
    started: bool  # this command initialised the process group (and ends it)


def _launch(p: Plan) -> Launch:
    """Join the process group when ``torchrun`` started this process (its environment is set
    and no group exists yet): gloo for CPU training, nccl for CUDA, on ``cuda:LOCAL_RANK``."""
    device = recipes.training_device(p.recipe["training"])
    dist = torch.distributed
    if not dist.is_available() or not dist.is_torchelastic_launched() or dist.is_initialized():
        return Launch(device, False)
    if device.type == "cuda":
        device = torch.device("cuda", int(os.environ.get("LOCAL_RANK", "0")))
        torch.cuda.set_device(device)
    dist.init_process_group("nccl" if device.type == "cuda" else "gloo")
    return Launch(device, True)


def _open(
    p: Plan, args: argparse.Namespace, quiet: bool
) -> tuple[RecipeRunDirectory, Claim | None, list[Lineage]]:
    """Lock the run directory, save the recipe there first if the directory holds no run yet
    (its identity: from then on every moment is resumable), then build one Lineage per seed
    (each checks its data and model before it touches its folder and, with ``--fresh``, clears
    it); with ``--fresh`` remove the rest of the earlier run last.

    On a refusal or an interruption nothing is left behind that was not there: the locks are
    released, and what this call wrote into a directory that held no run is removed.

    Note: several processes. Rank 0 alone checks and locks the run directory, saves the recipe,
    clears an earlier run (the other ranks wait, and raise :class:`RankZeroFailed` if it
    fails); every rank builds the lineages, which coordinate themselves."""
    taken: Claim | None = None
    lineages: list[Lineage] = []
    run = RecipeRunDirectory(p.recipe["run"]["run_dir"])
    new_run = False

    def claim_and_identify() -> tuple[RecipeRunDirectory, Claim, bool]:
        claimed, lock = _prepare_run_dir(p.recipe, args.fresh)
        fault_point("start", "claimed")
        new = not claimed.recipe_path.is_file()
        if new:
            _save_recipe(p.recipe, claimed)
            fault_point("start", "recipe")
        return claimed, lock, new

    try:
        prepared = distributed.on_rank_zero(
            claim_and_identify, f"opening the run directory {run.root}"
        )
        if prepared is not None:
            run, taken, new_run = prepared
        seeds = p.recipe["run"]["seeds"]
        for s in seeds:
            lineages.append(_lineage(p, run, s, quiet=quiet, fresh=args.fresh))
            fault_point("start", seed_name(s))

        distributed.on_rank_zero(
            functools.partial(_finish_opening, p.recipe, run, seeds, args.fresh, new_run),
            f"saving the recipe in {run.root}",
        )
    except BaseException:
        _undo_opening(lineages, taken, new_run)
        raise
    return run, taken, lineages


def _finish_opening(
    recipe: recipes.Recipe, run: RecipeRunDirectory, seeds: list[int], fresh: bool, new_run: bool
) -> None:
    """With ``--fresh``, the rest of the earlier run goes last; the saved recipe says which
    baselines the run has."""
    if fresh and not new_run:
        _start_over(run, seeds)
        _save_recipe(recipe, run)
    elif not new_run and _baselines_changed(run, recipe):
        _save_recipe(recipe, run)


def _undo_opening(lineages: list[Lineage], taken: Claim | None, new_run: bool) -> None:
    """After a refused or interrupted start: close the lineages, release the lock, and remove
    what the start wrote into a directory that held no run."""
    for lineage in lineages:
        lineage.close()
    if taken is not None:
        taken.release()
        if taken.created:
            shutil.rmtree(taken.directory, ignore_errors=True)
        elif new_run:
            _remove_all_but_the_lock(taken.directory)


def _say(message: str) -> None:
    """An error on stderr: rank 0's plainly, another rank's with its rank (every rank says
    what stopped it; the report and the resume command come from rank 0)."""
    if not distributed.is_main():
        message = message.replace("filial: ", f"filial (rank {distributed.rank()}): ", 1)
    print(message, file=sys.stderr)


def _baselines_changed(run: RecipeRunDirectory, recipe: recipes.Recipe) -> bool:
    """Whether the run's saved recipe asks for other baselines (or other baseline settings)
    than this one; says which. Those baselines train (again), the rest of the run is kept."""
    saved = recipes.Recipe(tomllib.loads(run.recipe_path.read_text(encoding="utf-8")))
    old, new = saved.baselines(), recipe.baselines()
    changed = [
        f"run.{key}: {old[key]!r} in the run, {new[key]!r} now"
        for key in recipes.BASELINE_KEYS
        if old[key] != new[key]
    ]
    if changed:
        print(
            "filial: other baseline settings than the run's ("
            + "; ".join(changed)
            + "): a baseline whose settings changed trains again, finished lineages and "
            "baselines are kept",
            file=sys.stderr,
        )
    return bool(changed)


def _remove_all_but_the_lock(directory: Path) -> None:
    """Undo a refused start in a directory that held no run before (so nothing there was the
    user's: an existing folder is only used when it is empty)."""
    for entry in foreign_entries(directory):
        shutil.rmtree(entry, ignore_errors=True) if entry.is_dir() else entry.unlink()


Opened = tuple[Plan, Launch, RecipeRunDirectory, Claim | None, list[Lineage], bool]


def _start(args: argparse.Namespace, argv: Sequence[str]) -> Opened | int:
    """Read the recipe, join a torchrun launch, open the run directory and build the
    lineages; an exit code when that is refused or interrupted (nothing is left behind)."""
    launch: Launch | None = None
    try:
        p = plan(args.recipe, args.set, args.run_dir)
        launch = _launch(p)
        if distributed.is_distributed():
            p.train = sharded_loader(p.train, distributed.world_size(), distributed.rank())
        on_terminal = sys.stderr.isatty() and distributed.is_main()
        run, taken, lineages = _open(p, args, quiet=on_terminal)
    except (
        recipes.RecipeError,
        InputError,
        LockedError,
        ValueError,
        TypeError,
        RankZeroFailed,
    ) as exc:
        _say(f"filial: {exc}")
        _end(launch, wait=False)
        return EXIT_USAGE
    except KeyboardInterrupt:
        _say(
            "\nfilial: interrupted before any generation trained; nothing new was kept. Run it "
            f"again with:\n  filial {shlex.join(argv)}"
        )
        _end(launch, wait=False)
        return EXIT_INTERRUPTED
    return p, launch, run, taken, lineages, on_terminal


def _run(args: argparse.Namespace, argv: Sequence[str]) -> int:
    started = _start(args, argv)
    if isinstance(started, int):
        return started
    p, launch, run, taken, lineages, on_terminal = started
    resume = _resume_command(argv)
    kept = (
        f"--fresh removed the earlier run in {run.root} before this one started; the "
        "generations this run finished are kept there"
        if args.fresh
        else f"Finished generations are kept in {run.root}"
    )
    done = False
    try:
        _train(p, run, lineages, on_terminal, launch.device)
        done = True
    except InputError as exc:  # found while running (e.g. a model whose width changes)
        _say(f"\nfilial: {exc}\n{kept}; fix the input and rerun\n  {resume}")
        return EXIT_USAGE
    except KeyboardInterrupt:
        _say(
            f"\nfilial: interrupted. {run.root} keeps every finished generation; resume with:\n"
            f"  {resume}"
        )
        return EXIT_INTERRUPTED
    except Exception as exc:  # report, keep the run directory, exit 1
        traceback.print_exc(file=sys.stderr)
        _say(
            f"filial: the run failed: {type(exc).__name__}: {exc}\n"
            f"{kept}; fix the cause and rerun\n  {resume}"
        )
        return EXIT_FAILED
    finally:
        for lineage in lineages:
            lineage.close()
        if taken is not None:
            taken.release()
        if not done:
            _end(launch, wait=False)
    if distributed.is_main():
        print(format_report(summarize(run.root)))
    _end(launch, wait=True)
    return EXIT_OK


def _end(launch: Launch | None, wait: bool) -> None:
    """Leave the process group this command joined; after a barrier when the run succeeded, so
    that no rank leaves while another still reads what rank 0 wrote (never after a failure,
    where another rank may be gone)."""
    if launch is not None and launch.started and distributed.is_distributed():
        if wait:
            distributed.barrier()
        torch.distributed.destroy_process_group()


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


def _forecast(args: argparse.Namespace) -> int:
    """``filial forecast RUN``: the spectral forecast of each lineage, beside what it did."""
    from .report import forecast_lines
    from .spectral import forecast_run

    root = Path(args.run_dir)
    recipe_run = RecipeRunDirectory(root)
    folders = [root] if RunDirectory(root).state_path.is_file() else recipe_run.seed_folders()
    if not folders:
        print(f"filial: {root} holds no lineage (no lineage.json, no seedS/)", file=sys.stderr)
        return EXIT_USAGE
    found: dict[str, Any] = {}
    try:
        for folder in folders:
            found[str(folder)] = forecast_run(folder, generations=args.generations)
    except (ValueError, OSError, KeyError) as exc:
        print(f"filial: {exc}", file=sys.stderr)
        return EXIT_USAGE
    if args.json:
        print(json.dumps(found, indent=2))
        return EXIT_OK
    for name, compared in found.items():
        print("\n".join([name, *forecast_lines(compared), ""]))
    return EXIT_OK


def parser() -> argparse.ArgumentParser:
    top = argparse.ArgumentParser(
        prog="filial",
        description="Multi-generation self-distillation from TOML recipes.",
    )
    top.add_argument("--version", action="version", version=f"filial {__version__}")
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
    run.add_argument(
        "--run-dir",
        help="where to write the run (default: the recipe's run.run_dir if it sets one, else "
        "runs/RUN_NAME with the recipe's run.name, e.g. runs/digits_ce)",
    )
    run.add_argument(
        "--fresh",
        action="store_true",
        help="delete an earlier filial run in that directory first (only filial's files)",
    )
    report = sub.add_parser("report", help="print what a run found")
    report.add_argument(
        "run_dir", help="a run directory made by filial run (or by a Lineage), e.g. runs/digits_ce"
    )
    report.add_argument("--json", action="store_true", help="print the report as JSON")
    report.add_argument(
        "--plot",
        metavar="FILE.png",
        help="also draw the metric by generation against generation 0 and each baseline into "
        "FILE.png (needs matplotlib: pip install 'filial[plot]')",
    )
    forecast = sub.add_parser(
        "forecast",
        help="the spectral forecast of a run whose generation 0 finished (spectrum_samples > 0)",
    )
    forecast.add_argument("run_dir", help="a run directory, e.g. runs/digits_ce")
    forecast.add_argument(
        "--generations", type=int, help="forecast this many generations (default: the run's max)"
    )
    forecast.add_argument("--json", action="store_true", help="print the forecast as JSON")
    return top


def main(argv: Sequence[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    args = parser().parse_args(argv)
    if args.command == "run":
        return _run(args, argv)
    if args.command == "forecast":
        return _forecast(args)
    return _report(args)
