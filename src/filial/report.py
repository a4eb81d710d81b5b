"""What a run found, read back from its directory: tables, the stop reason in words, seeds.

:func:`summarize` reads a run directory made by ``filial run`` (``recipe.toml`` with one lineage
per seed under ``seedS/``) or by a single :class:`~filial.Lineage` (``lineage.json``) and returns
plain data (what ``filial report --json`` prints); :func:`format_report` turns it into text.
Every file is read through :mod:`filial.reading`, which checks it first: a damaged or
hand-edited file is a :class:`~filial.reading.RunFileError` naming the file and the field (the
command exits 2), never a traceback or a report of fewer lineages than the recipe has.
"""

from __future__ import annotations

import statistics
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import torch

from .metrics import default_metric
from .reading import (
    RunFileError,
    check_directory,
    read_array,
    read_baseline,
    read_saved_recipe,
    read_state,
)
from .records import is_number
from .rundir import RECIPE_FILE, STATE_FILE, RecipeRunDirectory, RunDirectory
from .stopping import paired_bootstrap

_REASONS = {
    "no-gain": (
        "no generation beat the best held-out metric by more than min_gain={min_gain} for "
        "patience={patience} generations: further generations over-regularise"
    ),
    "collapse": "the predictions degenerated ({why}): repeated distillation shrinks them to a "
    "constant, so the lineage stopped",
    "diverged": "generation {generation}'s loss or outputs were not finite; it is never kept",
    "max-generations": "the last allowed generation (max_generations={max_generations}) finished",
}


def reason_in_words(decision: dict[str, Any] | None, settings: dict[str, Any]) -> str:
    """The stop reason as a sentence (or 'still running')."""
    if not decision or not decision.get("stop"):
        return "not finished yet (resume with the same command)"
    reason = decision["reason"]
    values = {**settings, **(decision.get("detail") or {})}
    try:
        text = _REASONS[reason].format(**values)
    except (KeyError, IndexError):
        text = reason
    return f"{reason}: {text}"


def _gain_interval(
    run: RunDirectory, records: list[dict[str, Any]], best: int | None
) -> dict[str, Any] | None:
    """Paired bootstrap of the kept generation's held-out gain over generation 0 (default
    metric only: a custom metric is not stored with the run)."""
    if best is None:
        return None
    labels_path, first_path, kept_path = run.heldout_labels_path, run.heldout(0), run.heldout(best)
    labels, first, kept = (read_array(p) for p in (labels_path, first_path, kept_path))
    if first.ndim != 2 or kept.shape != first.shape:
        raise RunFileError(
            f"{kept_path} holds outputs of shape {kept.shape} and {first_path} of shape "
            f"{first.shape}; both should be (held-out samples, outputs), the same"
        )
    rows = first.shape[0]
    float_labels = np.issubdtype(labels.dtype, np.floating)
    if labels.ndim < 1 or len(labels) != rows or (float_labels and labels.size != first.size):
        raise RunFileError(
            f"{labels_path} holds labels of shape {labels.shape}, but {first_path} holds "
            f"{rows} held-out outputs of width {first.shape[1]}; one of them is damaged"
        )
    labels_t = torch.from_numpy(labels)
    interval = paired_bootstrap(
        default_metric(labels_t), torch.from_numpy(first), torch.from_numpy(kept), labels_t
    )
    return {
        "observed": interval.observed,
        "low": interval.low,
        "high": interval.high,
        "level": interval.level,
        "resamples": interval.resamples,
    }


def summarize_lineage(
    lineage_dir: str | Path, seed: int | None = None, hint: str = ""
) -> dict[str, Any]:
    """One lineage's records, decision, kept generation, gain interval and baseline.

    Every file read is checked first (:mod:`filial.reading`); ``hint`` ends the message when
    ``lineage.json`` is missing.
    """
    run = RunDirectory(lineage_dir)
    lineage_dir, state_path = run.root, run.state_path
    state = read_state(state_path, hint)
    records = state["records"]
    decision = state.get("decision") or {}
    settings = state["settings"]
    if seed is not None and settings["seed"] != seed:
        raise RunFileError(
            f"{state_path}: settings.seed is {settings['seed']}, but the folder is "
            f"{lineage_dir.name} of seed {seed}; the seed folders were renamed or mixed up"
        )
    best = decision.get("best") if records else None
    baseline_path = run.baseline_state_path
    return {
        "seed": settings["seed"],
        "lineage_dir": str(lineage_dir),
        "targets": settings["targets"],
        "records": records,
        "best": best,
        "stop_reason": decision.get("reason") if decision.get("stop") else None,
        "stop_in_words": reason_in_words(decision, settings),
        "checkpoint": str(run.recorded(records[best]["checkpoint"])) if best is not None else None,
        "gain": _gain_interval(run, records, best) if settings["metric"] == "default" else None,
        "baseline": read_baseline(baseline_path) if _exists(baseline_path) else None,
    }


def _exists(path: Path) -> bool:
    """Present in any form (a directory or a dangling link where a file belongs is named by
    the reader, not skipped)."""
    return path.is_symlink() or path.exists()


def spread(values: Sequence[float | None]) -> tuple[float | None, float | None]:
    """Mean and sample standard deviation of the finite values (0.0 for one value)."""
    numbers = [float(v) for v in values if is_number(v)]
    if not numbers:
        return None, None
    return statistics.fmean(numbers), statistics.stdev(numbers) if len(numbers) > 1 else 0.0


def summarize(run_dir: str | Path) -> dict[str, Any]:
    """Everything ``filial report`` shows, as plain data.

    Raises :class:`~filial.reading.RunFileError` (an InputError) naming the file and field of
    anything it cannot read, including a seed of the recipe whose lineage is missing.
    """
    run_dir = Path(run_dir)
    check_directory(run_dir)
    recipe_run = RecipeRunDirectory(run_dir)
    recipe_path, state_path = recipe_run.recipe_path, RunDirectory(run_dir).state_path
    if _exists(recipe_path):
        recipe = read_saved_recipe(recipe_path)
        seeds = recipe["run"]["seeds"]
        hint = (
            f", but {recipe_path} lists seed {{seed}} (run.seeds = {seeds}): its lineage was "
            "moved or deleted, or the run stopped before that seed began (rerun the same "
            "filial run command to resume)"
        )
        lineages = [
            summarize_lineage(recipe_run.seed(s).root, s, hint.format(seed=s)) for s in seeds
        ]
    elif _exists(state_path):
        recipe = None
        lineages = [summarize_lineage(run_dir)]
    else:
        raise RunFileError(
            f"{run_dir} is not a filial run directory (no {RECIPE_FILE} and no {STATE_FILE})"
        )
    tensorboard = recipe_run.tensorboard_path
    depth = max((len(x["records"]) for x in lineages), default=0)
    generations = []
    for g in range(depth):
        row: dict[str, Any] = {"generation": g}
        present = [x["records"][g] for x in lineages if len(x["records"]) > g]
        row["seeds"] = len(present)
        for key in ("heldout", "test", "train", "ensemble"):
            row[f"{key}_mean"], row[f"{key}_std"] = spread([r.get(key) for r in present])
        generations.append(row)
    return {
        "run_dir": str(run_dir),
        "recipe": recipe,
        "lineages": lineages,
        "generations": generations,
        "chosen": {str(x["seed"]): x["best"] for x in lineages},
        "tensorboard": f"tensorboard --logdir {tensorboard}" if tensorboard.is_dir() else None,
    }


def generation_table(
    records: Sequence[Mapping[str, Any]], best: int | None, targets: str | None = None
) -> str:
    """One row per generation: held-out, test, train vs labels, ensemble, entropy/norm, seconds."""
    if targets is None:
        targets = "ce" if any("target_entropy" in r for r in records) else "l2"
    column = "target_entropy" if targets == "ce" else "output_norm"
    header = f"{'gen':>4} {'held-out':>9} {'test':>7} {'train':>7} {'ensemble':>9} "
    header += f"{column.replace('_', ' '):>15} {'agree':>6} {'seconds':>8}"
    lines = [header]

    def cell(value: Any, width: int) -> str:
        return f"{value:>{width}.4f}" if isinstance(value, float) else f"{'-':>{width}}"

    for r in records:
        mark = (
            "  <- kept" if r["generation"] == best else ("  diverged" if r.get("diverged") else "")
        )
        lines.append(
            f"{r['generation']:>4} {cell(r['heldout'], 9)} {cell(r['test'], 7)} "
            f"{cell(r['train'], 7)} {cell(r['ensemble'], 9)} {cell(r.get(column), 15)} "
            f"{cell(r['agreement'], 6)} {r['seconds']:>8.2f}{mark}"
        )
    return "\n".join(lines)


def _signed(value: float) -> str:
    return f"{value:+.4f}"


def format_report(summary: dict[str, Any]) -> str:
    """The text of ``filial report``."""
    out = [f"run {summary['run_dir']}: {len(summary['lineages'])} lineage(s)"]
    for x in summary["lineages"]:
        out.append("")
        out.append(f"seed {x['seed']} ({x['targets']} targets, {x['lineage_dir']})")
        out.append(generation_table(x["records"], x["best"], x["targets"]))
        out.append(f"stopped: {x['stop_in_words']}")
        if x["best"] is not None:
            out.append(f"kept generation {x['best']}: {x['checkpoint']}")
        gain = x["gain"]
        if x["best"] == 0:
            out.append("generation 0 was kept: later generations did not beat it on held-out data")
        elif gain is not None:
            out.append(
                f"held-out gain of generation {x['best']} over generation 0: "
                f"{_signed(gain['observed'])} (paired bootstrap {gain['level']:.0%} interval "
                f"{_signed(gain['low'])} to {_signed(gain['high'])}, {gain['resamples']} resamples)"
            )
        base = x["baseline"]
        if base is not None and x["best"] is not None:
            kept = x["records"][x["best"]]
            head = f"matched baseline ({base['epochs_matched']} epochs on the labels):"
            if base.get("heldout") is None:
                out.append(f"{head} diverged")
            else:
                line = f"{head} held-out {base['heldout']:.4f} against {kept['heldout']:.4f}"
                line += " for the kept generation"
                if base.get("test") is not None and kept.get("test") is not None:
                    line += f"; test {base['test']:.4f} against {kept['test']:.4f}"
                out.append(line)
    if len(summary["lineages"]) > 1:
        out.append("")
        out.append("across seeds (mean +- standard deviation)")
        out.append(f"{'gen':>4} {'seeds':>5} {'held-out':>17} {'test':>17} {'train':>17}")

        def pair(row: dict[str, Any], key: str) -> str:
            mean, std = row[f"{key}_mean"], row[f"{key}_std"]
            return f"{'-':>17}" if mean is None else f"{mean:>9.4f} +-{std:.4f}"

        for row in summary["generations"]:
            out.append(
                f"{row['generation']:>4} {row['seeds']:>5} {pair(row, 'heldout')} "
                f"{pair(row, 'test')} {pair(row, 'train')}"
            )
        chosen = ", ".join(f"seed {s}: {g}" for s, g in summary["chosen"].items())
        out.append(f"chosen generation per seed: {chosen}")
    if summary["tensorboard"]:
        out.append("")
        out.append(f"TensorBoard: {summary['tensorboard']}")
    return "\n".join(out)
