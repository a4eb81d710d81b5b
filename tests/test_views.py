"""Replayed views: cached targets that belong to the very augmented inputs a student sees.

The augmented dataset here (made by the tests) draws from all three global generators, as
torchvision transforms (torch), ``random``-based and numpy-based augmentation code do.
"""

from __future__ import annotations

import json
import logging
import random
import shutil
import subprocess

import numpy as np
import pytest
import torch
from conftest import TinyNet, blobs
from torch import nn
from torch.utils.data import DataLoader, Dataset

import filial
import filial.probe
from filial.data import Replay, sequential_loader, training_loader
from filial.errors import InputError
from filial.lineage import load_generation
from filial.probe import probe


@pytest.fixture(autouse=True)
def _fresh_warnings(monkeypatch):
    """Each test sees the once-per-dataset augmentation warnings anew."""
    monkeypatch.setattr(filial.probe, "_AUGMENTATION_WARNED", set())


class Augmented(Dataset):
    """Blobs with random noise (torch), a random sign flip (random) and a random scale (numpy)."""

    def __init__(self, n: int = 48, seed: int = 1) -> None:
        self.base = blobs(n, seed=seed)

    def __len__(self) -> int:
        return len(self.base)

    def __getitem__(self, index: int):
        x, y = self.base[index]
        x = x + 0.3 * torch.randn(x.shape)
        if random.random() < 0.5:
            x = -x
        return x * float(1.0 + 0.1 * np.random.randn()), y


class WithIndex(Augmented):
    """Augmented samples labelled with their own index (to check which sample came)."""

    def __getitem__(self, index: int):
        return super().__getitem__(index)[0], index


class RarelyFlipped(Augmented):
    """A sign flip for one sample in two hundred: augmentation a comparison of a few samples
    would miss, but a draw from the generator all the same."""

    def __getitem__(self, index: int):
        x, y = self.base[index]
        return (-x if random.random() < 0.005 else x), y


def noisy_collate(samples):
    """A collate_fn that augments the whole batch (torch's global generator)."""
    inputs = torch.stack([x for x, _ in samples])
    return inputs + 0.1 * torch.randn(inputs.shape), torch.stack([y for _, y in samples])


class OwnGenerator(Augmented):
    """Augmentation from a private, unseeded generator: no global seed can replay it."""

    def __init__(self, n: int = 48, seed: int = 1) -> None:
        super().__init__(n, seed)
        self.rng = np.random.default_rng()

    def __getitem__(self, index: int):
        x, y = self.base[index]
        return x + float(self.rng.normal()), y


def _train_loader(dataset, workers=0):
    return DataLoader(
        dataset,
        batch_size=8,
        shuffle=True,
        num_workers=workers,
        generator=torch.Generator().manual_seed(5),
    )


def _lineage(tmp_path, dataset, views, workers=0, model_fn=None, **kwargs):
    return filial.Lineage(
        model_fn or TinyNet(),
        _train_loader(dataset, workers),
        DataLoader(blobs(24, seed=2), batch_size=12),
        run_dir=tmp_path / f"views{views}",
        views=views,
        store_dtype="float32",
        max_generations=1,
        progress=False,
        tensorboard=False,
        **kwargs,
    )


def _step(model, opt, gen, inputs, labels, targets):
    loss = gen.loss(model(inputs), labels, targets)
    opt.zero_grad()
    loss.backward()
    opt.step()


@pytest.mark.slow
@pytest.mark.parametrize("views", [1, 3])
def test_targets_are_the_teachers_outputs_on_the_very_inputs_of_each_batch(tmp_path, views):
    """Generation 1 over a shuffled two-worker loader: every target row equals the generation-0
    model's output on that batch's input row (float32 store), epoch after epoch."""
    lineage = _lineage(tmp_path, Augmented(), views, workers=2)
    distinct: set[bytes] = set()
    for gen in lineage:
        model = gen.model
        opt = torch.optim.SGD(model.parameters(), lr=0.1)
        teacher = None
        if gen.index == 1:
            teacher = load_generation(lineage.model_fn, lineage.run_dir, lineage.result.records[0])
            teacher.eval()
        for _ in range(3):
            for inputs, labels, targets in gen.loader:
                if teacher is not None:
                    with torch.no_grad():
                        expected = teacher(inputs)
                    torch.testing.assert_close(targets, expected, rtol=1e-5, atol=1e-5)
                    distinct.update(row.numpy().tobytes() for row in inputs)
                _step(model, opt, gen, inputs, labels, targets)
        gen.finish(model)
    store = filial.TargetStore(lineage.run_dir / "gen0")
    assert store.shape == (48, views, 3)
    # Each sample comes in at most `views` distinct inputs; with three views and three epochs a
    # sample shows more than one of them (the chance that all 48 show only one is (1/9) ** 48).
    if views == 1:
        assert len(distinct) == 48
    else:
        assert 48 < len(distinct) <= 48 * views


def test_a_view_is_the_same_tensors_in_the_teacher_pass_and_in_training():
    """The replayed fetch of (i, v) does not depend on the order, the batch or the process."""
    dataset = WithIndex(n=12)
    replay = Replay(seed=11, views=2)
    source = DataLoader(dataset, batch_size=5)
    by_code = {}
    for codes, inputs, labels in sequential_loader(source, seed=0, replay=replay):
        assert [c // 2 for c in codes] == labels.tolist()
        by_code.update({c: row for c, row in zip(codes, inputs, strict=True)})
    assert sorted(by_code) == list(range(24))
    assert not torch.equal(by_code[0], by_code[1])  # two views of sample 0 differ
    shuffled = training_loader(_train_loader(dataset, workers=2), None, replay, choice_seed=3)
    shown: dict[int, set[int]] = {i: set() for i in range(12)}
    for _ in range(4):
        for inputs, labels, _ in shuffled:
            for row, i in zip(inputs, labels.tolist(), strict=True):
                view = [v for v in (0, 1) if torch.equal(row, by_code[2 * i + v])]
                assert len(view) == 1  # exactly one of this sample's own two views
                shown[i].update(view)
    # Each epoch draws the views anew: over four epochs most samples show both.
    assert sum(len(views) == 2 for views in shown.values()) >= 6


class Dropping(nn.Module):
    """A tiny model with dropout (drawn from torch's global generator, as nn.Dropout is) whose
    masks the test records."""

    def __init__(self) -> None:
        super().__init__()
        self.body = nn.Sequential(nn.Linear(5, 16), nn.ReLU())
        self.head = nn.Linear(16, 3)
        self.masks: list[torch.Tensor] = []

    def forward(self, x):
        h = self.body(x)
        if self.training:
            keep = torch.rand(h.shape) >= 0.5
            self.masks.append(keep)
            h = h * keep * 2.0
        return self.head(h)


def _rng_trace(tmp_path, dataset, views):
    lineage = _lineage(tmp_path, dataset, views, model_fn=Dropping)
    trace = {}
    for gen in lineage:
        model = gen.model
        opt = torch.optim.SGD(model.parameters(), lr=0.1)
        for _ in range(2):
            for inputs, labels, targets in gen.loader:
                _step(model, opt, gen, inputs, labels, targets)
        draws = (torch.rand(6), random.random(), np.random.rand())
        trace[gen.index] = (torch.cat(model.masks), *draws)
        gen.finish(model)
    return trace, lineage


def test_replay_leaves_the_users_random_streams_alone(tmp_path):
    """Dropout masks and later draws from torch, random and numpy in a replayed student equal
    those of a student over the same data without augmentation (hence without replay): fetching
    views draws nothing from the caller's generators. With num_workers=0 the fetches run in this
    very process, the case where they could."""
    replayed, replayed_lineage = _rng_trace(tmp_path / "a", Augmented(), views=3)
    plain, plain_lineage = _rng_trace(tmp_path / "b", blobs(48, seed=1), views=1)
    assert replayed_lineage._inputs.replay is not None and plain_lineage._inputs.replay is None
    # Generation 0 trains on the user's own augmentation, which draws from these streams (so it
    # differs); the replayed student must not.
    masks_a, rand_a, py_a, np_a = replayed[1]
    masks_b, rand_b, py_b, np_b = plain[1]
    assert masks_a.shape == (48 * 2, 16)
    assert torch.equal(masks_a, masks_b)
    assert torch.equal(rand_a, rand_b) and py_a == py_b and np_a == np_b
    assert not torch.equal(replayed[0][0], plain[0][0])  # the check can tell streams apart


def test_a_deterministic_dataset_is_not_replayed(tmp_path, caplog):
    lineage = _lineage(tmp_path / "a", blobs(48), views=1)
    assert lineage._inputs.replay is None  # no per-sample seeding on the hot path
    lineage.close()
    caplog.set_level(logging.WARNING, logger="filial")
    copies = _lineage(tmp_path / "b", blobs(48), views=2)  # allowed, but said to be waste
    assert any("2 copies of each target" in r.getMessage() for r in caplog.records)
    copies.close()


def test_an_augmenting_dataset_with_one_view_is_replayed_and_said_once(tmp_path, caplog):
    caplog.set_level(logging.WARNING, logger="filial")
    dataset = Augmented(n=40, seed=17)  # a dataset no other test uses: its first warning
    first = _lineage(tmp_path / "a", dataset, views=1)
    second = _lineage(tmp_path / "b", dataset, views=1)
    assert first._inputs.replay == Replay(first._inputs.replay.seed, 1)
    said = [r for r in caplog.records if "single replayed augmented view" in r.getMessage()]
    assert len(said) == 1
    first.close()
    second.close()


def test_views_that_no_seed_can_replay_are_refused(tmp_path, caplog):
    with pytest.raises(ValueError, match=r"views=3 replays .* teacher_mode='online'"):
        _lineage(tmp_path / "a", OwnGenerator(), views=3)
    assert not (tmp_path / "a").exists()
    caplog.set_level(logging.WARNING, logger="filial")
    lineage = _lineage(tmp_path / "b", OwnGenerator(seed=23), views=1)
    assert lineage._inputs.replay is None
    assert any("even under the same seeds" in r.getMessage() for r in caplog.records)
    lineage.close()


def test_views_go_with_the_cache_only(tmp_path):
    with pytest.raises(ValueError, match="teacher_mode='online' caches none"):
        _lineage(tmp_path, Augmented(), views=2, teacher_mode="online")


def test_top_k_targets_keep_every_view(tmp_path):
    lineage = _lineage(tmp_path, Augmented(), views=2, top_k=2)
    for gen in lineage:
        if gen.index == 1:
            teacher = load_generation(lineage.model_fn, lineage.run_dir, lineage.result.records[0])
            for inputs, _, targets in gen.loader:
                with torch.no_grad():
                    expected = torch.topk(teacher.eval()(inputs), 2, dim=1)  # torch's own top-k
                torch.testing.assert_close(targets.values, expected.values)
                assert torch.equal(targets.classes, expected.indices)
        gen.finish(gen.model)
    store = filial.TargetStore(lineage.run_dir / "gen0")
    assert store.shape == (48, 2, 2) and store.top_k == 2  # (N, views, k)
    assert store.manifest["classes"] == 3 and store.manifest["views"] == 2


def test_rare_augmentation_is_seen_from_the_generators_state():
    """One flip in two hundred changes none of the 48 probe samples under another seed most of
    the time, but the draw itself moves Python's generator."""
    seen = probe(DataLoader(RarelyFlipped(), batch_size=8))
    assert seen.varies and seen.replayable
    assert not probe(DataLoader(blobs(48), batch_size=8)).varies


def test_augmentation_in_the_collate_cannot_be_replayed(tmp_path, caplog):
    def loader():
        return DataLoader(blobs(48, seed=1), batch_size=8, collate_fn=noisy_collate)

    assert probe(loader()).collate_draws and not probe(loader()).replayable
    heldout = DataLoader(blobs(24, seed=2), batch_size=12)
    with pytest.raises(ValueError, match="collate_fn draws .* into the dataset"):
        filial.Lineage(TinyNet(), loader(), heldout, run_dir=tmp_path / "a", views=2)
    caplog.set_level(logging.WARNING, logger="filial")
    lineage = filial.Lineage(
        TinyNet(), loader(), heldout, run_dir=tmp_path / "b", progress=False, tensorboard=False
    )
    assert lineage._inputs.replay is None and lineage.settings["replayed"] is False
    assert any("collate_fn draws" in r.getMessage() for r in caplog.records)
    lineage.close()


def test_a_run_cached_without_replay_is_not_resumed_with_it(tmp_path):
    """Targets of unreplayed augmentation (a run written before replay existed) must not be
    read as replayed views."""
    lineage = _lineage(tmp_path, Augmented(), views=1)
    assert lineage.settings["replayed"] is True
    for gen in lineage:
        gen.finish(gen.model)
        break
    lineage.close()
    state_path = lineage.state_path
    state = json.loads(state_path.read_text())
    del state["settings"]["replayed"]  # as an older filial wrote it
    state_path.write_text(json.dumps(state))
    with pytest.raises(InputError, match="replayed: False in the run, True now"):
        _lineage(tmp_path, Augmented(), views=1)


JAVA_SPLITMIX = """
import java.util.SplittableRandom;
public class Mix {
  public static void main(String[] a) {
    for (long seed : new long[] {0L, 7L, 12345L}) {
      SplittableRandom r = new SplittableRandom(seed);
      for (int k = 0; k < 3; k++) System.out.println(Long.toUnsignedString(r.nextLong()));
    }
  }
}
"""


@pytest.mark.slow
@pytest.mark.skipif(shutil.which("java") is None, reason="needs a Java runtime (the reference)")
def test_the_seed_hash_is_splitmix64_as_javas_splittable_random_computes_it(tmp_path):
    """The replay seeds' finaliser against an outside implementation: OpenJDK's
    java.util.SplittableRandom, whose nextLong() from seed s returns mix64(s + k * GAMMA) for
    k = 1, 2, ... with GAMMA = 0x9E3779B97F4A7C15 (Steele, Lea & Flood 2014)."""
    from filial.data import _mix

    source = tmp_path / "Mix.java"
    source.write_text(JAVA_SPLITMIX)
    printed = subprocess.run(
        ["java", str(source)], capture_output=True, text=True, check=True, timeout=120
    ).stdout.split()
    gamma, mask = 0x9E3779B97F4A7C15, (1 << 64) - 1
    ours = [_mix((seed + k * gamma - gamma) & mask) for seed in (0, 7, 12345) for k in (1, 2, 3)]
    assert [int(v) for v in printed] == ours
