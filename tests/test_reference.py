"""Checks of filial against sources outside the project.

* Kernel ridge self-distillation: Mobahi, Farajtabar & Bartlett, "Self-Distillation Amplifies
  Regularization in Hilbert Space" (NeurIPS 2020), with scikit-learn's ``KernelRidge`` and
  ``numpy.linalg.eigh`` as the independent computations.
* Soft-target gradients: Hinton, Vinyals & Dean (2015), "Distilling the Knowledge in a Neural
  Network", section 2.1, with ``torch.autograd`` and ``torch.nn.functional.kl_div``.
* Label/teacher mixing with a possibly negative label weight: Das & Sanghavi (ICML 2023),
  "Understanding Self-Distillation in the Presence of Label Noise", against
  ``torch.nn.functional.cross_entropy`` and ``torch.nn.functional.mse_loss``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from sklearn.datasets import load_digits
from sklearn.kernel_ridge import KernelRidge
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

import filial
from filial.losses import StudentLoss, soft_cross_entropy

# ---------------------------------------------------------------------------------------------
# 1. Kernel ridge regression: self-distillation in closed form (Mobahi et al., NeurIPS 2020)
# ---------------------------------------------------------------------------------------------

RIDGE = 1.0  # the regulariser c; G + cI has condition number ~2e3 here, so float32 suffices
GENERATIONS = 3  # students after generation 0
TRAIN, HELDOUT = slice(0, 200), slice(200, 400)


def _digits() -> tuple[np.ndarray, np.ndarray]:
    """scikit-learn's 8x8 digits scaled to [0, 1] (float32, as the model sees them)."""
    digits = load_digits()
    return (digits.data / 16.0).astype(np.float32), digits.target.astype(np.int64)


def _krr_lineage(
    x: np.ndarray, y: np.ndarray, x_held: np.ndarray, generations: int, c: float
) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """Iterated scikit-learn KernelRidge, each round refit on the previous round's predictions.

    Returns the training-set and held-out predictions of rounds 0..generations (float64).
    """
    targets = np.eye(y.max() + 1)[y]  # one-hot labels for round 0
    train, held = [], []
    for _ in range(generations + 1):
        ridge = KernelRidge(alpha=c, kernel="linear").fit(x, targets)
        targets = ridge.predict(x)
        train.append(targets)
        held.append(ridge.predict(x_held))
    return train, held


def _relative_error(actual: np.ndarray, reference: np.ndarray) -> float:
    return float(np.linalg.norm(actual - reference) / np.linalg.norm(reference))


@pytest.mark.slow
def test_l2_lineage_matches_iterated_kernel_ridge(tmp_path):
    """An l2 lineage of exactly solved linear students is iterated kernel ridge regression.

    Mobahi, Farajtabar & Bartlett (NeurIPS 2020): with Gram matrix G and regulariser c, round t's
    training predictions are (G (G + cI)^-1)^(t+1) Y. Every generation here is solved in closed
    form from the batches of the shuffled two-worker ``gen.loader``, so any mismatch between a
    sample and its cached target shows up as a wrong solution. References: scikit-learn's
    ``KernelRidge`` refit on its own predictions, and the eigendecomposition of G by
    ``numpy.linalg.eigh``.
    """
    features, labels = _digits()
    x, y = features[TRAIN], labels[TRAIN]
    x_held, y_held = features[HELDOUT], labels[HELDOUT]
    n, dim = x.shape
    classes = int(labels.max()) + 1
    x64 = x.astype(np.float64)
    probe = np.arange(1.0, dim + 1.0)  # a per-sample signature, to see the order of the batches

    train_loader = DataLoader(
        TensorDataset(torch.from_numpy(x), torch.from_numpy(y)),
        batch_size=32,
        shuffle=True,
        num_workers=2,
    )
    heldout_loader = DataLoader(
        TensorDataset(torch.from_numpy(x_held), torch.from_numpy(y_held)), batch_size=64
    )

    def make_model() -> nn.Module:
        return nn.Linear(dim, classes, bias=False)

    lineage = filial.Lineage(
        make_model,
        train_loader,
        heldout_loader,
        run_dir=tmp_path / "run",
        targets="l2",
        store_dtype="float32",
        max_generations=GENERATIONS,
        patience=GENERATIONS + 5,
        seed=3,
    )

    teacher_weight: np.ndarray | None = None  # (C, D) float64 copy of the previous generation
    for gen in lineage:
        xtx = np.zeros((dim, dim))
        xty = np.zeros((dim, classes))
        seen = 0
        order = []
        for inputs, batch_labels, targets in gen.loader:
            xb = inputs.double().numpy()
            if gen.index == 0:
                assert targets is None
                yb = F.one_hot(batch_labels, classes).double().numpy()
            else:
                assert targets is not None and targets.shape == (len(inputs), classes)
                yb = targets.double().numpy()
                # Each cached row is the teacher's output on this very input.
                np.testing.assert_allclose(yb, xb @ teacher_weight.T, rtol=1e-5, atol=1e-5)
            xtx += xb.T @ xb
            xty += xb.T @ yb
            seen += len(xb)
            order.append(xb @ probe)
        assert seen == n
        # The loader really shuffles (batches do not come in dataset order)...
        assert not np.allclose(np.concatenate(order), x64 @ probe)
        # ...and every sample was seen exactly once in the pass.
        np.testing.assert_allclose(xtx, x64.T @ x64, rtol=1e-10, atol=1e-10)

        weight = np.linalg.solve(xtx + RIDGE * np.eye(dim), xty)  # (D, C)
        with torch.no_grad():
            gen.model.weight.copy_(torch.from_numpy(weight.T.copy()))
        teacher_weight = gen.model.weight.detach().double().numpy().copy()
        gen.finish(gen.model)

    result = lineage.result
    assert [r["generation"] for r in result.records] == list(range(GENERATIONS + 1))
    assert result.stop_reason == "max-generations"

    ref_train, ref_held = _krr_lineage(x64, y, x_held.astype(np.float64), GENERATIONS, RIDGE)
    run_dir = tmp_path / "run"
    stored = []
    for g in range(GENERATIONS + 1):
        outputs = filial.TargetStore(run_dir / f"gen{g}").read_all()[:, 0, :].astype(np.float64)
        stored.append(outputs)
        assert _relative_error(outputs, ref_train[g]) < 1e-5, g
        held = np.load(run_dir / f"gen{g}" / "heldout.npy").astype(np.float64)
        assert _relative_error(held, ref_held[g]) < 1e-5, g
        # The record's output_norm is the mean row norm of the training predictions.
        record = result.records[g]
        expected_norm = np.linalg.norm(ref_train[g], axis=1).mean()
        assert record["output_norm"] == pytest.approx(expected_norm, rel=1e-5)

    # Closed form: generation t = (G (G + cI)^-1)^(t+1) Y, in G's eigenbasis (numpy.linalg.eigh).
    gram = x64 @ x64.T
    eigenvalues, basis = np.linalg.eigh(gram)
    shrink = eigenvalues / (eigenvalues + RIDGE)
    one_hot = np.eye(classes)[y]
    for g, outputs in enumerate(stored):
        closed = basis @ (shrink[:, None] ** (g + 1) * (basis.T @ one_hot))
        assert _relative_error(outputs, closed) < 1e-5, g

    # Each eigencomponent shrinks by d_i / (d_i + c) per generation. Only components clearly above
    # float32 noise are compared one by one; the rest must stay at noise level.
    clear_eigen = eigenvalues > 1e-6 * eigenvalues.max()
    assert clear_eigen.sum() >= 40  # the digits Gram matrix has rank ~50 here
    for g in range(1, len(stored)):
        before = basis.T @ stored[g - 1]
        after = basis.T @ stored[g]
        scale = np.linalg.norm(before)
        clear = clear_eigen[:, None] & (np.abs(before) > 1e-3 * scale)
        assert clear.sum() > 100
        ratio = after[clear] / before[clear]
        expected = np.broadcast_to(shrink[:, None], before.shape)[clear]
        np.testing.assert_allclose(ratio, expected, rtol=5e-4, atol=0)
        np.testing.assert_allclose(after, shrink[:, None] * before, rtol=0, atol=1e-6 * scale)
        # The shrinkage is real: small-eigenvalue directions lose more than the top one.
        assert expected.min() < 0.5 < shrink.max()


# ---------------------------------------------------------------------------------------------
# 2. Soft-target gradient (Hinton, Vinyals & Dean 2015, section 2.1)
# ---------------------------------------------------------------------------------------------


def _logits(seed: int, batch: int = 6, classes: int = 5, scale: float = 3.0) -> torch.Tensor:
    generator = torch.Generator().manual_seed(seed)
    return scale * torch.randn(batch, classes, generator=generator, dtype=torch.float64)


@pytest.mark.parametrize("temperature", [0.5, 1.0, 2.0, 4.0, 10.0])
def test_soft_target_gradient_is_scaled_probability_difference(temperature):
    """dC/dz_i = (1/T)(q_i - p_i) in the paper; filial multiplies by T^2 and averages over B,
    so the gradient per sample is T (softmax(z/T) - softmax(v/T)) / B (Hinton et al. 2015, 2.1).
    """
    z = _logits(1).requires_grad_(True)
    v = _logits(2)
    loss = soft_cross_entropy(z, v, temperature)
    (grad,) = torch.autograd.grad(loss, z)
    batch = z.shape[0]
    q = torch.softmax(z.detach() / temperature, dim=1)
    p = torch.softmax(v / temperature, dim=1)
    expected = temperature * (q - p) / batch
    torch.testing.assert_close(grad, expected, rtol=1e-10, atol=1e-12)
    assert grad.abs().max() > 1e-4  # not trivially zero


@pytest.mark.parametrize("temperature", [0.5, 1.0, 3.0, 20.0])
def test_soft_cross_entropy_is_kl_plus_teacher_entropy(temperature):
    """Cross-entropy = KL(p || q) + H(p); cross-checked with torch.nn.functional.kl_div."""
    z, v = _logits(3), _logits(4)
    log_q = F.log_softmax(z / temperature, dim=1)
    p = F.softmax(v / temperature, dim=1)
    kl = F.kl_div(log_q, p, reduction="batchmean")
    entropy = -(p * F.log_softmax(v / temperature, dim=1)).sum(dim=1).mean()
    expected = (kl + entropy) * temperature**2
    actual = soft_cross_entropy(z, v, temperature)
    torch.testing.assert_close(actual, expected, rtol=1e-10, atol=1e-12)


def test_high_temperature_gradient_matches_logit_matching():
    """With zero-mean logits and T large against them, the gradient approaches (z - v) / N per
    sample, i.e. matching logits (Hinton et al. 2015, section 2.1), here times 1/B; the error of
    the approximation falls like 1/T."""
    z0 = _logits(5, scale=1.0)
    v = _logits(6, scale=1.0)
    z0 = z0 - z0.mean(dim=1, keepdim=True)
    v = v - v.mean(dim=1, keepdim=True)
    batch, classes = z0.shape
    matching = (z0 - v) / (classes * batch)
    errors = {}
    for temperature in (50.0, 100.0, 200.0):
        z = z0.clone().requires_grad_(True)
        (grad,) = torch.autograd.grad(soft_cross_entropy(z, v, temperature), z)
        errors[temperature] = float((grad - matching).norm() / matching.norm())
        # The paper's expansion: relative error of order max|logit| / T.
        assert errors[temperature] < 2.0 * max(z0.abs().max(), v.abs().max()) / temperature
    assert errors[100.0] < 0.6 * errors[50.0]
    assert errors[200.0] < 0.6 * errors[100.0]
    assert errors[200.0] < 0.02


# ---------------------------------------------------------------------------------------------
# 3. StudentLoss mixing (Das & Sanghavi, ICML 2023: label weight may be negative)
# ---------------------------------------------------------------------------------------------


def _batch(seed: int = 7, batch: int = 8, classes: int = 4):
    generator = torch.Generator().manual_seed(seed)
    outputs = torch.randn(batch, classes, generator=generator, dtype=torch.float64)
    targets = 2.0 * torch.randn(batch, classes, generator=generator, dtype=torch.float64)
    labels = torch.randint(0, classes, (batch,), generator=generator)
    return outputs, labels, targets


@pytest.mark.parametrize("label_weight", [0.0, 0.3, 1.0, -0.5])
@pytest.mark.parametrize("temperature", [1.0, 2.5])
def test_ce_student_loss_mixes_soft_and_label_terms(label_weight, temperature):
    """(1 - w) T^2 CE(softmax(v/T), z/T) + w CE(labels, z), the soft term computed with
    torch.nn.functional.cross_entropy's probability-target form."""
    outputs, labels, targets = _batch()
    loss = StudentLoss("ce", temperature=temperature, label_weight=label_weight)
    soft = F.cross_entropy(outputs / temperature, F.softmax(targets / temperature, dim=1))
    soft = soft * temperature**2
    hard = F.cross_entropy(outputs, labels)
    expected = (1.0 - label_weight) * soft + label_weight * hard
    torch.testing.assert_close(loss(outputs, labels, targets), expected, rtol=1e-10, atol=1e-12)
    # Generation 0 (no targets): plain cross-entropy on the labels, whatever the weight.
    fresh = StudentLoss("ce", temperature=temperature, label_weight=label_weight)
    torch.testing.assert_close(fresh(outputs, labels, None), hard, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("label_weight", [0.0, 0.3, 1.0, -0.5])
def test_l2_student_loss_is_summed_mse_over_batch(label_weight):
    """Batch mean of the per-sample sum of squared errors = mse_loss(reduction="sum") / B."""
    outputs, labels, targets = _batch()
    batch, classes = outputs.shape
    one_hot = F.one_hot(labels, classes).to(outputs.dtype)
    on_labels = F.mse_loss(outputs, one_hot, reduction="sum") / batch
    on_targets = F.mse_loss(outputs, targets, reduction="sum") / batch

    gen0 = StudentLoss("l2", label_weight=label_weight)
    torch.testing.assert_close(gen0(outputs, labels, None), on_labels, rtol=1e-10, atol=1e-12)

    student = StudentLoss("l2", label_weight=label_weight)
    expected = (1.0 - label_weight) * on_targets + label_weight * on_labels
    torch.testing.assert_close(student(outputs, labels, targets), expected, rtol=1e-10, atol=1e-12)


def test_l2_student_loss_regresses_on_float_labels():
    """Floating-point labels are regression targets in generation 0, taken as they are."""
    outputs, _, values = _batch(seed=11)
    loss = StudentLoss("l2")
    expected = F.mse_loss(outputs, values, reduction="sum") / outputs.shape[0]
    torch.testing.assert_close(loss(outputs, values, None), expected, rtol=1e-10, atol=1e-12)


def test_l2_student_gradient_matches_mse_loss():
    """The gradient too: autograd through StudentLoss equals that through F.mse_loss."""
    outputs, labels, targets = _batch(seed=13)
    mine = outputs.clone().requires_grad_(True)
    theirs = outputs.clone().requires_grad_(True)
    StudentLoss("l2", label_weight=-0.5)(mine, labels, targets).backward()
    one_hot = F.one_hot(labels, outputs.shape[1]).to(outputs.dtype)
    reference = 1.5 * F.mse_loss(theirs, targets, reduction="sum") - 0.5 * F.mse_loss(
        theirs, one_hot, reduction="sum"
    )
    (reference / outputs.shape[0]).backward()
    torch.testing.assert_close(mine.grad, theirs.grad, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("label_weight", [math.nan, math.inf, -math.inf])
def test_non_finite_label_weight_is_refused(label_weight):
    for kind in ("ce", "l2"):
        with pytest.raises(ValueError, match="label_weight"):
            StudentLoss(kind, label_weight=label_weight)


@pytest.mark.parametrize("temperature", [0.0, -1.0, -0.0, math.nan, math.inf])
def test_non_positive_or_non_finite_temperature_is_refused(temperature):
    with pytest.raises(ValueError, match="temperature"):
        StudentLoss("ce", temperature=temperature)


def test_lineage_refuses_bad_loss_settings(tmp_path):
    features, labels = _digits()
    train = DataLoader(
        TensorDataset(torch.from_numpy(features[:20]), torch.from_numpy(labels[:20]))
    )
    held = DataLoader(
        TensorDataset(torch.from_numpy(features[20:30]), torch.from_numpy(labels[20:30]))
    )

    def make_model() -> nn.Module:
        return nn.Linear(features.shape[1], 10)

    for bad in ({"label_weight": math.nan}, {"temperature": 0.0}, {"temperature": -2.0}):
        with pytest.raises(ValueError, match=next(iter(bad))):
            filial.Lineage(make_model, train, held, run_dir=tmp_path / "refused", **bad)
