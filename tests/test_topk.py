"""Compact top-k targets: layout, reconstruction, bytes, the ce gradient, and a lineage."""

from __future__ import annotations

import logging

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from conftest import TinyNet, blobs
from torch.utils.data import DataLoader

import filial
from filial.losses import StudentLoss, TopKTargets, soft_cross_entropy, soft_cross_entropy_top_k
from filial.store import TargetStore


def _logits(n=50, classes=7, seed=0):
    return np.random.default_rng(seed).normal(size=(n, 1, classes)).astype(np.float32) * 3


def test_k_equal_to_c_reconstructs_the_full_softmax(tmp_path):
    outputs = _logits()
    store = TargetStore.write(
        tmp_path, outputs, dtype="float32", fingerprint="f", teacher_sha256="t", top_k=7
    )
    values, classes = store.gather(np.arange(50))
    dense = np.full((50, 7), -np.inf, dtype=np.float32)
    np.put_along_axis(dense, classes, values, axis=1)
    for t in (1.0, 3.0):
        rebuilt = torch.softmax(torch.from_numpy(dense) / t, dim=1)
        full = torch.softmax(torch.from_numpy(outputs[:, 0]) / t, dim=1)
        torch.testing.assert_close(rebuilt, full)
        z = torch.randn(50, 7)
        torch.testing.assert_close(
            soft_cross_entropy_top_k(
                z, TopKTargets(torch.from_numpy(values), torch.from_numpy(classes)), t
            ),
            soft_cross_entropy(z, torch.from_numpy(outputs[:, 0]), t),
        )


def test_kept_values_are_the_largest_in_order(tmp_path):
    outputs = _logits(classes=20)
    store = TargetStore.write(tmp_path, outputs, fingerprint="f", teacher_sha256="t", top_k=3)
    values, classes = store.gather(np.array([4, 9]))
    reference = torch.topk(torch.from_numpy(outputs[[4, 9], 0]), 3)  # torch's own top-k
    np.testing.assert_array_equal(classes, reference.indices.numpy())
    np.testing.assert_allclose(values, reference.values.numpy(), rtol=2**-11)
    assert np.load(tmp_path / "targets_index.npy").dtype == np.int16
    store.verify()


@pytest.mark.parametrize("classes", [10, 100, 1000])
def test_bytes_per_sample_drop_as_k_over_c(tmp_path, classes):
    outputs = _logits(n=8, classes=classes)
    dense = TargetStore.write(tmp_path / "dense", outputs, fingerprint="f", teacher_sha256="t")
    compact = TargetStore.write(
        tmp_path / "top", outputs, fingerprint="f", teacher_sha256="t", top_k=10
    )
    assert dense.manifest["bytes_per_sample"] == classes * 2  # float16
    assert compact.manifest["bytes_per_sample"] == 10 * (2 + 2)  # float16 value + int16 class
    assert (
        compact.manifest["bytes_per_sample"] / dense.manifest["bytes_per_sample"]
        == 10 * 2 / (classes) * 1.0
    )


def test_top_k_gradient_matches_the_hand_derivation():
    """dL/dz = (T/B) (softmax(z/T) - p), p the softmax over the k kept teacher logits placed at
    their classes and 0 elsewhere: differentiate -T^2/B sum_j p_j log q_j with sum_j p_j = 1."""
    torch.manual_seed(0)
    batch, classes, k, t = 6, 9, 4, 2.5
    z = torch.randn(batch, classes, requires_grad=True)
    teacher = torch.randn(batch, classes) * 2
    top = torch.topk(teacher, k)
    loss = soft_cross_entropy_top_k(z, TopKTargets(top.values, top.indices), t)
    (grad,) = torch.autograd.grad(loss, z)
    p = torch.zeros(batch, classes).scatter(1, top.indices, torch.softmax(top.values / t, dim=1))
    expected = t / batch * (torch.softmax(z.detach() / t, dim=1) - p)
    torch.testing.assert_close(grad, expected)


def test_a_top_k_lineage_trains_on_the_kept_logits(tmp_path):
    train = DataLoader(
        blobs(64, classes=5),
        batch_size=16,
        shuffle=True,
        generator=torch.Generator().manual_seed(0),
    )
    heldout = DataLoader(blobs(32, classes=5, seed=2), batch_size=16)
    lineage = filial.Lineage(
        TinyNet(classes=5),
        train,
        heldout,
        run_dir=tmp_path / "run",
        max_generations=1,
        top_k=2,
        store_dtype="float32",
        progress=False,
    )
    teachers = []
    for gen in lineage:
        model = gen.model
        opt = torch.optim.SGD(model.parameters(), lr=0.1)
        for inputs, labels, targets in gen.loader:
            if gen.index == 1:
                assert isinstance(targets, TopKTargets) and targets.values.shape == (len(labels), 2)
                with torch.no_grad():
                    expected = torch.topk(teachers[0](inputs), 2)
                torch.testing.assert_close(targets.values, expected.values, rtol=1e-5, atol=1e-5)
                assert torch.equal(targets.classes, expected.indices)
            loss = gen.loss(model(inputs), labels, targets)
            opt.zero_grad()
            loss.backward()
            opt.step()
        gen.finish(model)
        teachers.append(model)
    assert [r["generation"] for r in lineage.result.records] == [0, 1]
    assert TargetStore(tmp_path / "run" / "gen0").manifest["layout"] == "top_k"


def test_top_k_is_refused_with_l2_and_beyond_the_output_width(loaders, tmp_path):
    train, heldout, _ = loaders
    with pytest.raises(ValueError, match="top_k keeps only the k largest"):
        filial.Lineage(TinyNet(), train, heldout, run_dir=tmp_path / "a", targets="l2", top_k=2)
    with pytest.raises(ValueError, match="top_k=5 is more than the model's 3 outputs"):
        filial.Lineage(TinyNet(), train, heldout, run_dir=tmp_path / "b", top_k=5)
    assert not (tmp_path / "a").exists() and not (tmp_path / "b").exists()
    loss = StudentLoss("ce", temperature=2.0, label_weight=0.25)
    z, labels = torch.randn(4, 3), torch.tensor([0, 1, 2, 0])
    top = torch.topk(torch.randn(4, 3), 3)
    mixed = loss(z, labels, TopKTargets(top.values, top.indices))
    expected = 0.75 * soft_cross_entropy_top_k(z, TopKTargets(top.values, top.indices), 2.0)
    torch.testing.assert_close(mixed, expected + 0.25 * F.cross_entropy(z, labels))


def test_top_k_loss_takes_int32_classes():
    z = torch.randn(3, 6)
    top = torch.topk(torch.randn(3, 6), 2)
    wide = soft_cross_entropy_top_k(z, TopKTargets(top.values, top.indices), 1.5)
    narrow = soft_cross_entropy_top_k(z, TopKTargets(top.values, top.indices.int()), 1.5)
    torch.testing.assert_close(wide, narrow)


def test_a_top_k_store_no_smaller_than_the_full_one_is_said(loaders, tmp_path, caplog):
    """Three outputs, top_k=2 in float16: 2 * (2 + 2) = 8 bytes against 3 * 2 = 6 in full."""
    train, heldout, _ = loaders
    caplog.set_level(logging.WARNING, logger="filial")
    lineage = filial.Lineage(
        TinyNet(),
        train,
        heldout,
        run_dir=tmp_path / "r",
        top_k=2,
        progress=False,
        tensorboard=False,
    )
    assert any("stores 8 bytes per sample" in r.getMessage() for r in caplog.records)
    lineage.close()
