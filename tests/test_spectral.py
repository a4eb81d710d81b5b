"""The spectral view (filial.spectral) against outside references.

The exact regime: a linear model with an unpenalised bias on fixed random Fourier features
(Rahimi & Recht, NIPS 2007: phi(x) = sqrt(2/D) cos(W x + b), W ~ N(0, 2 gamma I),
b ~ U[0, 2 pi]) of scikit-learn's digits, each generation solved to its ridge solution on the
previous generation's outputs. There self-distillation is iterated kernel ridge regression
(Mobahi, Farajtabar & Bartlett, NeurIPS 2020): each round multiplies eigencomponent i of the
centred training outputs by d_i / (d_i + c). References: scikit-learn's ``KernelRidge`` (linear
kernel on the centred features, centred targets; the intercept is the targets' mean) as the
independent solver, ``numpy.linalg.eigh`` for the basis.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest
import torch
from sklearn.datasets import load_digits
from sklearn.kernel_ridge import KernelRidge
from torch import nn
from torch.utils.data import TensorDataset

from filial import spectral

RIDGE = 3.0
GENERATIONS = 6
CLASSES = 10
FEATURES = 300


def _onehot_neg_mse(outputs: torch.Tensor, labels: torch.Tensor) -> float:
    """Minus the mean squared error against one-hot labels (a continuous metric)."""
    target = torch.nn.functional.one_hot(labels.long(), outputs.shape[1]).to(outputs.dtype)
    return -float((outputs - target).pow(2).mean())


class _Fourier(nn.Module):
    """Fixed random Fourier features (Rahimi & Recht 2007), frozen."""

    def __init__(self, dim: int, width: int, gamma: float, seed: int) -> None:
        super().__init__()
        generator = torch.Generator().manual_seed(seed)
        self.register_buffer("w", torch.randn(dim, width, generator=generator) * (2 * gamma) ** 0.5)
        self.register_buffer("b", torch.rand(width, generator=generator) * 2 * np.pi)
        self.scale = (2.0 / width) ** 0.5

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.scale * torch.cos(x @ self.w + self.b)


def _model() -> nn.Module:
    return nn.Sequential(
        _Fourier(64, FEATURES, gamma=0.05, seed=7), nn.Linear(FEATURES, CLASSES)
    ).double()


def _data() -> tuple[torch.Tensor, torch.Tensor, torch.Tensor, torch.Tensor]:
    digits = load_digits()
    x = torch.from_numpy(digits.data / 16.0)  # float64: the exact regime, no float32 noise
    y = torch.from_numpy(digits.target.astype(np.int64))
    return x[:200], y[:200], x[200:400], y[200:400]


def _solve(model: nn.Module, x: torch.Tensor, targets: np.ndarray, ridge: float) -> None:
    """Set the last layer to the ridge solution with an unpenalised bias (centred normal
    equations), in float64."""
    with torch.no_grad():
        phi = model[0](x).double().numpy()
    mean_phi, mean_y = phi.mean(axis=0), targets.mean(axis=0)
    centred = phi - mean_phi
    weight = np.linalg.solve(
        centred.T @ centred + ridge * np.eye(phi.shape[1]), centred.T @ (targets - mean_y)
    )
    with torch.no_grad():
        model[1].weight.copy_(torch.from_numpy(weight.T.copy()))
        model[1].bias.copy_(torch.from_numpy(mean_y - mean_phi @ weight))


def _lineage(ridge: float):
    """The actual lineage: per generation, training and held-out outputs (float64) of the
    model solved to the ridge solution on the previous outputs."""
    x, y, x_held, _ = _data()
    model = _model()
    targets = np.eye(CLASSES)[y.numpy()]
    train, held = [], []
    for _ in range(GENERATIONS + 1):
        _solve(model, x, targets, ridge)
        with torch.no_grad():
            targets = model(x).double().numpy()
            held.append(model(x_held).double().numpy())
        train.append(targets)
    return model, train, held


def _kernel(model: nn.Module) -> spectral.Kernel:
    x, y, x_held, y_held = _data()
    indices = spectral.subset_indices(len(x), 2000, seed=0)
    features, labels = spectral.features_of(model, TensorDataset(x, y), indices, None, 64)
    held_features, held_labels = spectral.features_of(
        model, TensorDataset(x_held, y_held), np.arange(len(x_held)), None, 64
    )
    return spectral.build_kernel(
        indices, features, labels.numpy(), held_features, held_labels.numpy()
    )


@pytest.fixture(scope="module")
def exact():
    model, train, held = _lineage(RIDGE)
    return model, train, held, _kernel(model)


def test_hook_reads_the_last_linear_input(exact):
    """The default features are the input of the last nn.Linear: the Fourier features."""
    model, _, _, kernel = exact
    x, _, _, _ = _data()
    with torch.no_grad():
        phi = model[0](x).double().numpy()
    np.testing.assert_allclose(kernel.features, phi - phi.mean(axis=0), rtol=0, atol=1e-6)
    # The basis is numpy.linalg.eigh's of the centred Gram matrix, in descending order.
    gram = kernel.features @ kernel.features.T
    eigenvalues = np.linalg.eigh(gram)[0][::-1]
    # Centring leaves rank m - 1 (the constant vector is in the null space): 199 kept.
    assert len(kernel.eigenvalues) == 199 == np.linalg.matrix_rank(kernel.features)
    np.testing.assert_allclose(kernel.eigenvalues, eigenvalues[:199], atol=1e-9)
    np.testing.assert_allclose(
        gram @ kernel.basis, kernel.basis * kernel.eigenvalues, rtol=0, atol=1e-8
    )


def test_each_generation_shrinks_component_i_by_d_over_d_plus_c(exact):
    """Mobahi et al. 2020: the ratio of eigencomponent i between generations is d_i/(d_i+c)."""
    _, train, _, kernel = exact
    shrink = kernel.eigenvalues / (kernel.eigenvalues + RIDGE)
    compared = 0
    for g in range(1, len(train)):
        before, after = kernel.coefficients(train[g - 1]), kernel.coefficients(train[g])
        clear = (kernel.eigenvalues > 1e-6 * kernel.eigenvalues.max())[:, None] & (
            np.abs(before) > 1e-6 * np.linalg.norm(before)
        )
        ratio = after[clear] / before[clear]
        expected = np.broadcast_to(shrink[:, None], before.shape)[clear]
        np.testing.assert_allclose(ratio, expected, rtol=0, atol=1e-4)
        compared += int(clear.sum())
    assert compared > 1000
    assert shrink[kernel.eigenvalues > 1e-6].min() < 0.2 < 0.7 < shrink.max()


def test_effective_count_falls_every_generation(exact):
    _, train, _, kernel = exact
    figures = [spectral.spectrum_figures(kernel.coefficients(t)) for t in train]
    counts = [f["components95"] for f in figures]
    ratios = [f["participation"] for f in figures]
    # An integer count can pause for a generation; the participation ratio falls strictly.
    assert all(b <= a for a, b in zip(counts, counts[1:], strict=False)), counts
    assert counts[-1] < counts[1] < counts[0], counts
    assert all(b < a for a, b in zip(ratios, ratios[1:], strict=False)), ratios
    # The leading band's share rises as the small components die.
    tops = [f["top10"] for f in figures]
    assert all(b > a for a, b in zip(tops, tops[1:], strict=False)), tops
    for f in figures:
        assert f["top1"] <= f["top10"] <= f["top50"] <= 1.0 + 1e-12
        assert f["rest"] == pytest.approx(1.0 - f["top50"])


def _sklearn_lineage(kernel: spectral.Kernel, ridge: float) -> list[np.ndarray]:
    """Iterated scikit-learn KernelRidge (linear kernel, centred features and targets)."""
    targets = np.eye(CLASSES)[kernel.labels]
    held_centred = kernel.heldout_features - kernel.mean
    held = []
    for _ in range(GENERATIONS + 1):
        mean = targets.mean(axis=0)
        fitted = KernelRidge(alpha=ridge, kernel="linear").fit(kernel.features, targets - mean)
        held.append(fitted.predict(held_centred) + mean)
        targets = fitted.predict(kernel.features) + mean
    return held


def test_forecast_matches_the_actual_lineage(exact):
    """The surrogate, with c fitted from generation 0's training fit alone, predicts each
    generation's held-out metric of the actual lineage to 1e-4; scikit-learn's KernelRidge
    agrees with both."""
    _, train, held, kernel = exact
    _, y, _, y_held = _data()
    fit0 = _onehot_neg_mse(torch.from_numpy(train[0]).float(), y)
    found = spectral.forecast(kernel, _onehot_neg_mse, fit0, GENERATIONS, CLASSES)
    assert found["ridge"] == pytest.approx(RIDGE, rel=1e-3)
    actual = [_onehot_neg_mse(torch.from_numpy(h).float(), y_held) for h in held]
    reference = [
        _onehot_neg_mse(torch.from_numpy(h).float(), y_held)
        for h in _sklearn_lineage(kernel, RIDGE)
    ]
    np.testing.assert_allclose(found["fixed"]["heldout"], actual, rtol=0, atol=1e-4)
    np.testing.assert_allclose(reference, actual, rtol=0, atol=1e-6)
    assert found["fixed"]["best"] == int(np.argmax(actual))
    # The energies of the centred outputs, and the collapse round, are the actual ones.
    energies = [float(np.square(t - t.mean(axis=0)).sum()) for t in train]
    np.testing.assert_allclose(found["fixed"]["energy"], energies, rtol=1e-3)
    threshold = found["collapse_share"] * energies[0]
    collapse = next((g for g, e in enumerate(energies) if g > 0 and e <= threshold), None)
    assert collapse is not None and 0 < collapse <= GENERATIONS
    assert found["fixed"]["collapse"] == collapse


def test_refit_regime_holds_the_residual_and_collapses():
    """The second regime of Mobahi et al. 2020: c_t is refitted so that each round's squared
    residual against its own targets equals round 0's; c_t grows, and once the targets hold no
    more energy than that residual the fit is the constant (collapse)."""
    model, train, _ = _lineage(0.3)
    kernel = _kernel(model)
    _, y, _, _ = _data()
    fit0 = _onehot_neg_mse(torch.from_numpy(train[0]).float(), y)
    found = spectral.forecast(kernel, _onehot_neg_mse, fit0, 12, CLASSES)
    refit = found["refit"]
    ridges = [r for r in refit["ridges"] if r is not None]
    assert all(b > a for a, b in zip(ridges, ridges[1:], strict=False)), ridges
    assert refit["collapse"] is not None
    assert refit["energy"][-1] == 0.0
    fixed = found["fixed"]["collapse"]
    assert fixed is None or refit["collapse"] <= fixed


def test_kernel_round_trips_and_refuses_a_damaged_file(tmp_path, exact):
    kernel = exact[3]
    spectral.save_kernel(tmp_path / "spectral", kernel)
    loaded = spectral.load_kernel(tmp_path / "spectral")
    np.testing.assert_array_equal(loaded.basis, kernel.basis)
    np.testing.assert_array_equal(loaded.indices, kernel.indices)
    with open(tmp_path / "spectral" / "basis.npy", "r+b") as handle:
        handle.seek(-8, 2)
        handle.write(b"\x00" * 8)
    with pytest.raises(ValueError, match="sha256"):
        spectral.load_kernel(tmp_path / "spectral")


def test_subset_rows_collects_only_the_subset_in_order():
    indices = np.array([1, 4, 7])
    rows = spectral.SubsetRows(indices, views=2)
    outputs = torch.arange(20.0).reshape(10, 2)  # codes 0..9 = sample i * 2 + view
    rows.add(np.arange(6), outputs[:6], torch.arange(6))
    rows.add(np.arange(6, 10), outputs[6:], torch.arange(6, 10))
    rows.add(np.arange(10, 16), torch.arange(100.0, 112.0).reshape(6, 2), torch.arange(10, 16))
    got, labels = rows.result()
    # sample 1 view 0 = code 2, sample 4 view 0 = code 8, sample 7 view 0 = code 14
    np.testing.assert_array_equal(got, [[4.0, 5.0], [16.0, 17.0], [108.0, 109.0]])
    np.testing.assert_array_equal(labels, [2, 8, 14])


def test_narrow_features_use_the_thin_svd_and_count_the_outside():
    """p < m: G's eigenpairs from the SVD of the centred features equal numpy.linalg.eigh's
    non-zero ones; outputs outside the span are one 'outside' share, not spread over an
    arbitrary rotation of the null space."""
    rng = np.random.default_rng(4)
    features = rng.standard_normal((120, 7))
    kernel = spectral.build_kernel(np.arange(120), features, np.zeros(120, int), features, [0])
    centred = features - features.mean(axis=0)
    reference = np.linalg.eigh(centred @ centred.T)[0][::-1][:7]
    np.testing.assert_allclose(kernel.eigenvalues, reference, rtol=1e-10)
    assert kernel.basis.shape == (120, 7)
    inside = centred @ rng.standard_normal((7, 3))
    noise = rng.standard_normal((120, 3))
    noise -= noise.mean(axis=0)
    noise -= kernel.basis @ (kernel.basis.T @ noise)  # orthogonal to the span
    coefficients = kernel.coefficients(inside + noise)
    outside = kernel.outside(inside + noise, coefficients)
    assert outside == pytest.approx(float(np.square(noise).sum()), rel=1e-9)
    figures = spectral.spectrum_figures(coefficients, outside)
    share = outside / (outside + float(np.square(inside).sum()))
    assert figures["outside"] == pytest.approx(share)
    assert figures["rest"] >= figures["outside"]
    assert figures["components95"] <= 7


def test_figures_of_known_energies():
    """Bands and counts on hand-made energies (arithmetic)."""
    energies = np.zeros(100)
    energies[0], energies[5], energies[60] = 0.5, 0.3, 0.2
    figures = spectral.spectrum_figures(np.sqrt(energies)[:, None])
    assert figures["top1"] == pytest.approx(0.5)
    assert figures["top10"] == pytest.approx(0.8)
    assert figures["top50"] == pytest.approx(0.8)
    assert figures["rest"] == pytest.approx(0.2)
    assert figures["components95"] == 3
    assert figures["participation"] == pytest.approx(1.0 / (0.25 + 0.09 + 0.04))
    assert spectral.subset_indices(1000, 50, seed=3).tolist() == sorted(
        spectral.subset_indices(1000, 50, seed=3).tolist()
    )
    assert len(set(spectral.subset_indices(1000, 50, seed=3).tolist())) == 50


def _exact_lineage(run_dir: Path, generations: int, noise: float = 0.0, **settings: Any) -> Any:
    """A float32 l2 lineage of the Fourier-feature model with the spectral view (``noise``:
    that share of training labels flipped, filial.demo's symmetric noise)."""
    from torch.utils.data import DataLoader

    import filial
    from filial.demo import symmetric_noise

    x, y, x_held, y_held = (t.float() if t.is_floating_point() else t for t in _data())
    y = torch.from_numpy(symmetric_noise(y.numpy(), noise, CLASSES, seed=1)[0])
    train = DataLoader(TensorDataset(x, y), batch_size=32, shuffle=True)
    held = DataLoader(TensorDataset(x_held, y_held), batch_size=64)

    def make_model() -> nn.Module:
        return nn.Sequential(
            _Fourier(64, FEATURES, gamma=0.05, seed=7), nn.Linear(FEATURES, CLASSES)
        )

    return filial.Lineage(
        make_model,
        train,
        held,
        run_dir=run_dir,
        targets="l2",
        store_dtype="float32",
        metric=_onehot_neg_mse,
        max_generations=generations,
        patience=generations + 1,
        progress=False,
        **{"tensorboard": False, "spectrum_samples": 2000, **settings},
    )


def _ridge_loop(lineage: Any, ridge: float, stop_after: int | None = None) -> None:
    """Hook mode: each generation's last layer solved to the ridge solution with an
    unpenalised bias, from the batches of the shuffled gen.loader (cached targets)."""
    for gen in lineage:
        phi, wanted = [], []
        for inputs, labels, targets in gen.loader:
            with torch.no_grad():
                phi.append(gen.model[0](inputs).double())
            wanted.append(
                np.eye(CLASSES)[labels.numpy()] if targets is None else targets.double().numpy()
            )
        features, goal = torch.cat(phi).numpy(), np.concatenate(wanted)
        mean_phi, mean_y = features.mean(axis=0), goal.mean(axis=0)
        centred = features - mean_phi
        weight = np.linalg.solve(
            centred.T @ centred + ridge * np.eye(FEATURES), centred.T @ (goal - mean_y)
        )
        with torch.no_grad():
            gen.model[1].weight.copy_(torch.from_numpy(weight.T.copy()))
            gen.model[1].bias.copy_(torch.from_numpy(mean_y - mean_phi @ weight))
        gen.finish(gen.model)
        if stop_after is not None and gen.index == stop_after:
            break


@pytest.mark.slow
def test_lineage_records_the_spectrum_and_its_forecast(tmp_path):
    """A real l2 lineage in the exact regime (float32 model and store, shuffled gen.loader):
    the recorded eigencomponents shrink by d_i / (d_i + c) per generation (Mobahi et al. 2020),
    the forecast in generation 0's record predicts every later record's held-out metric to 1e-4,
    and its collapse round is the one the records show."""
    import filial

    ridge, generations = RIDGE, 4
    lineage = _exact_lineage(tmp_path / "run", generations, tensorboard=True)
    _ridge_loop(lineage, ridge)
    records = lineage.result.records
    assert len(records) == generations + 1
    kernel = spectral.load_kernel(tmp_path / "run" / spectral.FOLDER)
    shrink = kernel.eigenvalues / (kernel.eigenvalues + ridge)
    for g in range(1, generations + 1):
        before = spectral.load_coefficients(tmp_path / "run" / spectral.FOLDER, g - 1)
        after = spectral.load_coefficients(tmp_path / "run" / spectral.FOLDER, g)
        clear = (kernel.eigenvalues > 1e-4 * kernel.eigenvalues.max())[:, None] & (
            np.abs(before) > 1e-2 * np.linalg.norm(before)
        )
        assert clear.sum() > 30
        expected = np.broadcast_to(shrink[:, None], before.shape)[clear]
        np.testing.assert_allclose(after[clear] / before[clear], expected, rtol=0, atol=1e-4)
    found = records[0]["forecast"]
    assert found["ridge"] == pytest.approx(ridge, rel=1e-2)
    np.testing.assert_allclose(
        found["fixed"]["heldout"], [r["heldout"] for r in records], rtol=0, atol=1e-4
    )
    counts = [r["spectrum"]["components95"] for r in records]
    assert all(b <= a for a, b in zip(counts, counts[1:], strict=False)) and counts[-1] < counts[0]
    actual = spectral.recorded_collapse(records, found["collapse_share"])
    assert actual is not None and found["fixed"]["collapse"] == actual
    # The report's column and forecast table, the API and the verb read the same figures.
    from filial import cli, report

    summary = report.summarize(tmp_path / "run")
    compared = summary["lineages"][0]["forecast"]
    assert compared["best"]["fixed"] == found["fixed"]["best"]
    assert compared["collapse"]["actual"] == actual
    text = report.format_report(summary)
    assert "95% in" in text and "spectral forecast from generation 0" in text
    again = filial.forecast_run(tmp_path / "run", generations=2, metric=_onehot_neg_mse)
    np.testing.assert_allclose(
        [row["fixed"] for row in again["rows"]], found["fixed"]["heldout"][:3], atol=1e-9
    )
    assert cli.main(["forecast", str(tmp_path / "run")]) == 2  # its own metric: needs metric=

    # TensorBoard, read back with its own EventAccumulator: per-band curves over generations,
    # a histogram per generation, and the forecast's held-out run beside the generations'.
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    def accumulator(run: str) -> EventAccumulator:
        found = EventAccumulator(
            str(tmp_path / "run" / "tb" / run), size_guidance={"histograms": 0}
        )
        found.Reload()
        return found

    shown = accumulator("spectrum")
    band = sorted(shown.Scalars("spectrum/energy share, top 10 %"), key=lambda e: e.step)
    assert [e.step for e in band] == list(range(generations + 1))
    assert [e.value for e in band] == pytest.approx([r["spectrum"]["top10"] for r in records])
    histograms = sorted(shown.Histograms("spectrum/energy by eigen-index"), key=lambda h: h.step)
    assert [h.step for h in histograms] == list(range(generations + 1))
    assert histograms[0].histogram_value.num == pytest.approx(1.0)
    predicted = accumulator("forecast").Scalars("generation/held-out")
    assert [e.value for e in predicted] == pytest.approx(found["fixed"]["heldout"], abs=1e-6)


def test_settings_of_the_view_are_checked():
    """spectrum_stop needs the view; sizes are counts (recipe keys and Lineage alike)."""
    from filial import recipe
    from filial.cli import generation_settings
    from filial.errors import Problems
    from filial.settings import Settings

    problems = Problems()
    assert Settings.parse(problems, spectrum_stop=True) is None
    assert "spectrum_samples" in str(problems.found[0])
    problems = Problems()
    assert Settings.parse(problems, spectrum_samples=-1) is None
    parsed = Settings.parse(Problems(), spectrum_samples=500, spectrum_stop=True)
    assert parsed is not None and parsed.spectrum_samples == 500
    path = Path(__file__).resolve().parents[1] / "recipes" / "digits_l2.toml"
    given = recipe.load(
        path, ["generations.spectrum_samples=300", "generations.spectrum_stop=true"]
    )
    settings = generation_settings(given)
    assert settings["spectrum_samples"] == 300 and settings["spectrum_stop"] is True
    assert generation_settings(recipe.load(path))["spectrum_samples"] == 0  # off by default
    with pytest.raises(recipe.RecipeError, match="true or false"):
        recipe.load(path, ["generations.spectrum_stop=1"])


@pytest.mark.slow
def test_resumed_view_reuses_the_kernel_and_the_forecast_may_stop(tmp_path):
    """Interrupted after generation 0 and resumed: generation 1's spectrum is its stored
    targets projected on the saved kernel; with spectrum_stop the lineage stops once the
    forecast's best generation is trained (reason 'forecast'); a changed view is refused."""
    from filial.errors import InputError

    run = tmp_path / "run"
    first = _exact_lineage(run, 4, noise=0.4, spectrum_stop=True)
    _ridge_loop(first, 0.08, stop_after=0)
    first.close()
    predicted = first.result.records[0]["forecast"]["fixed"]["best"]
    # 40 % wrong labels and a small ridge: the forecast asks for two generations
    assert predicted == 2
    with pytest.raises(InputError, match="spectrum_samples"):
        _exact_lineage(run, 4, noise=0.4, spectrum_stop=True, spectrum_samples=100)
    resumed = _exact_lineage(run, 4, noise=0.4, spectrum_stop=True)
    _ridge_loop(resumed, 0.08)
    result = resumed.result
    assert result.stop_reason == "forecast"
    assert [r["generation"] for r in result.records] == list(range(predicted + 1))
    assert result.records[-1]["stop"]["forecast_best"] == predicted
    kernel = spectral.load_kernel(run / spectral.FOLDER)
    stored = filial_store(run / "gen1")
    expected = spectral.spectrum_figures(kernel.coefficients(stored[kernel.indices]))
    assert result.records[1]["spectrum"] == pytest.approx(expected)


def filial_store(folder: Path) -> np.ndarray:
    import filial

    return filial.TargetStore(folder).read_all()[:, 0, :].astype(np.float64)
