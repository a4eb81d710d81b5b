"""The TensorBoard layout, read back with TensorBoard's own EventAccumulator, and the picture.

The across-seed figures are checked against numpy (``np.mean``, ``np.std(ddof=1)``); the event
files against what TensorBoard itself reads from them (``EventAccumulator``, the hparams plugin's
``plugin_data_pb2`` and the custom-scalars ``layout_pb2``).
"""

from __future__ import annotations

import json
import sys

import numpy as np
import pytest
import torch
from conftest import TinyNet, blobs
from tensorboard.backend.event_processing.event_accumulator import EventAccumulator
from tensorboard.plugins.custom_scalar import layout_pb2
from tensorboard.plugins.hparams import plugin_data_pb2
from torch.utils.data import DataLoader

import filial
from filial import cli
from filial.tb import ALONE, ARMS, WITH, SeedView, baseline_metric, compare, write_arms


def _accumulator(folder) -> EventAccumulator:
    accumulator = EventAccumulator(str(folder))
    accumulator.Reload()
    return accumulator


def _scalars(folder, tag) -> list[tuple[int, float]]:
    return [(e.step, e.value) for e in _accumulator(folder).Scalars(tag)]


def _records(values, test=None):
    return [
        {"generation": g, "heldout": v, "test": None if test is None else test[g]}
        for g, v in enumerate(values)
    ]


# Three seeds; seed 2 stopped one generation earlier than the others.
SEEDS = [
    SeedView(0, _records([0.80, 0.84, 0.86, 0.83]), 2, {"matched": {"heldout": 0.70}}),
    SeedView(1, _records([0.82, 0.83, 0.85, 0.84]), 2, {"matched": {"heldout": 0.72}}),
    SeedView(2, _records([0.81, 0.86, 0.82]), 1, {"matched": {"heldout": 0.71}}),
]


def test_the_arms_are_means_over_the_generations_every_seed_reached():
    c = compare(SEEDS)
    values = np.array([[0.80, 0.84, 0.86], [0.82, 0.83, 0.85], [0.81, 0.86, 0.82]])
    assert [b.mean for b in c.curve] == pytest.approx(values.mean(axis=0))
    assert [b.std for b in c.curve] == pytest.approx(values.std(axis=0, ddof=1))
    gains = values - values[:, :1]
    assert [b.mean for b in c.gain] == pytest.approx(gains.mean(axis=0))
    assert [b.std for b in c.gain] == pytest.approx(gains.std(axis=0, ddof=1))
    # generation 3: two of three seeds, kept out of the mean and the band
    assert c.partial == {3: [(0, 0.83), (1, 0.84)]} and c.steps == [0, 1, 2, 3]
    assert c.alone.mean == pytest.approx(values[:, 0].mean())
    assert c.kept.mean == pytest.approx(np.mean([0.86, 0.85, 0.86]))
    level, lift = c.baselines["matched"]
    assert level.mean == pytest.approx(0.71) and level.seeds == 3
    assert lift.mean == pytest.approx(np.mean([0.70 - 0.80, 0.72 - 0.82, 0.71 - 0.81]))
    assert compare(SEEDS, "test") is None  # no seed has a test figure


def test_write_arms_layout_and_a_rewrite_replaces_the_runs(tmp_path):
    tb = tmp_path / "tb"
    for _ in range(2):  # a rerun rewrites the same view; it never appends a second copy
        write_arms(tb, SEEDS)
    assert sorted(p.name for p in (tb / ARMS).iterdir()) == sorted(
        [WITH, ALONE, "baseline matched"]
    )
    assert [p.name for p in tb.iterdir()] == [ARMS]  # no temporary folders left behind
    for run in (tb / ARMS).iterdir():
        assert len(list(run.iterdir())) == 1, run
    c = compare(SEEDS)
    answer = "answer/gain vs generation 0 alone"
    gain = _scalars(tb / ARMS / WITH, answer)
    assert [s for s, _ in gain] == [0, 1, 2]  # the generations every seed reached
    assert [v for _, v in gain] == pytest.approx([b.mean for b in c.gain])
    low = _scalars(tb / ARMS / WITH, "spread/gain vs generation 0 alone, low")
    assert [v for _, v in low] == pytest.approx([b.mean - b.std for b in c.gain])
    # levels: the same value at every generation any seed reached, in their own runs
    assert _scalars(tb / ARMS / ALONE, answer) == [(g, 0.0) for g in range(4)]
    matched = _scalars(tb / ARMS / "baseline matched", "answer/gain vs baseline matched")
    assert [s for s, _ in matched] == [0, 1, 2, 3]
    assert [v for _, v in matched] == pytest.approx([c.baselines["matched"][1].mean] * 4)
    every = _scalars(tb / ARMS / "baseline matched", "held-out/every arm")
    assert [v for _, v in every] == pytest.approx([0.71] * 4)
    # the with-generations run carries the comparison with each arm, nothing of its own level
    tags = _accumulator(tb / ARMS / WITH).Tags()["scalars"]
    assert {"answer/gain vs generation 0 alone", "answer/gain vs baseline matched"} <= set(tags)
    assert not any(t.startswith(("hparams/", "seeds/", "compare/")) for t in tags)
    # the custom-scalars layout: the answer first, as margin charts (never smoothed)
    accumulator = _accumulator(tb / ARMS / WITH)
    content = accumulator.Tensors("custom_scalars__config__")[0].tensor_proto.string_val[0]
    layout = layout_pb2.Layout.FromString(content)
    first, second = layout.category[:2]
    assert "did generations help" in first.title
    charts = [*first.chart, *second.chart]
    assert [chart.WhichOneof("content") for chart in charts] == ["margin"] * 2
    assert first.chart[0].margin.series[0].value == "answer/gain vs generation 0 alone"
    assert second.chart[0].margin.series[0].value == "answer/gain vs baseline matched"


@pytest.fixture(scope="module")
def tiny_run(tmp_path_factory):
    """One lineage of three generations, its early-stopped and matched baselines (the conftest
    blobs)."""
    train = DataLoader(
        blobs(96, seed=1), batch_size=16, shuffle=True, generator=torch.Generator().manual_seed(0)
    )
    heldout, test = DataLoader(blobs(48, seed=2), batch_size=32), DataLoader(blobs(48, seed=3))
    run_dir = tmp_path_factory.mktemp("tb") / "run"
    lineage = filial.Lineage(
        TinyNet(),
        train,
        heldout,
        run_dir=run_dir,
        max_generations=2,
        patience=5,
        test_loader=test,
        progress=False,
        seed=3,
    )
    lineage.run(filial.fit_epochs(3, lambda params: torch.optim.SGD(params, lr=0.1)))
    lineage.baselines(
        ["early-stopping", "matched"],
        lambda n: filial.fit_epochs(n, lambda params: torch.optim.SGD(params, lr=0.1)),
    )
    lineage.close()
    return run_dir


def test_one_lineage_writes_arms_detail_and_one_hparams_row(tiny_run):
    tb = tiny_run / "tb"
    state = json.loads((tiny_run / "lineage.json").read_text())
    records = state["records"]
    generations = [r["generation"] for r in records]
    assert generations == [0, 1, 2]
    assert sorted(p.name for p in tb.iterdir()) == sorted(
        [ARMS, "gen0", "gen1", "gen2", "baseline early-stopping", "baseline matched", "hparams"]
    )
    # each generation: its epoch curve, and its figures as one point at its own step
    for r in records:
        run = tb / f"gen{r['generation']}"
        assert [s for s, _ in _scalars(run, "epoch/loss")] == [0, 1, 2]
        for tag, key in [("generation/held-out", "heldout"), ("generation/test", "test")]:
            assert _scalars(run, tag) == [(r["generation"], pytest.approx(r[key]))]
    base = json.loads((tiny_run / "baseline" / "matched" / "baseline.json").read_text())
    # the baseline: a level at every generation, per lineage and in the arms view
    level = _scalars(tb / "baseline matched", "generation/held-out")
    assert level == [(g, pytest.approx(base["heldout"])) for g in generations]
    assert [s for s, _ in _scalars(tb / "baseline matched", "epoch/loss")] == list(
        range(base["epochs_matched"])
    )
    arm = _scalars(tb / ARMS / "baseline matched", "held-out/every arm")
    assert arm == [(g, pytest.approx(base["heldout"])) for g in generations]
    # the early-stopped baseline: its per-epoch held-out curve in its own run, its level
    early = json.loads((tiny_run / "baseline" / "early-stopping" / "baseline.json").read_text())
    curve = [(e["epoch"], pytest.approx(e["heldout"])) for e in early["epochs"]]
    assert len(curve) == early["epochs_matched"]  # held-out after every epoch
    assert _scalars(tb / "baseline early-stopping", "epoch/held-out") == curve
    level = _scalars(tb / ARMS / "baseline early-stopping", "held-out/every arm")
    assert level == [(g, pytest.approx(early["heldout"])) for g in generations]
    gain = _scalars(tb / ARMS / WITH, "answer/gain vs baseline early-stopping")
    assert [s for s, _ in gain] == generations
    curve = _scalars(tb / ARMS / WITH, "held-out/every arm")
    assert curve == [(r["generation"], pytest.approx(r["heldout"])) for r in records]
    alone = _scalars(tb / ARMS / ALONE, "test/every arm")
    assert alone == [(g, pytest.approx(records[0]["test"])) for g in generations]
    # hparams: one row, integers as integers, temperature among the hparams, plain metric names
    accumulator = _accumulator(tb / "hparams")
    start = accumulator.PluginTagToContent("hparams")["_hparams_/session_start_info"]
    hparams = plugin_data_pb2.HParamsPluginData.FromString(start).session_start_info.hparams
    assert hparams["run: seed"].string_value == "3"
    assert hparams["stop: max generations after 0"].string_value == "2"
    assert hparams["loss: temperature"].number_value == 1.0
    assert hparams["loss: targets"].string_value == "ce"
    # TensorBoard shows the first five by (differs, name): temperature is among them here
    assert "loss: temperature" in sorted(hparams)[:5]
    assert "_hparams_/experiment" not in accumulator.PluginTagToContent("hparams")
    tags = accumulator.Tags()["scalars"]
    assert "held-out, kept generation" in tags
    assert {"other arms, held-out of baseline matched", baseline_metric("early-stopping")} <= set(
        tags
    )
    # the table shows the first five metrics by name: the kept generation's figures, then
    # the baselines' (three baselines would otherwise hide the kept generation)
    assert sorted(tags)[:5] == [
        "held-out gain, kept over generation 0",
        "held-out, generation 0",
        "held-out, kept generation",
        "kept generation",
        "other arms, held-out of baseline early-stopping",
    ]
    assert not any(t.startswith("hparams/") for t in tags)
    kept = state["decision"]["best"]
    assert _scalars(tb / "hparams", "kept generation")[-1] == (2, kept)
    # the picture goes in once the run is finished (with matplotlib installed)
    if _has_matplotlib():
        images = _accumulator(tb / ARMS / WITH).Tags()["images"]
        assert images == ["picture/did generations help"]


def _has_matplotlib() -> bool:
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        return False
    return True


def test_report_plot_writes_a_png(tiny_run, tmp_path, capsys):
    pytest.importorskip("matplotlib")
    path = tmp_path / "picture.png"
    assert cli.main(["report", str(tiny_run), "--plot", str(path)]) == 0
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "filial: wrote" in capsys.readouterr().err


def test_report_plot_without_matplotlib_names_the_extra(tiny_run, tmp_path, capsys, monkeypatch):
    for name in ("matplotlib", "matplotlib.figure", "matplotlib.backends.backend_agg"):
        monkeypatch.setitem(sys.modules, name, None)  # import now raises ImportError
    path = tmp_path / "picture.png"
    assert cli.main(["report", str(tiny_run), "--plot", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("filial: ") and "pip install 'filial[plot]'" in err
    assert not path.exists()
