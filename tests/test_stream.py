"""The streamed teacher pass: the store it writes, the figures it sums, its memory.

The streamed store is checked byte for byte against the code before it: the stores in
``tests/fixtures/format1/`` (written by commit 31f1fee) are remade from their checkpoints, and
for every layout (float16 and float32, one and three replayed views, top-k) against
``TargetStore.write`` of the whole output held in memory (the unchanged in-memory writer, whose
top-k order is numpy's stable ``argsort``). Outside references: ``numpy.argsort(kind="stable")``
for the top-k order, ``scipy.stats.entropy`` for the target entropy, ``numpy.linalg.norm`` for
the output norm, scikit-learn's ``accuracy_score`` and ``mean_squared_error`` for the training
metric, the kernel's peak-RSS counter (``VmHWM`` in ``/proc/self/status``, reset through
``/proc/self/clear_refs``; Linux's proc(5)) for the memory bound.
"""

from __future__ import annotations

import json
import os
import random
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import scipy.stats
import torch
import torch.nn.functional as F
from conftest import TinyNet, blobs
from sklearn.metrics import accuracy_score, mean_squared_error
from torch import nn
from torch.utils.data import DataLoader, Dataset, TensorDataset

import filial
from filial.checkpoint import load_checkpoint
from filial.data import IndexedDataset, Replay
from filial.evaluation import predict
from filial.metrics import accuracy, as_float_metric, negative_mse
from filial.seeding import seed_globals
from filial.store import StoreError, TargetStore
from filial.teacher import FigureSpec, StoreSpec, top_k_rows, training_pass

FIXTURES = Path(__file__).resolve().parent / "fixtures" / "format1"
SRC = Path(filial.__file__).resolve().parents[1]


class Augmented(Dataset):
    """Blobs with noise from torch's generator, a sign flip from Python's and a scale from
    numpy's (made here)."""

    def __init__(self, n: int = 45) -> None:
        self.base = blobs(n, seed=4)

    def __len__(self) -> int:
        return len(self.base)

    def __getitem__(self, index: int):
        x, y = self.base[index]
        x = x + 0.3 * torch.randn(x.shape)
        x = -x if random.random() < 0.5 else x
        return x * float(1.0 + 0.1 * np.random.randn()), y


class Tied(nn.Module):
    """TinyNet's outputs rounded to quarters (many equal values per row: ties for top-k) and
    scaled so that float16 meets normal and subnormal values."""

    def __init__(self, scale: float) -> None:
        super().__init__()
        self.net = TinyNet(classes=7)()
        self.scale = scale

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return torch.round(self.net(x) * 4) / 4 * self.scale


def _streamed(model, loader, replay, spec, directory) -> TargetStore:
    passed = training_pass(model, loader, replay, seed=3, store=(spec, directory))
    assert passed is not None and passed.store is not None
    return passed.store.publish(spec.fingerprint, "teacher-sha")


def _files(directory: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(directory.iterdir())}


# -- the store, byte for byte ------------------------------------------------------------


@pytest.mark.parametrize("dtype", ["float16", "float32"])
@pytest.mark.parametrize("views", [1, 3])
@pytest.mark.parametrize("top_k", [None, 3])
@pytest.mark.parametrize("scale", [1.0, 1e-6])
def test_the_streamed_store_is_the_in_memory_writers_byte_for_byte(
    tmp_path, dtype, views, top_k, scale
):
    torch.manual_seed(0)
    model = Tied(scale)
    data = Augmented() if views > 1 else blobs(45, seed=4)
    loader = DataLoader(data, batch_size=8)  # 45 rows x views: the last batch is short
    replay = Replay(11, views) if views > 1 else None
    spec = StoreSpec(dtype, views, top_k, "fp")
    streamed = _streamed(model, loader, replay, spec, tmp_path / "streamed")
    # Today's way: the whole output in memory, then the in-memory writer.
    whole = predict(model, loader, seed=3, replay=replay).outputs
    TargetStore.write(
        tmp_path / "whole",
        whole.view(len(data), views, 7).numpy(),
        dtype=dtype,
        fingerprint="fp",
        teacher_sha256="teacher-sha",
        top_k=top_k,
    )
    assert _files(tmp_path / "streamed") == _files(tmp_path / "whole")
    streamed.verify(fingerprint="fp")
    if scale < 1 and dtype == "float16":  # the store did meet float16's subnormal range
        assert (np.abs(streamed.array[streamed.array != 0]) < 6.2e-5).any()
    assert not list(tmp_path.rglob(".*.tmp-*"))


@pytest.mark.parametrize("record", ["gen0", "gen1"])
def test_stores_written_before_streaming_are_remade_byte_for_byte(tmp_path, record):
    """The fixture's stores were written by commit 31f1fee from all outputs in memory; the
    streamed pass over the same checkpoint and data writes the same files."""
    old = FIXTURES / "partial" / record
    manifest = json.loads((old / "targets.json").read_text())
    model = TinyNet()()
    model.load_state_dict(load_checkpoint(old / "student.pt"))
    train = DataLoader(
        blobs(96, seed=1), batch_size=16, shuffle=True, generator=torch.Generator().manual_seed(0)
    )
    spec = StoreSpec(manifest["dtype"], manifest["views"], manifest["top_k"], "fp")
    passed = training_pass(model, train, None, seed=0, store=(spec, tmp_path))
    assert passed is not None and passed.store is not None
    passed.store.publish(manifest["fingerprint"], manifest["teacher_sha256"])
    for name in ("targets.npy", "targets.json"):
        assert (tmp_path / name).read_bytes() == (old / name).read_bytes(), name


def test_top_k_rows_order_ties_as_numpys_stable_argsort():
    g = torch.Generator().manual_seed(0)
    outputs = torch.randint(-3, 4, (400, 12), generator=g).float() / 2  # ties everywhere
    outputs[0] = 0.0
    outputs[1, ::2] = -0.0  # -0.0 and 0.0 are equal, so ordered by class as well
    for k in (1, 3, 12):
        values, classes = top_k_rows(outputs, k)
        order = np.argsort(-outputs.numpy(), axis=1, kind="stable")[:, :k]
        assert np.array_equal(classes.numpy(), order), k
        np.testing.assert_array_equal(
            values.numpy(), np.take_along_axis(outputs.numpy(), order, axis=1)
        )


# -- the figures, summed on the way --------------------------------------------------------


def _figure_pass(model, loader, kind, metric, temperature=2.0, replay=None):
    spec = FigureSpec(kind, temperature, as_float_metric(metric, "m"))
    passed = training_pass(model, loader, replay, seed=0, figures=spec)
    assert passed is not None and passed.figures is not None
    return passed


def test_figures_of_a_classifier_match_outside_references():
    torch.manual_seed(0)
    data = blobs(101, classes=4, seed=5)
    model = TinyNet(classes=4)()
    passed = _figure_pass(model, DataLoader(data, batch_size=16), "ce", accuracy)
    outputs = model(data.tensors[0]).detach()
    labels = data.tensors[1].numpy()
    stats = passed.figures.statistics
    # scipy's entropy of the softmax at the temperature, in nats, averaged over the samples
    entropy = scipy.stats.entropy(F.softmax(outputs / 2.0, dim=1).double().numpy(), axis=1)
    assert stats["target_entropy"] == pytest.approx(entropy.mean(), rel=1e-6)
    predicted = outputs.argmax(dim=1).numpy()
    assert stats["prediction_share"] == np.bincount(predicted).max() / 101
    assert stats["label_share"] == np.bincount(labels).max() / 101
    train = filial.metrics.summed_form(accuracy).from_sums(passed.figures.metric_sums)
    assert train == accuracy_score(labels, predicted)  # scikit-learn; exact: a ratio of counts
    assert train == accuracy(outputs, data.tensors[1])  # the value today's records hold
    assert passed.finite and passed.view0 is None  # nothing kept whole for the default metric


def test_figures_of_a_regression_match_outside_references():
    torch.manual_seed(0)
    x = torch.randn(77, 5)
    data = TensorDataset(x, x[:, :1] * 2 + 0.1 * torch.randn(77, 1))
    model = nn.Linear(5, 1)
    passed = _figure_pass(model, DataLoader(data, batch_size=10), "l2", negative_mse)
    outputs = model(x).detach().numpy()
    norm = np.linalg.norm(outputs, axis=1).mean()
    assert passed.figures.statistics["output_norm"] == pytest.approx(norm, rel=1e-6)
    value = filial.metrics.summed_form(negative_mse).from_sums(passed.figures.metric_sums)
    # float64 sums: scikit-learn's mean_squared_error (float64) to float32's rounding, and the
    # whole-set float32 mean of today's records to its rounding
    reference = -mean_squared_error(data.tensors[1].numpy(), outputs)
    assert value == pytest.approx(reference, rel=1e-6)
    assert value == pytest.approx(negative_mse(torch.from_numpy(outputs), data.tensors[1]), 1e-6)
    assert "prediction_share" not in passed.figures.statistics  # regression: no class shares


class Median:
    """A metric with no summed form: it needs the whole set."""

    def __call__(self, outputs, labels):
        return float((outputs.argmax(dim=1) == labels).float().median())


class MeanAbsoluteError:
    """A metric of a user's own with a summed form: streamed like the defaults."""

    calls = 0

    def __call__(self, outputs, labels):
        return -float((outputs[:, 0] - labels.float()).abs().mean())

    def batch_sums(self, outputs, labels):
        MeanAbsoluteError.calls += 1
        return [(outputs[:, 0] - labels.float()).abs().double().sum(), len(labels)]

    def from_sums(self, sums):
        return -sums[0] / sums[1]


def test_a_metric_without_sums_gets_view_zero_of_the_whole_set():
    torch.manual_seed(0)
    data = Augmented(30)
    model = TinyNet()()
    replay = Replay(5, 2)
    passed = _figure_pass(model, DataLoader(data, batch_size=7), "ce", Median(), replay=replay)
    whole = predict(model, DataLoader(data, batch_size=7), seed=0, replay=Replay(5, 1))
    assert torch.equal(passed.view0.outputs, whole.outputs)  # view 0 of every sample, in order
    assert torch.equal(passed.view0.labels, whole.labels)
    assert passed.figures.metric_sums is None


def test_a_metric_with_sums_is_streamed(tmp_path, loaders):
    train, heldout, _ = loaders
    metric = MeanAbsoluteError()
    lineage = filial.Lineage(
        TinyNet(),
        train,
        heldout,
        run_dir=tmp_path / "run",
        metric=metric,
        max_generations=0,
        tensorboard=False,
        progress=False,
    )
    gen = next(iter(lineage))
    before = MeanAbsoluteError.calls
    record = gen.finish(gen.model)
    assert MeanAbsoluteError.calls - before == len(train)  # one call per training batch
    whole = predict(gen.model, train, seed=0)
    assert record["train"] == pytest.approx(metric(whole.outputs, whole.labels), rel=1e-6)
    lineage.close()


def test_a_store_that_does_not_fit_float16_is_refused_and_leaves_nothing(tmp_path):
    model = nn.Linear(5, 3)
    with torch.no_grad():
        model.bias.fill_(1e5)  # beyond float16's 65504
    spec = StoreSpec("float16", 1, None, "fp")
    passed = training_pass(
        model, DataLoader(blobs(20), batch_size=8), None, 0, store=(spec, tmp_path)
    )
    with pytest.raises(StoreError, match="float16's range"):
        passed.store.publish("fp", "t")
    assert list(tmp_path.iterdir()) == []


def test_non_finite_outputs_make_the_pass_not_finite():
    model = nn.Linear(5, 3)
    with torch.no_grad():
        model.weight[0, 0] = float("nan")
    passed = _figure_pass(model, DataLoader(blobs(20), batch_size=8), "ce", accuracy)
    assert not passed.finite


# -- replayed views: cheaper seeding, the same samples ----------------------------------------


class TorchOnly(Dataset):
    """Augmentation from torch's generator alone (as torchvision's transforms draw)."""

    def __init__(self, n=40):
        self.base = blobs(n, seed=6)

    def __len__(self):
        return len(self.base)

    def __getitem__(self, index):
        x, y = self.base[index]
        return x + torch.randn(x.shape) * (1 + torch.rand(())), y


class RarelyNumpy(TorchOnly):
    """numpy's generator, for one sample in thirteen only, and Python's gauss (which caches
    a second value between calls) for the others."""

    def __getitem__(self, index):
        x, y = super().__getitem__(index)
        if index % 13 == 5:
            return x * float(np.random.rand()), y
        return x + random.gauss(0.0, 1.0), y


@pytest.mark.parametrize("dataset", [TorchOnly, Augmented, RarelyNumpy])
def test_replayed_samples_are_those_of_seeding_every_generator_per_sample(dataset):
    """What is replayed did not change: each (sample, view) is the fetch right after seeding
    torch's, Python's and numpy's generators from Replay.seed_of (the rule before the cheaper
    seeding, written out here), in every batch and whatever the batch's other samples."""
    data = dataset()
    replay = Replay(1234, 3)
    codes = list(range(len(data) * 3))
    random.Random(0).shuffle(codes)
    wrapped = IndexedDataset(data, replay)
    state = (torch.get_rng_state(), random.getstate(), np.random.get_state()[1].copy())
    fetched = []
    for start in range(0, len(codes), 16):
        batch = codes[start : start + 16]
        fetched += list(zip(wrapped.__getitems__(batch).samples, batch, strict=True))
    # the caller's generators did not move
    assert torch.equal(state[0], torch.get_rng_state()) and state[1] == random.getstate()
    assert np.array_equal(state[2], np.random.get_state()[1])
    for (x, y), code in fetched:
        index, view = divmod(code, 3)
        seed_globals(replay.seed_of(index, view), accelerators=False)
        expected, label = data[index]
        assert torch.equal(x, expected) and int(y) == int(label), code


def test_batch_seeds_are_the_per_sample_seeds():
    rng = np.random.default_rng(0)
    for seed in (0, 7, 2**31 - 1, 2**62 + 5):
        replay = Replay(seed, 4)
        indices = rng.integers(0, 2**40, 50).tolist() + [0, 2**32 + 1]
        views = rng.integers(0, 4, len(indices)).tolist()
        assert replay.seeds_of(indices, views) == [
            replay.seed_of(i, v) for i, v in zip(indices, views, strict=True)
        ]


# -- memory ---------------------------------------------------------------------------------

_PEAK_JOB = textwrap.dedent(
    """
    import json, sys, tempfile, torch
    from torch.utils.data import DataLoader, Dataset
    import filial

    class IndexBuilt(Dataset):
        def __init__(self, n, offset=0):
            self.n, self.offset = n, offset
            self.table = torch.randn(512, 32, generator=torch.Generator().manual_seed(0))
        def __len__(self):
            return self.n
        def __getitem__(self, i):
            return self.table[(i + self.offset) % 512], (i + self.offset) % 250

    def status(key):
        for line in open("/proc/self/status"):
            if line.startswith(key + ":"):
                return int(line.split()[1])

    n, views, top_k = int(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3]) or None
    torch.set_num_threads(1)
    lineage = filial.Lineage(
        lambda: torch.nn.Linear(32, 250),
        DataLoader(IndexBuilt(n), batch_size=256),
        DataLoader(IndexBuilt(500, offset=n), batch_size=256),
        run_dir=tempfile.mkdtemp() + "/run", views=views, top_k=top_k,
        max_generations=0, progress=False, tensorboard=False,
    )
    gen = next(iter(lineage))
    open("/proc/self/clear_refs", "w").write("5")  # VmHWM := VmRSS
    before = status("VmRSS")
    gen.finish(gen.model)
    print(json.dumps({"extra_kib": status("VmHWM") - before}))
    """
)


def _extra_peak_kib(n: int, views: int, top_k: int) -> int:
    done = subprocess.run(
        [sys.executable, "-c", _PEAK_JOB, str(n), str(views), str(top_k)],
        capture_output=True,
        text=True,
        timeout=300,
        env={**os.environ, "PYTHONPATH": str(SRC), "OMP_NUM_THREADS": "1"},
    )
    assert done.returncode == 0, done.stderr[-3000:]
    return int(json.loads(done.stdout.strip().splitlines()[-1])["extra_kib"])


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/clear_refs").exists(), reason="needs Linux's /proc")
@pytest.mark.parametrize(("views", "top_k"), [(1, 0), (2, 10)])
def test_the_extra_peak_memory_of_finish_does_not_grow_with_the_training_set(views, top_k):
    """At 10k and 100k samples of 250 outputs: the outputs alone are 9.5 and 95 MiB of
    float32 per view, which the pass before streaming held several times over."""
    small = _extra_peak_kib(10_000, views, top_k)
    large = _extra_peak_kib(100_000, views, top_k)
    assert large - small < 16 * 1024, (small, large)  # KiB: within 16 MiB of each other
    assert large < 64 * 1024, large
