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

from .baselines import BASELINES, EARLY_STOPPED
from .crossfit import cross_fit, halves
from .evidence import Arm, across_seeds, closest, compare
from .metrics import default_metric, sample_scores
from .pool import pool_lines
from .reading import (
    RunFileError,
    check_directory,
    read_array,
    read_baseline,
    read_saved_recipe,
    read_state,
)
from .records import is_number
from .rundir import HELDOUT_FILE, RECIPE_FILE, STATE_FILE, RecipeRunDirectory, RunDirectory
from .spectral import compare_forecast

_REASONS = {
    "no-gain": (
        "no generation beat generation {last_gain} by more than min_gain={min_gain} for "
        "patience={patience} generations"
    ),
    "collapse": "the predictions degenerated ({why}), so the lineage stopped",
    "diverged": "generation {generation}'s loss or outputs were not finite; it is never kept",
    "max-generations": "the last allowed generation (max_generations={max_generations}) finished",
    "forecast": (
        "the spectral forecast's best generation ({forecast_best}) was trained "
        "(spectrum_stop=True)"
    ),
}
# Records written before the stop detail named the last gain.
_NO_GAIN_BEFORE = (
    "no generation beat the best held-out metric by more than min_gain={min_gain} for "
    "patience={patience} generations"
)


def reason_in_words(
    decision: dict[str, Any] | None,
    settings: dict[str, Any],
    records: Sequence[Mapping[str, Any]] = (),
) -> str:
    """The stop reason as a sentence (or 'still running'): what the records show, and for
    ``no-gain`` the over-regularisation signature only when ``records`` show it."""
    if not decision or not decision.get("stop"):
        return "not finished yet (resume with the same command)"
    reason = decision["reason"]
    detail = decision.get("detail") or {}
    values = {**settings, **detail}
    template = _REASONS.get(reason, "")
    if reason == "no-gain" and "last_gain" not in values:
        template = _NO_GAIN_BEFORE
    try:
        text = template.format(**values) if template else reason
    except (KeyError, IndexError):
        text = reason
    if reason == "no-gain" and is_int(detail.get("last_gain")):
        text += _over_regularised(records, int(detail["last_gain"]))
    return f"{reason}: {text}"


def is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _over_regularised(records: Sequence[Mapping[str, Any]], last_gain: int) -> str:
    """The signature of over-regularisation, when the records show it: after generation
    ``last_gain`` the training fit against the labels fell at every generation while the
    held-out metric ended below that generation's (repeated self-distillation suppresses
    ever more of the fit to the labels, Mobahi, Farajtabar & Bartlett 2020); else nothing."""
    after = [r for r in records if r["generation"] >= last_gain]
    if len(after) < 2 or any(r.get("diverged") for r in after):
        return ""
    if not all(is_number(r.get("train")) and is_number(r.get("heldout")) for r in after):
        return ""
    train = [float(r["train"]) for r in after]
    heldout = [float(r["heldout"]) for r in after]
    falling = all(b < a for a, b in zip(train, train[1:], strict=False))
    if not (falling and heldout[-1] < heldout[0]):
        return ""
    last = after[-1]["generation"]
    return (
        f"; the records show over-regularisation: from generation {last_gain} to {last} the "
        f"training fit against the labels fell at every generation ({train[0]:.4f} to "
        f"{train[-1]:.4f}) while held-out fell ({heldout[0]:.4f} to {heldout[-1]:.4f})"
    )


def _baselines(run: RunDirectory) -> dict[str, dict[str, Any]]:
    """The finished baselines of a lineage by name, in the order of :data:`BASELINES`; the
    matched baseline of the earlier layout (``RUN/baseline/baseline.json``) when there is no
    new one."""
    found: dict[str, dict[str, Any]] = {}
    for name in BASELINES:
        path = run.baseline_record(name)
        if _exists(path):
            found[name] = read_baseline(path, name)
        elif name == "matched" and _exists(run.baseline_state_path):
            found[name] = read_baseline(run.baseline_state_path)
    return found


class _Evidence:
    """A lineage's arms (:class:`~filial.evidence.Arm`) read from its files, and what they
    show; for the default metric only (a custom metric is not stored with the run)."""

    def __init__(self, run: RunDirectory, seed: int, records: list[dict[str, Any]]) -> None:
        self.run = run
        self.labels = read_array(run.heldout_labels_path)
        labels_t = torch.from_numpy(self.labels)
        scorer = sample_scores(default_metric(labels_t))
        assert scorer is not None  # a built-in metric
        self._score = lambda outputs: scorer(torch.from_numpy(outputs), labels_t).numpy()
        self.split = halves(len(self.labels), seed) if len(self.labels) >= 2 else None
        self._shape: tuple[Path, tuple[int, ...]] | None = None
        self.scores = [
            None if r.get("diverged") else self._score(self._outputs(run.heldout(g)))
            for g, r in enumerate(records)
        ]
        self.records = records

    def _outputs(self, path: Path) -> np.ndarray:
        """A held-out outputs file, checked against the held-out labels and against the
        first outputs read (every model scores the same samples with the same width)."""
        outputs, labels = read_array(path), self.labels
        if self._shape is not None and outputs.shape != self._shape[1]:
            first, shape = self._shape
            raise RunFileError(
                f"{path} holds outputs of shape {outputs.shape} and {first} of shape {shape}; "
                "both should be (held-out samples, outputs), the same"
            )
        rows = outputs.shape[0] if outputs.ndim == 2 else -1
        float_labels = np.issubdtype(labels.dtype, np.floating)
        if (
            outputs.ndim != 2
            or labels.ndim < 1
            or len(labels) != rows
            or (float_labels and labels.size != outputs.size)
        ):
            width = outputs.shape[1] if outputs.ndim == 2 else "?"
            raise RunFileError(
                f"{self.run.heldout_labels_path} holds labels of shape {labels.shape}, but "
                f"{path} holds {rows} held-out outputs of width {width} (shape "
                f"{outputs.shape}); one of them is damaged"
            )
        if self._shape is None:
            self._shape = (path, outputs.shape)
        return outputs

    @property
    def samples(self) -> int:
        return len(self.labels)

    def kept(self, best: int) -> tuple[Arm, dict[str, Any] | None]:
        """The kept generation, its cross-fitted scores (the generation chosen on one half,
        scored on the other) and what the choices were."""
        eligible = [s is not None for s in self.scores]
        plain = self.scores[best]
        assert plain is not None  # the kept generation did not diverge
        arm = Arm(f"generation {best}", plain, None, self.records[best].get("test"))
        if self.split is None:
            return arm, None
        matrix = np.stack([s if s is not None else np.zeros_like(plain) for s in self.scores])
        fitted = cross_fit(matrix, self.split, eligible)
        arm.fitted = fitted.scores
        return arm, {
            "kept": fitted.value,
            "choices": list(fitted.choices),
            "halves": [len(self.split[0]), len(self.split[1])],
        }

    def first(self) -> Arm | None:
        scores = self.scores[0]
        if scores is None:
            return None
        return Arm("generation 0", scores, scores, self.records[0].get("test"))

    def baseline(self, name: str, record: dict[str, Any]) -> Arm | None:
        """A baseline's arm: its reported model's scores, and the cross-fitted scores of its
        epoch choice (early-stopped) or its plain scores (matched: it chose nothing)."""
        if record.get("diverged") or record.get("heldout") is None:
            return None
        checkpoint = self.run.recorded(record["checkpoint"])
        plain = self._score(self._outputs(checkpoint.parent / HELDOUT_FILE))
        detail: dict[str, Any] = {"epochs_matched": record["epochs_matched"]}
        fitted: np.ndarray | None = plain
        if name in EARLY_STOPPED:
            detail["best_epoch"] = record.get("best_epoch")
            fitted = self._epoch_choice(record, detail)
        if name == "label-smoothing":
            detail["label_smoothing"] = record.get("label_smoothing")
        return Arm(name, plain, fitted, record.get("test"), detail)

    def _epoch_choice(self, record: dict[str, Any], detail: dict[str, Any]) -> np.ndarray | None:
        entry = record.get("heldout_epochs")
        if entry is None or self.split is None:
            return None
        path = self.run.recorded(entry)
        rows = read_array(path)
        evaluated = record.get("evaluated") or []
        if rows.ndim != 2 or rows.shape != (len(evaluated), self.samples):
            raise RunFileError(
                f"{path} holds scores of shape {rows.shape}, but the record names "
                f"{len(evaluated)} evaluated epochs of {self.samples} held-out samples; one of "
                "them is damaged"
            )
        eligible = [bool(np.isfinite(row).all()) for row in rows]
        if not any(eligible):
            return None
        fitted = cross_fit(np.nan_to_num(rows), self.split, eligible)
        detail["cross_fitted_epochs"] = [evaluated[c] for c in fitted.choices]
        detail["cross_fitted"] = fitted.value
        return fitted.scores


def _evidence(
    run: RunDirectory,
    settings: dict[str, Any],
    records: list[dict[str, Any]],
    best: int | None,
    baselines: dict[str, dict[str, Any]],
) -> tuple[dict[str, Any], list[tuple[Arm, Arm]]]:
    """The comparisons of the kept generation (plain data) and the arm pairs behind them."""
    empty: dict[str, Any] = {
        "comparisons": [],
        "cross_fitted": None,
        "samples": None,
        "matched_vs_first": None,
    }
    if best is None or settings["metric"] != "default":
        return empty, []
    found = _Evidence(run, settings["seed"], records)
    kept, fitted = found.kept(best)
    others = [found.first()] + [found.baseline(n, r) for n, r in baselines.items()]
    pairs = [(kept, other) for other in others if other is not None]
    arms = {other.name: other for _, other in pairs}
    if fitted is not None:
        fitted["baselines"] = {
            o.name: o.detail["cross_fitted"] for _, o in pairs if "cross_fitted" in o.detail
        }
    matched, first = arms.get("matched"), arms.get("generation 0")
    return {
        "comparisons": [compare(k, o) for k, o in pairs],
        "cross_fitted": fitted,
        "samples": found.samples,
        # what more epochs on the labels did: the matched baseline against generation 0
        "matched_vs_first": compare(matched, first) if matched and first else None,
    }, pairs


def summarize_lineage(
    lineage_dir: str | Path, seed: int | None = None, hint: str = ""
) -> dict[str, Any]:
    """One lineage's records, decision, kept generation, baselines and what the comparisons
    show (gains with intervals, plain and cross-fitted, and the verdict).

    Every file read is checked first (:mod:`filial.reading`); ``hint`` ends the message when
    ``lineage.json`` is missing.
    """
    return _lineage(lineage_dir, seed, hint)[0]


def _lineage(
    lineage_dir: str | Path, seed: int | None = None, hint: str = ""
) -> tuple[dict[str, Any], list[tuple[Arm, Arm]]]:
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
    baselines = _baselines(run)
    evidence, pairs = _evidence(run, settings, records, best, baselines)
    first = next((c for c in evidence["comparisons"] if c["against"] == "generation 0"), None)
    summary = {
        "seed": settings["seed"],
        "lineage_dir": str(lineage_dir),
        "targets": settings["targets"],
        "records": records,
        "best": best,
        "stop_reason": decision.get("reason") if decision.get("stop") else None,
        "stop_in_words": reason_in_words(decision, settings, records),
        "checkpoint": str(run.recorded(records[best]["checkpoint"])) if best is not None else None,
        # the kept generation over generation 0 (plain), as earlier reports gave it
        "gain": first["plain"] if first is not None else None,
        "baseline": baselines.get("matched"),
        "baselines": baselines,
        "forecast": compare_forecast(records),
        **evidence,
    }
    summary["verdict"] = verdict(summary)
    return summary, pairs


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
        found = [_lineage(recipe_run.seed(s).root, s, hint.format(seed=s)) for s in seeds]
    elif _exists(state_path):
        recipe = None
        found = [_lineage(run_dir)]
    else:
        raise RunFileError(
            f"{run_dir} is not a filial run directory (no {RECIPE_FILE} and no {STATE_FILE})"
        )
    lineages = [x for x, _ in found]
    tensorboard = recipe_run.tensorboard_path
    depth = max((len(x["records"]) for x in lineages), default=0)
    generations = []
    for g in range(depth):
        row: dict[str, Any] = {"generation": g}
        present = [x["records"][g] for x in lineages if len(x["records"]) > g]
        row["seeds"] = len(present)
        row["of_seeds"] = len(lineages)
        for key in ("heldout", "test", "train", "ensemble"):
            row[f"{key}_mean"], row[f"{key}_std"] = spread([r.get(key) for r in present])
            if len(present) < 2:
                row[f"{key}_std"] = None  # one seed has no spread
        generations.append(row)
    return {
        "run_dir": str(run_dir),
        "recipe": recipe,
        "lineages": lineages,
        "generations": generations,
        "chosen": {str(x["seed"]): x["best"] for x in lineages},
        "across": _across(found) if len(found) > 1 else None,
        "tensorboard": f"tensorboard --logdir {tensorboard}" if tensorboard.is_dir() else None,
    }


def _across(found: list[tuple[dict[str, Any], list[tuple[Arm, Arm]]]]) -> dict[str, Any]:
    """The gains averaged over the seeds, each with one interval: every resample draws the same
    held-out samples for every seed (so the seeds must share one held-out set)."""
    seeds = len(found)
    out: dict[str, Any] = {"seeds": seeds, "comparisons": [], "samples": None, "note": None}
    if not all(pairs for _, pairs in found):
        out["note"] = "some seeds have no intervals (a custom metric or no kept generation)"
        return out
    labels = [read_array(RunDirectory(x["lineage_dir"]).heldout_labels_path) for x, _ in found]
    if any(a.shape != labels[0].shape or not np.array_equal(a, labels[0]) for a in labels):
        out["note"] = "the seeds were held out on different samples, so no joint interval"
        return out
    names = [o.name for _, o in found[0][1]]
    for name in names:
        pairs = [next((p for p in pairs if p[1].name == name), None) for _, pairs in found]
        if all(p is not None for p in pairs):
            out["comparisons"].append(across_seeds([p for p in pairs if p is not None]))
    out["samples"] = len(labels[0])
    kept = [x["best"] for x, _ in found]
    subject = "generations" if any(k for k in kept) else "the lineages (generation 0 kept by each)"
    out["verdict"] = _verdict(out["comparisons"], out["samples"], subject, seeds)
    return out


# -- verdicts ----------------------------------------------------------------------------


def _interval_words(found: dict[str, Any]) -> str:
    return f"{found['level']:.0%} interval {_signed(found['low'])} to {_signed(found['high'])}"


def _gain_of(c: dict[str, Any]) -> tuple[dict[str, Any], str]:
    """The figure a comparison is judged on: cross-fitted when there is one."""
    if c["cross_fitted"] is not None:
        return c["cross_fitted"], "cross-fitted"
    return c["plain"], "plain"


def _verdict(
    comparisons: list[dict[str, Any]], samples: int | None, subject: str, seeds: int = 1
) -> dict[str, Any]:
    """One sentence on the comparisons: against the closest baseline when there are
    baselines, else against generation 0; established, inconclusive or worse."""
    on = f"on {samples} held-out samples" + (f" ({seeds} seeds)" if seeds > 1 else "")
    baselines = [c for c in comparisons if c["against"] != "generation 0"]
    target = closest(baselines) if baselines else closest(comparisons)
    if target is None:
        return {"text": None, "status": None, "closest": None}
    gain, kind = _gain_of(target)
    name, status = target["against"], target["status"]
    if baselines:
        early = any(c["against"] in EARLY_STOPPED for c in baselines)
        opponent = "early stopping" if early else "the matched baseline"
        which = f"the closest baseline, {name}," if len(baselines) > 1 else name
    else:
        opponent = which = "generation 0"
    figures = f"{kind} gain {_signed(gain['observed'])}, {_interval_words(gain)}"
    if status == "established":
        text = (
            f"{subject} beat {opponent}: by {_signed(gain['observed'])} over "
            f"{which.rstrip(',')} ({figures}), established {on}"
        )
    elif status == "worse":
        text = (
            f"{subject} did not beat {opponent}: {which} did better by "
            f"{-gain['observed']:.4f} ({figures}), established {on}"
        )
    elif gain["observed"] < 0:
        text = (
            f"not established that {subject} beat {opponent}, nor that they did worse: "
            f"{which} did better by {-gain['observed']:.4f} ({figures}): inconclusive {on}"
        )
    else:
        text = (
            f"not established that {subject} beat {opponent}: {_signed(gain['observed'])} "
            f"over {which.rstrip(',')} ({figures}): inconclusive {on}"
        )
    return {"text": text, "status": status, "closest": name, "gain": gain, "judged_on": kind}


def verdict(lineage: dict[str, Any]) -> dict[str, Any]:
    """The verdict of one lineage of :func:`summarize` (``lineage["verdict"]``)."""
    best = lineage["best"]
    if best is None:
        return {"text": None, "status": None, "closest": None}
    baselines = [c for c in lineage["comparisons"] if c["against"] != "generation 0"]
    if best == 0 and not baselines:
        text = (
            "generation 0 was kept: no later generation beat it on held-out data, so "
            "generations did not help in this lineage"
        )
        return {"text": text, "status": "first-kept", "closest": None}
    subject = "generations" if best > 0 else "the lineage (generation 0 kept)"
    return _verdict(lineage["comparisons"], lineage["samples"], subject)


def generation_table(
    records: Sequence[Mapping[str, Any]], best: int | None, targets: str | None = None
) -> str:
    """One row per generation: held-out, test, train vs labels, ensemble, entropy/norm, seconds."""
    if targets is None:
        targets = "ce" if any("target_entropy" in r for r in records) else "l2"
    column = "target_entropy" if targets == "ce" else "output_norm"
    spectra = any("spectrum" in r for r in records)
    header = f"{'gen':>4} {'held-out':>9} {'test':>7} {'train':>7} {'ensemble':>9} "
    header += f"{column.replace('_', ' '):>15} {'agree':>6} {'seconds':>8}"
    header += f" {'95% in':>7}" if spectra else ""
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
            f"{cell(r['agreement'], 6)} {r['seconds']:>8.2f}{_components(r, spectra)}{mark}"
        )
    return "\n".join(lines)


def _components(record: Mapping[str, Any], spectra: bool) -> str:
    """The spectral column: the fewest eigencomponents holding 95 % of the output energy."""
    if not spectra:
        return ""
    spectrum = record.get("spectrum")
    return f" {spectrum['components95']:>7}" if spectrum else f" {'-':>7}"


def forecast_lines(found: dict[str, Any] | None) -> list[str]:
    """The spectral forecast's table beside the run (:func:`filial.spectral.compare_forecast`)."""
    if found is None:
        return []
    out = [
        f"spectral forecast from generation 0 (kernel ridge on its features, c = "
        f"{found['ridge']:.3g}; held-out metric per generation)",
        f"{'gen':>4} {'c fixed':>9} {'c refit':>9} {'actual':>9}",
    ]

    def cell(value: Any) -> str:
        return f"{value:>9.4f}" if is_number(value) else f"{'-':>9}"

    for row in found["rows"]:
        out.append(
            f"{row['generation']:>4} {cell(row['fixed'])} {cell(row['refit'])} "
            f"{cell(row['actual'])}"
        )
    best, collapse = found["best"], found["collapse"]

    def gen(value: Any) -> str:
        return "none" if value is None else str(value)

    out.append(
        f"best generation: forecast {gen(best['fixed'])} (c refit {gen(best['refit'])}), "
        f"actual {gen(best['actual'])} of 0-{gen(found['trained'])}; collapse: forecast "
        f"{gen(collapse['fixed'])} (c refit {gen(collapse['refit'])}), recorded "
        f"{gen(collapse['actual'])}"
    )
    return out


def _signed(value: float) -> str:
    return f"{value:+.4f}"


def _bracket(found: dict[str, Any] | None) -> str:
    if found is None:
        return "-"
    return f"{_signed(found['observed'])} [{_signed(found['low'])}, {_signed(found['high'])}]"


_STATUS = {
    "established": "established",
    "worse": "worse, established",
    "inconclusive": "inconclusive",
}


def _gain_table(comparisons: Sequence[dict[str, Any]], across: bool = False) -> list[str]:
    """One row per comparison: plain and cross-fitted gain with intervals, test, status."""
    lines = [f"  {'over':<18} {'plain':>27} {'cross-fitted':>27} {'test':>8}  status"]
    for c in comparisons:
        test = f"{_signed(c['test'])}" if c.get("test") is not None else "-"
        lines.append(
            f"  {c['against']:<18} {_bracket(c['plain']):>27} {_bracket(c['cross_fitted']):>27} "
            f"{test:>8}  {_STATUS[c['status']]}"
        )
        if across and c["cross_fitted"] is not None:
            per = ", ".join(_signed(v) for v in c["cross_fitted"]["per_seed"])
            lines.append(f"  {'':<18} per seed (cross-fitted): {per}")
    return lines


def _baseline_head(name: str, record: Mapping[str, Any]) -> str:
    epochs = record["epochs_matched"]
    if name == "matched":
        return f"matched baseline ({epochs} epochs on the labels, the last kept)"
    every = record.get("every", 1)
    scored = "after every epoch" if every == 1 else f"after every {every} epochs and the last"
    kept = record.get("best_epoch")
    smoothing = (
        f"label smoothing {record.get('label_smoothing')}, " if name == "label-smoothing" else ""
    )
    at = f"kept after epoch {int(kept) + 1}" if kept is not None else "no epoch kept"
    return f"{name} baseline ({smoothing}{epochs} epochs on the labels, held-out {scored}, {at})"


def _matched_shows(x: dict[str, Any], record: Mapping[str, Any]) -> str:
    """What the matched baseline shows: whether more epochs on the labels overfit."""
    c = x.get("matched_vs_first")
    first = x["records"][0].get("heldout") if x["records"] else None
    if c is None:
        if is_number(first) and is_number(record.get("heldout")):
            return f"; generation 0 reached {first:.4f}"
        return ""
    gain, samples = c["plain"], c["samples"]
    words = _interval_words(gain)
    if c["status"] == "worse":
        return (
            f": {-gain['observed']:.4f} below generation 0 ({words}): more epochs on the labels "
            "overfit, so what generations gain is not the gain of more training"
        )
    if c["status"] == "established":
        return (
            f": {gain['observed']:.4f} above generation 0 ({words}): more epochs on the labels "
            "helped, so part of a gain of generations may be the gain of more training"
        )
    return (
        f": {_signed(gain['observed'])} against generation 0 ({words}): more epochs on the "
        f"labels neither helped nor hurt, inconclusive on {samples} held-out samples"
    )


def _lineage_lines(x: dict[str, Any]) -> list[str]:
    out = ["", f"seed {x['seed']} ({x['targets']} targets, {x['lineage_dir']})"]
    out.append(generation_table(x["records"], x["best"], x["targets"]))
    out.extend(pool_lines(x["records"], x["best"]))
    out.extend(forecast_lines(x.get("forecast")))
    out.append(f"stopped: {x['stop_in_words']}")
    best = x["best"]
    if best is not None:
        out.append(f"kept generation {best}: {x['checkpoint']}")
    if best == 0:
        out.append("generation 0 was kept: no later generation beat it on held-out data")
    if x["comparisons"]:
        out.append(
            f"gains of the kept generation {best} ({x['samples']} held-out samples; "
            "paired bootstrap 95 % intervals; cross-fitted: chosen on one half of the "
            "held-out set, scored on the other, both ways; test: reported, never used to "
            "choose)"
        )
        out.extend(_gain_table(x["comparisons"]))
    out.extend(_cross_fitted_line(x))
    out.extend(_baseline_lines(x))
    if x["verdict"].get("text"):
        out.append(f"verdict: {x['verdict']['text']}")
    return out


def _cross_fitted_line(x: dict[str, Any]) -> list[str]:
    """The cross-fitted held-out figures of the kept generation and the early-stopped
    baselines, with the choices made on each half."""
    fitted = x.get("cross_fitted")
    if fitted is None:
        return []
    a, b = fitted["choices"]
    line = (
        f"cross-fitted held-out: {fitted['kept']:.4f} with generations (generation {a} "
        f"chosen on one half, {b} on the other)"
    )
    for c in x["comparisons"]:
        detail = c.get("detail") or {}
        if "cross_fitted" in detail:
            a, b = (e + 1 for e in detail["cross_fitted_epochs"])
            line += f"; {detail['cross_fitted']:.4f} {c['against']} (epochs {a} and {b})"
    return [line]


def _baseline_lines(x: dict[str, Any]) -> list[str]:
    """One line per baseline: its held-out and test figures (and what the matched one shows)."""
    out = []
    for name, record in x["baselines"].items():
        head = _baseline_head(name, record)
        if record.get("heldout") is None:
            out.append(f"{head}: diverged")
            continue
        line = f"{head}: held-out {record['heldout']:.4f}"
        if record.get("test") is not None:
            line += f", test {record['test']:.4f}"
        if name == "matched":
            line += _matched_shows(x, record)
        out.append(line)
    return out


def _pair(row: dict[str, Any], key: str) -> str:
    mean, std = row[f"{key}_mean"], row[f"{key}_std"]
    if mean is None:
        return f"{'-':>17}"
    return f"{mean:>9.4f} +-{std:.4f}" if std is not None else f"{mean:>9.4f}        -"


def _across_lines(summary: dict[str, Any]) -> list[str]:
    out = ["", "across seeds (mean +- standard deviation)"]
    out.append(f"{'gen':>4} {'seeds':>5} {'held-out':>17} {'test':>17} {'train':>17}")
    partial = []
    for row in summary["generations"]:
        seeds = f"{row['seeds']}/{row['of_seeds']}"
        out.append(
            f"{row['generation']:>4} {seeds:>5} {_pair(row, 'heldout')} "
            f"{_pair(row, 'test')} {_pair(row, 'train')}"
        )
        if row["seeds"] < row["of_seeds"]:
            partial.append(row)
    for row in partial:
        out.append(
            f"generation {row['generation']}: reached by {row['seeds']} of {row['of_seeds']} "
            "seeds; its figures are of those seeds alone"
        )
    chosen = ", ".join(f"seed {s}: {g}" for s, g in summary["chosen"].items())
    out.append(f"chosen generation per seed: {chosen}")
    across = summary.get("across") or {}
    if across.get("comparisons"):
        out.append(
            f"gains of the kept generations, mean over {across['seeds']} seeds (bootstrap "
            f"intervals that draw seeds and the {across['samples']} held-out samples, the "
            "same for every seed drawn)"
        )
        out.extend(_gain_table(across["comparisons"], across=True))
        if across["verdict"].get("text"):
            out.append(f"verdict across {across['seeds']} seeds: {across['verdict']['text']}")
    elif across.get("note"):
        out.append(f"no gains across seeds: {across['note']}")
    return out


def format_report(summary: dict[str, Any]) -> str:
    """The text of ``filial report``."""
    out = [f"run {summary['run_dir']}: {len(summary['lineages'])} lineage(s)"]
    for x in summary["lineages"]:
        out.extend(_lineage_lines(x))
    if len(summary["lineages"]) > 1:
        out.extend(_across_lines(summary))
    if summary["tensorboard"]:
        out.append("")
        out.append(f"TensorBoard: {summary['tensorboard']}")
    return "\n".join(out)
