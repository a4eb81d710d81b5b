"""TensorBoard layout: the arms compared first, each seed's detail behind a filter.

Everything is derived from the records (``lineage.json``, the baselines' records), so a resumed
run writes the same values as one that went straight through. Under a TensorBoard folder
(``RUN/tb`` for ``filial run``, ``run_dir/tb`` for one :class:`~filial.Lineage`):

``arms/with generations``, ``arms/generation 0 alone``, ``arms/baseline NAME``
    one run per arm compared, so that a colour means an arm. The values are the means over seeds
    (a single lineage is its own mean), written by :func:`write_arms` from the records and
    rewritten whole each time (TensorBoard drops the data of a replaced run folder):
    ``answer/gain vs ARM`` (held-out gain over generation 0, paired per seed) per comparison,
    ``held-out/every arm`` and ``test/every arm`` (the metric itself), with their
    ``spread/...`` bounds (mean -+ one standard deviation over seeds) for the custom-scalars
    margin charts. The with-generations curve covers the generations that every seed reached;
    one that only some seeds reached is left out of the mean and of the band (the seeds that
    went on are not a sample of all seeds, and one seed has no spread); it stays visible as the
    per-seed dots. An arm without generations is a level: the same value at every generation.
``seedS/genG`` (``genG`` for one lineage)
    per-epoch curves (``epoch/loss``, ``epoch/running accuracy vs labels``, ...) and the
    generation's figures as one point at step G (``generation/held-out``, ``generation/test``,
    ``generation/train vs labels``, ...). A series of one point is never smoothed.
``seedS/spectrum``, ``seedS/forecast``, ``seedS/forecast c refit`` (with the spectral view)
    ``spectrum/...``: the share of output energy in the top 1 %, 10 %, 50 % of eigen-indices and
    the rest, the components holding 95 % and the participation ratio, one point per generation
    (a curve over generations); ``spectrum/energy by eigen-index``: a histogram per generation
    (step G) of where the training outputs' energy lies along the eigen-index of generation 0's
    kernel (buckets of indices, heights: energy shares). The forecast runs hold
    ``generation/held-out`` as predicted from generation 0 (:func:`filial.spectral.forecast`),
    so the held-out chart shows them beside the generations' own points.
``seedS/baseline NAME``
    the baseline's per-epoch curves (``epoch/held-out`` where the record has it) and its figures
    as levels over the generation axis.
``seedS/hparams``
    the lineage's row in the HParams table and the metrics of that row, written as levels.

Note: smoothing. TensorBoard smooths each run's series with a debiased exponential moving
average (weight 0.6 by default), which bends a 4-point per-generation curve. It leaves alone
a constant series and a series of one point (``classicSmoothing`` in TensorBoard's
``line_chart_v2``), and the custom-scalars dashboard never smooths its margin charts (it hands
the smoothing weight to multiline charts only). So the arms' curves are margin charts (the first
custom-scalars category), levels are constants and each seed's per-generation figures are one
point per run. The Time Series page takes ``?smoothing=0`` in its address for the rest.

Only the writer's own folders are created (``SummaryWriter.add_hparams`` would add a
time-stamped sub-folder per call, so the hparams summaries are written by hand).
"""

from __future__ import annotations

import os
import shutil
import statistics
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from tensorboard.compat.proto.summary_pb2 import Summary, SummaryMetadata
from tensorboard.plugins.hparams import api_pb2, plugin_data_pb2
from tensorboard.plugins.hparams import metadata as hp_metadata
from torch.utils.tensorboard import SummaryWriter

from .pool import pool_scalars
from .records import is_number
from .stopping import StopRule

ARMS = "arms"
SPECTRUM_RUN = "spectrum"
FORECAST_RUN = "forecast"
_SPECTRUM_NAMES = {
    "top1": "energy share, top 1 % of eigen-indices",
    "top10": "energy share, top 10 %",
    "top50": "energy share, top 50 %",
    "rest": "energy share, rest",
    "outside": "energy share, outside the kernel's span",
    "components95": "components holding 95 %",
    "participation": "participation ratio",
}
WITH = "with generations"
ALONE = "generation 0 alone"
HPARAMS_RUN = "hparams"
PICTURE_TAG = "picture/did generations help"

_FIGURES = {
    "heldout": "held-out",
    "test": "test",
    "train": "train vs labels",
    "ensemble": "ensemble",
    "target_entropy": "target entropy",
    "output_norm": "output norm",
    "agreement": "agreement with teacher",
}
_EPOCH_NAMES = {
    "loss": "loss",
    "running_accuracy": "running accuracy vs labels",
    "running_neg_mse": "running neg. MSE vs labels",
    "heldout": "held-out",
}
# HParams shows the first five hparams, those whose values differ between rows first, then by
# name; the prefixes keep temperature among them. Integers are written as strings: the table
# prints every number with five significant digits (4 -> "4.0000").
_HPARAM_NAMES = {
    "seed": "run: seed",
    "targets": "loss: targets",
    "temperature": "loss: temperature",
    "label_weight": "loss: label weight",
    "max_generations": "stop: max generations after 0",
    "patience": "stop: patience",
    "min_gain": "stop: min gain",
}
# The table names a metric by its tag (no prefix) and shows the first five by name: the
# held-out figures and the kept generation.
_METRIC_NAMES = {
    "heldout_gain": "held-out gain, kept over generation 0",
    "heldout_best": "held-out, kept generation",
    "heldout_generation_0": "held-out, generation 0",
    "best_generation": "kept generation",
    "generations": "trained generations after 0",
    "test_best": "test, kept generation",
    "test_gain": "test gain, kept over generation 0",
}


def baseline_run(name: str) -> str:
    """The run (below ``arms/`` or a seed's folder) of the baseline called ``name``."""
    return f"baseline {name}"


def baseline_metric(name: str) -> str:
    """The HParams metric of baseline ``name``'s held-out figure.

    >>> sorted(["held-out, kept generation", "kept generation", baseline_metric("matched")])[-1]
    'other arms, held-out of baseline matched'
    """
    return f"other arms, held-out of baseline {name}"


def baseline_name(record: Mapping[str, Any]) -> str:
    """A baseline record's name: ``name``, else its ``kind`` less ``-baseline``.

    >>> baseline_name({"kind": "matched-baseline"})
    'matched'
    """
    name = record.get("name") or str(record.get("kind") or "matched").removesuffix("-baseline")
    return str(name)


class _Writer:
    """A SummaryWriter for one run folder, flushed (and, unless kept, closed) after each use."""

    def __init__(self, folder: Path, cache: dict[Path, SummaryWriter] | None = None) -> None:
        self.folder = folder
        self.cache = cache

    def __enter__(self) -> SummaryWriter:
        writer = self.cache.get(self.folder) if self.cache is not None else None
        if writer is None:
            self.folder.mkdir(parents=True, exist_ok=True)
            # A deep queue: add_scalar never waits for the writer thread (max_queue=10 did).
            writer = SummaryWriter(log_dir=os.fspath(self.folder), max_queue=10_000)
            if self.cache is not None:
                self.cache[self.folder] = writer
        self.writer = writer
        return writer

    def __exit__(self, *exc: Any) -> None:
        self.writer.flush()
        if self.cache is None:
            self.writer.close()


def _epoch_curves(writer: SummaryWriter, epochs: Sequence[Mapping[str, Any]]) -> None:
    for entry in epochs:
        step = int(entry["epoch"])
        for key, value in entry.items():
            if key != "epoch" and is_number(value):
                name = _EPOCH_NAMES.get(key, key.replace("_", " "))
                writer.add_scalar(f"epoch/{name}", value, step)


def _energy_histogram(writer: SummaryWriter, energies: Any, step: int, buckets: int = 50) -> None:
    """Energy shares by eigen-index as a TensorBoard histogram: ``buckets`` equal ranges of
    the index (0 = the largest eigenvalue), each bucket's height its share of the energy."""
    import numpy as np

    shares = np.asarray(energies, dtype=np.float64) / float(np.sum(energies))
    m = len(shares)
    edges = np.linspace(0, m, min(buckets, m) + 1)
    index = np.arange(m)
    counts = np.histogram(index, bins=edges, weights=shares)[0]
    writer.add_histogram_raw(
        "spectrum/energy by eigen-index",
        min=0.0,
        max=float(m - 1),
        num=float(counts.sum()),
        sum=float((index * shares).sum()),
        sum_squares=float((index**2 * shares).sum()),
        bucket_limits=edges[1:].tolist(),
        bucket_counts=counts.tolist(),
        global_step=step,
    )


def _levels(writer: SummaryWriter, tag: str, value: float, steps: Sequence[int]) -> None:
    for step in steps:
        writer.add_scalar(tag, value, step)


# ---------------------------------------------------------------------------------------------
# the arms compared, across seeds


@dataclass(frozen=True)
class SeedView:
    """What the arms view needs of one seed: its records, kept generation and baselines.

    ``best`` None means the held-out argmax of the records (the lineage's own rule);
    ``baselines`` maps a baseline's name to its record.
    """

    seed: int | None
    records: Sequence[Mapping[str, Any]]
    best: int | None = None
    baselines: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)

    @property
    def kept(self) -> int | None:
        return self.best if self.best is not None else StopRule.best(self.records)

    @classmethod
    def from_summary(cls, summary: Mapping[str, Any]) -> SeedView:
        """From one lineage of :func:`filial.report.summarize` (``summary["lineages"][i]``)."""
        base = summary.get("baseline")
        baselines = {baseline_name(base): base} if base else {}
        baselines.update(summary.get("baselines") or {})
        return cls(summary.get("seed"), summary["records"], summary.get("best"), baselines)


@dataclass(frozen=True)
class Band:
    """A mean over seeds and one standard deviation (0 for one seed), and how many seeds."""

    mean: float
    std: float
    seeds: int

    @staticmethod
    def of(values: Sequence[Any]) -> Band | None:
        values = [float(v) for v in values if is_number(v)]
        if not values:
            return None
        std = statistics.stdev(values) if len(values) > 1 else 0.0
        return Band(statistics.fmean(values), std, len(values))


@dataclass(frozen=True)
class Comparison:
    """One metric (``heldout`` or ``test``) of every arm, over seeds.

    ``curve[g]`` and ``gain[g]`` cover the generations every seed reached; ``partial`` holds the
    per-seed values of the generations only some seeds reached (``{g: [(seed, value)]}``).
    ``steps`` is the generation axis the levels span (every generation any seed reached).
    """

    key: str
    seeds: int
    steps: list[int]
    curve: list[Band]
    gain: list[Band]
    partial: dict[int, list[tuple[Any, float]]]
    alone: Band | None
    kept: Band | None
    kept_gain: Band | None
    baselines: dict[str, tuple[Band, Band | None]]  # name -> (level, gain over generation 0)
    per_seed: list[tuple[Any, list[float | None], int | None]]  # (seed, values, kept)


def compare(views: Sequence[SeedView], key: str = "heldout") -> Comparison | None:
    """The arms' figures for ``key``, or None when no seed has a value of it.

    >>> a = SeedView(0, [{"generation": g, "heldout": v} for g, v in enumerate([0.8, 0.9, 0.85])])
    >>> b = SeedView(1, [{"generation": g, "heldout": v} for g, v in enumerate([0.7, 0.8])])
    >>> c = compare([a, b])
    >>> [round(x.mean, 3) for x in c.curve], [round(x.mean, 3) for x in c.gain], c.partial
    ([0.75, 0.85], [0.0, 0.1], {2: [(0, 0.85)]})
    """
    values: list[list[float | None]] = [
        [float(r[key]) if is_number(r.get(key)) else None for r in v.records] for v in views
    ]
    if not any(x is not None for row in values for x in row):
        return None
    depth = max(len(row) for row in values)
    common = 0
    while common < depth and all(len(row) > common and row[common] is not None for row in values):
        common += 1
    curve = [Band.of([row[g] for row in values]) for g in range(common)]
    gain = [Band.of([_difference(row[g], row[0]) for row in values]) for g in range(common)]
    partial: dict[int, list[tuple[Any, float]]] = {}
    for g in range(common, depth):
        present = [
            (v.seed, value)
            for v, row in zip(views, values, strict=True)
            if g < len(row) and (value := row[g]) is not None
        ]
        if present:
            partial[g] = present

    def first(row: list[float | None]) -> float | None:
        return row[0] if row else None

    def at(row: list[float | None], g: int | None) -> float | None:
        return row[g] if g is not None and g < len(row) else None

    kept = [at(row, v.kept) for v, row in zip(views, values, strict=True)]
    firsts = [first(row) for row in values]
    baselines = _baseline_bands(views, firsts, key)
    return Comparison(
        key=key,
        seeds=len(views),
        steps=list(range(depth)),
        curve=[b for b in curve if b is not None],
        gain=[b for b in gain if b is not None],
        partial=partial,
        alone=Band.of(firsts),
        kept=Band.of(kept),
        kept_gain=Band.of(
            [k - f for k, f in zip(kept, firsts, strict=True) if k is not None and f is not None]
        ),
        baselines=baselines,
        per_seed=[(v.seed, row, v.kept) for v, row in zip(views, values, strict=True)],
    )


def _baseline_bands(
    views: Sequence[SeedView], firsts: list[float | None], key: str
) -> dict[str, tuple[Band, Band | None]]:
    """Each baseline's level over seeds, and its lift over generation 0 (paired per seed)."""
    bands: dict[str, tuple[Band, Band | None]] = {}
    for name in sorted({name for v in views for name in v.baselines}):
        level, lift = [], []
        for v, start in zip(views, firsts, strict=True):
            base = (v.baselines.get(name) or {}).get(key)
            if is_number(base):
                level.append(base)
                if start is not None:
                    lift.append(base - start)
        band = Band.of(level)
        if band is not None:
            bands[name] = (band, Band.of(lift))
    return bands


def _difference(a: float | None, b: float | None) -> float | None:
    return None if a is None or b is None else a - b


def _answer_tag(arm: str) -> str:
    return f"answer/gain vs {arm}"


def layout(baselines: Sequence[str], test: bool) -> dict[str, Any]:
    """The custom-scalars layout: the answer first, as margin charts (never smoothed).

    Note: one margin chart per comparison, so that a far-away baseline cannot squash the
    others' axis; generation 0 alone gets a category of its own, since TensorBoard 2.21 does
    not keep the order of several margin charts within one category.
    """

    def gain(arm: str) -> tuple[str, list[Any]]:
        tag = _answer_tag(arm)
        title = (
            f"held-out gain over generation 0: with generations vs {arm} "
            "(mean -+ sd over seeds; 0 = generation 0 alone)"
        )
        return title, ["Margin", [tag, f"spread/{tag[7:]}, low", f"spread/{tag[7:]}, high"]]

    every: dict[str, Any] = {
        "held-out by generation, every arm (mean -+ sd over seeds)": [
            "Margin",
            ["held-out/every arm", "spread/held-out, low", "spread/held-out, high"],
        ]
    }
    if test:
        every["test by generation, every arm (reported, never used to choose)"] = [
            "Margin",
            ["test/every arm", "spread/test, low", "spread/test, high"],
        ]
    detail = {
        f"{name} by generation, per seed (a dot per generation run, a line per baseline)": [
            "Multiline",
            [f"^generation/{name}$"],
        ]
        for name in ("held-out", "test", "train vs labels", "ensemble", "agreement with teacher")
    }
    detail["loss by epoch, per seed and generation"] = ["Multiline", ["^epoch/loss$"]]
    result = {
        "filial 1: did generations help? (generations every seed reached)": dict([gain(ALONE)])
    }
    if baselines:
        result["filial 2: with generations against each baseline"] = dict(
            gain(baseline_run(n)) for n in baselines
        )
    result["filial 3: the metric by generation, every arm"] = every
    result["filial 4: each seed (filter the runs with seed0/ ...)"] = detail
    return result


def _band_tags(writer: SummaryWriter, tag: str, band: Band, step: int, spread: str) -> None:
    writer.add_scalar(tag, band.mean, step)
    writer.add_scalar(f"{spread}, low", band.mean - band.std, step)
    writer.add_scalar(f"{spread}, high", band.mean + band.std, step)


def _write_comparison(runs: dict[str, SummaryWriter], c: Comparison) -> None:
    label = _FIGURES[c.key]
    every, spread = f"{label}/every arm", f"spread/{label}"
    with_run, alone_run = runs[WITH], runs[ALONE]
    for g, band in enumerate(c.curve):
        _band_tags(with_run, every, band, g, spread)
    if c.alone is not None:
        for step in c.steps:
            _band_tags(alone_run, every, c.alone, step, spread)
    for name, (level, _) in c.baselines.items():
        for step in c.steps:
            _band_tags(runs[baseline_run(name)], every, level, step, spread)
    if c.key == "heldout":
        _write_gains(runs, c)


def _write_gains(runs: dict[str, SummaryWriter], c: Comparison) -> None:
    """The answer charts: the held-out gain over generation 0, with generations and for each
    baseline, against generation 0 alone's 0 line."""
    with_run, alone_run = runs[WITH], runs[ALONE]
    zero = Band(0.0, 0.0, c.seeds)
    for arm in [ALONE, *(baseline_run(n) for n in c.baselines)]:
        tag = _answer_tag(arm)
        band_name = f"spread/{tag[7:]}"
        for g, band in enumerate(c.gain):
            _band_tags(with_run, tag, band, g, band_name)
        for step in c.steps:
            _band_tags(alone_run, tag, zero, step, band_name)
            if arm != ALONE:
                lift = c.baselines[arm.removeprefix("baseline ")][1]
                if lift is not None:
                    _band_tags(runs[arm], tag, lift, step, band_name)


def write_arms(
    folder: str | os.PathLike[str], views: Sequence[SeedView], *, finished: bool = False
) -> Path | None:
    """Write (or rewrite whole) the ``arms/`` runs under ``folder`` from the seeds' records.

    ``finished``: the run is over, so the picture of :mod:`filial.plot` goes in too (when
    matplotlib is installed). Returns the ``arms`` folder, or None when no seed has a record.
    The runs are written beside the old ones and swapped in, so a reader never sees half of
    them; TensorBoard drops the data of the replaced files.
    """
    folder = Path(folder)
    heldout = compare(views, "heldout")
    if heldout is None:
        return None
    test = compare(views, "test")
    names = sorted(heldout.baselines)
    target = folder / ARMS
    fresh = folder / f".{ARMS}.tmp-{os.getpid()}"
    shutil.rmtree(fresh, ignore_errors=True)
    runs: dict[str, SummaryWriter] = {}
    try:
        for arm in [WITH, ALONE, *(baseline_run(n) for n in names)]:
            (fresh / arm).mkdir(parents=True)
            runs[arm] = SummaryWriter(log_dir=os.fspath(fresh / arm), max_queue=10_000)
        runs[WITH].add_custom_scalars(layout(names, test is not None))
        _write_comparison(runs, heldout)
        if test is not None:
            _write_comparison(runs, test)
        if finished:
            _add_picture(runs[WITH], views)
    finally:
        for writer in runs.values():
            writer.close()
    old = folder / f".{ARMS}.old-{os.getpid()}"
    if target.exists():
        os.replace(target, old)
    os.replace(fresh, target)
    shutil.rmtree(old, ignore_errors=True)
    return target


def _add_picture(writer: SummaryWriter, views: Sequence[SeedView]) -> None:
    from . import plot

    try:
        image = plot.rgb_array(views)
    except plot.PlotUnavailable:
        return
    writer.add_image(PICTURE_TAG, image, 0, dataformats="HWC")


# ---------------------------------------------------------------------------------------------
# one lineage


def _hparams_summaries(settings: Mapping[str, Any]) -> Iterator[Summary]:
    """Session start and end of the hparams plugin, without an experiment summary: TensorBoard
    then builds the table from every session it reads (so rows of several run directories are
    compared, and 'differs' is computed over all of them)."""
    start = plugin_data_pb2.SessionStartInfo()
    for key, value in settings.items():
        name = _HPARAM_NAMES.get(key, key.replace("_", " "))
        if isinstance(value, bool):
            start.hparams[name].bool_value = value
        elif isinstance(value, int) or isinstance(value, str):
            start.hparams[name].string_value = str(value)
        elif is_number(value):
            start.hparams[name].number_value = float(value)
    end = plugin_data_pb2.SessionEndInfo(status=api_pb2.STATUS_SUCCESS)
    for tag, info in (
        (hp_metadata.SESSION_START_INFO_TAG, {"session_start_info": start}),
        (hp_metadata.SESSION_END_INFO_TAG, {"session_end_info": end}),
    ):
        content = plugin_data_pb2.HParamsPluginData(
            version=hp_metadata.PLUGIN_DATA_VERSION, **info
        ).SerializeToString()
        meta = SummaryMetadata(
            plugin_data=SummaryMetadata.PluginData(
                plugin_name=hp_metadata.PLUGIN_NAME, content=content
            )
        )
        yield Summary(value=[Summary.Value(tag=tag, metadata=meta)])


class TensorBoardLog:
    """Writes one lineage's TensorBoard runs under ``folder``.

    ``alone`` (default): this lineage is the whole run, so it also writes the ``arms/`` view of
    :func:`write_arms` from its own records; ``filial run`` sets it False for each seed and
    writes that view across seeds itself.
    """

    def __init__(self, folder: str | os.PathLike[str], *, alone: bool = True) -> None:
        self.folder = Path(folder)
        self.alone = alone
        # The hparams run is written more than once per process: one open writer (one event
        # file per process) instead of a new file each time.
        self._open: dict[Path, SummaryWriter] = {}
        self._records: list[Mapping[str, Any]] = []
        self._baselines: dict[str, Mapping[str, Any]] = {}
        self._finished = False

    def close(self) -> None:
        for writer in self._open.values():
            writer.close()
        self._open.clear()

    def _steps(self) -> list[int]:
        last = self._records[-1]["generation"] if self._records else 0
        return list(range(int(last) + 1))

    def generation(
        self,
        record: Mapping[str, Any],
        first: Mapping[str, Any],
        records: Sequence[Mapping[str, Any]] | None = None,
    ) -> None:
        """A finished generation: its run (epoch curves, its figures as one point).

        ``records``: every record so far (this one last); without it the records seen by this
        object are used, which after a resume lack the earlier generations, so the arms view
        waits for a call that has them.
        """
        index = int(record["generation"])
        with _Writer(self.folder / f"gen{index}") as writer:
            _epoch_curves(writer, record.get("epochs") or [])
            for key, name in _FIGURES.items():
                if is_number(record.get(key)):
                    writer.add_scalar(f"generation/{name}", record[key], index)
            for tag, value in pool_scalars(record):  # an unlabelled pool's figures
                writer.add_scalar(tag, value, index)
        if records is not None:
            self._records = list(records)
        elif not self._records or self._records[-1]["generation"] != index:
            self._records.append(record)
        self._arms()

    def spectrum(self, record: Mapping[str, Any], energies: Any) -> None:
        """A generation's spectral figures (``record["spectrum"]``), the histogram of its
        per-eigen-index ``energies`` (a numpy vector, or None), and after generation 0 the
        forecast's runs."""
        index = int(record["generation"])
        figures = record.get("spectrum")
        if figures is None:
            return
        with _Writer(self.folder / SPECTRUM_RUN, self._open) as writer:  # one file a process
            for key, name in _SPECTRUM_NAMES.items():
                if is_number(figures.get(key)):
                    writer.add_scalar(f"spectrum/{name}", figures[key], index)
            if energies is not None and len(energies) and float(energies.sum()) > 0:
                _energy_histogram(writer, energies, index)
        found = record.get("forecast")
        if found is None:
            return
        for run, regime in ((FORECAST_RUN, "fixed"), (f"{FORECAST_RUN} c refit", "refit")):
            with _Writer(self.folder / run) as writer:
                for step, value in enumerate(found[regime]["heldout"]):
                    if is_number(value):
                        writer.add_scalar("generation/held-out", value, step)

    def baseline(
        self,
        record: Mapping[str, Any],
        generations: Sequence[int],
        records: Sequence[Mapping[str, Any]] | None = None,
    ) -> None:
        """A finished baseline: its epoch curves, and its figures as levels over the
        generations (``generations``, the lineage's generation numbers)."""
        name = baseline_name(record)
        steps = list(generations) or [0]
        with _Writer(self.folder / baseline_run(name)) as writer:
            _epoch_curves(writer, record.get("epochs") or [])
            for key, label in _FIGURES.items():
                if is_number(record.get(key)):
                    _levels(writer, f"generation/{label}", record[key], steps)
        if is_number(record.get("heldout")):
            with _Writer(self.folder / HPARAMS_RUN, self._open) as writer:
                # Named to sort after the kept generation's figures: the table shows the
                # first five metrics by name, and three baselines would push those out.
                _levels(writer, baseline_metric(name), record["heldout"], steps)
        if records is not None:
            self._records = list(records)
        self._baselines[name] = record
        self._arms()

    def session(self, settings: Mapping[str, Any], metrics: Mapping[str, Any]) -> None:
        """The lineage's row in the HParams table (one row per seed across a recipe's seeds):
        its settings, and ``metrics`` as levels over the generations."""
        steps = self._steps()
        with _Writer(self.folder / HPARAMS_RUN, self._open) as writer:
            file_writer = writer._get_file_writer()
            for summary in _hparams_summaries(settings):
                file_writer.add_summary(summary)
            for key, value in metrics.items():
                if is_number(value):
                    _levels(writer, _METRIC_NAMES.get(key, key.replace("_", " ")), value, steps)
        self._finished = True
        self._arms()

    def _arms(self) -> None:
        complete = bool(self._records) and [int(r["generation"]) for r in self._records] == list(
            range(len(self._records))
        )
        if self.alone and complete:
            view = SeedView(None, self._records, None, dict(self._baselines))
            write_arms(self.folder, [view], finished=self._finished)
