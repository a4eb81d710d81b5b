"""What a run found, read back from its directory: tables, the stop reason in words, seeds.

:func:`summarize` reads a run directory made by ``filial run`` (``recipe.toml`` with one lineage
per seed under ``seedS/``) or by a single :class:`~filial.Lineage` (``lineage.json``) and returns
plain data (what ``filial report --json`` prints); :func:`format_report` turns it into text.
"""

from __future__ import annotations

import json
import statistics
import tomllib
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import torch

from .metrics import default_metric
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


def _read_json(path: Path) -> dict[str, Any]:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise ValueError(f"{path} cannot be read ({exc})") from exc


def _gain_interval(
    run: RunDirectory, records: list[dict[str, Any]], best: int | None
) -> dict[str, Any] | None:
    """Paired bootstrap of the kept generation's held-out gain over generation 0 (default
    metric only: a custom metric is not stored with the run)."""
    if best is None or not run.heldout_labels_path.is_file():
        return None

    def load(path: Path) -> torch.Tensor:
        return torch.from_numpy(np.load(path, allow_pickle=False))

    labels = load(run.heldout_labels_path)
    interval = paired_bootstrap(
        default_metric(labels), load(run.heldout(0)), load(run.heldout(best)), labels
    )
    return {
        "observed": interval.observed,
        "low": interval.low,
        "high": interval.high,
        "level": interval.level,
        "resamples": interval.resamples,
    }


def summarize_lineage(lineage_dir: str | Path, seed: int | None = None) -> dict[str, Any]:
    """One lineage's records, decision, kept generation, gain interval and baseline."""
    run = RunDirectory(lineage_dir)
    state = _read_json(run.state_path)
    records = state.get("records") or []
    decision = state.get("decision") or {}
    settings = state.get("settings") or {}
    best = decision.get("best") if records else None
    default_metric_used = settings.get("metric") == "default"
    baseline_path = run.baseline_state_path
    return {
        "seed": settings.get("seed") if seed is None else seed,
        "lineage_dir": str(run.root),
        "targets": settings.get("targets"),
        "records": records,
        "best": best,
        "stop_reason": decision.get("reason") if decision.get("stop") else None,
        "stop_in_words": reason_in_words(decision, settings),
        "checkpoint": str(run.recorded(records[best]["checkpoint"])) if best is not None else None,
        "gain": _gain_interval(run, records, best) if default_metric_used else None,
        "baseline": _read_json(baseline_path) if baseline_path.is_file() else None,
    }


def spread(values: Sequence[float | None]) -> tuple[float | None, float | None]:
    """Mean and sample standard deviation of the finite values (0.0 for one value)."""
    numbers = [float(v) for v in values if is_number(v)]
    if not numbers:
        return None, None
    return statistics.fmean(numbers), statistics.stdev(numbers) if len(numbers) > 1 else 0.0


def summarize(run_dir: str | Path) -> dict[str, Any]:
    """Everything ``filial report`` shows, as plain data."""
    run_dir = Path(run_dir)
    recipe_run = RecipeRunDirectory(run_dir)
    if recipe_run.recipe_path.is_file():
        recipe = tomllib.loads(recipe_run.recipe_path.read_text(encoding="utf-8"))
        seeds = recipe["run"]["seeds"]
        lineages = [
            summarize_lineage(recipe_run.seed(s).root, s)
            for s in seeds
            if recipe_run.seed(s).is_run
        ]
        tensorboard = recipe_run.tensorboard_path
    elif RunDirectory(run_dir).is_run:
        recipe = None
        lineages = [summarize_lineage(run_dir)]
        tensorboard = RunDirectory(run_dir).tensorboard_path
    else:
        raise ValueError(
            f"{run_dir} is not a filial run directory (no {RECIPE_FILE} and no {STATE_FILE})"
        )
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
