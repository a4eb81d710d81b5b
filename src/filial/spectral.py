"""The spectral view: which components of the training-set function each generation keeps,
and a forecast of the useful number of generations.

Background (Mobahi, Farajtabar & Bartlett, NeurIPS 2020): in the kernel (ridge) regime, with
Gram matrix ``G = V diag(d) V^T`` and ridge ``c``, every round of refitting to one's own
predictions multiplies the prediction's ``i``-th eigencomponent by ``d_i / (d_i + c)``, so the
small-eigenvalue components die first and, after enough rounds, the function collapses.

What this room does, once per lineage and then per generation:

* :func:`subset_indices` picks a fixed subset of the training set by seed (the whole set when it
  is small enough).
* :func:`features_of` reads generation 0's penultimate features on it: the input of its last
  ``nn.Linear`` (a forward pre-hook), or a user's feature function.
* :func:`build_kernel` centres them and eigendecomposes the Gram matrix once
  (``numpy.linalg.eigh``); :func:`save_kernel` / :func:`load_kernel` keep it in ``RUN/spectral/``
  with a manifest (sha256 and shape of every array, written last).
* :meth:`Kernel.coefficients` projects a generation's (centred) outputs on the subset on the
  eigenvectors; :func:`spectrum_figures` turns them into the record's figures: the share of
  output energy in the top 1 %, 10 %, 50 % of the eigen-indices and the rest, the smallest count
  of components holding 95 % of the energy, and the participation ratio.
* :func:`forecast` runs the surrogate lineage: kernel ridge regression on the same features with
  an unpenalised intercept, ``c`` fitted so that the surrogate's training fit equals generation
  0's, iterated in closed form both with ``c`` fixed and with ``c`` refitted each round so that
  the fit to the round's own targets keeps generation 0's residual (the paper's two regimes).

The per-generation rows come from the teacher pass over the training set that every generation
runs anyway (:class:`SubsetRows`, a :mod:`filial.passes` consumer); nothing is rerun and nothing
touches the per-batch path. The view object that the generation room calls is
:class:`SpectralView`.

>>> subset_indices(5, 10, seed=0).tolist()
[0, 1, 2, 3, 4]
>>> len(subset_indices(100, 10, seed=0))
10
"""

from __future__ import annotations

import dataclasses
import json
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.utils.data import DataLoader, Subset

from . import distributed
from ._io import atomic_write, atomic_write_json, sha256_file
from .checkpoint import unwrap
from .errors import InputError
from .metrics import metric_name
from .seeding import derive_seed, preserved_rng

FORMAT = "filial.spectral/1"
FOLDER = "spectral"  # under the run directory
MANIFEST = "kernel.json"
DEFAULT_SAMPLES = 2000  # the size of the subset when the view is asked for without a size
BANDS = (("top1", 0.01), ("top10", 0.10), ("top50", 0.50))  # cumulative shares of eigen-indices
HELD = 0.95  # the energy the effective count holds
_SUBSET_STREAM = 0x5EC7  # derive_seed(seed, _SUBSET_STREAM): which samples form the subset
_ARRAYS = ("indices", "eigenvalues", "basis", "features", "labels", "heldout_features")
_HELDOUT_STREAM = 0x5EC8

FeatureFn = Callable[[nn.Module, torch.Tensor], torch.Tensor]
Metric = Callable[[torch.Tensor, torch.Tensor], float]


def subset_indices(count: int, size: int, seed: int, stream: int = _SUBSET_STREAM) -> np.ndarray:
    """Sorted indices of at most ``size`` of ``count`` samples, drawn without replacement from
    ``derive_seed(seed, stream)``; every index when ``count <= size``."""
    if count <= size:
        return np.arange(count, dtype=np.int64)
    rng = np.random.default_rng(derive_seed(seed, stream))
    return np.sort(rng.choice(count, size=size, replace=False)).astype(np.int64)


def last_linear(model: nn.Module) -> nn.Linear:
    """The last ``nn.Linear`` in ``model.modules()`` order (the output layer of most models)."""
    found = [m for m in unwrap(model).modules() if isinstance(m, nn.Linear)]
    if not found:
        raise InputError(
            f"the spectral view reads the input of the model's last nn.Linear, but "
            f"{type(unwrap(model)).__name__} has none; pass a feature function "
            "(spectrum_features=lambda model, inputs: ...) that returns its penultimate features"
        )
    return found[-1]


def features_of(
    model: nn.Module,
    dataset: Any,
    indices: np.ndarray,
    collate: Callable[[list[Any]], Any] | None,
    batch_size: int = 256,
    feature_fn: FeatureFn | None = None,
) -> tuple[np.ndarray, torch.Tensor]:
    """``model``'s penultimate features (float64, one row per index) and the labels of
    ``dataset``'s samples ``indices``, in eval mode without gradients, the global random
    generators untouched. Default features: the input of :func:`last_linear`."""
    module = unwrap(model)
    device = next(module.parameters()).device
    loader = DataLoader(
        Subset(dataset, indices.tolist()), batch_size=batch_size, shuffle=False, collate_fn=collate
    )
    rows: list[torch.Tensor] = []
    labels: list[torch.Tensor] = []
    caught: list[torch.Tensor] = []
    handle = None
    if feature_fn is None:

        def keep(_module: nn.Module, args: tuple[Any, ...]) -> None:
            caught.append(args[0].detach().flatten(1))

        handle = last_linear(module).register_forward_pre_hook(keep)
    was_training = module.training
    module.eval()
    try:
        with preserved_rng(), torch.no_grad():
            for inputs, batch_labels, *_ in loader:
                inputs = inputs.to(device)
                if feature_fn is None:
                    caught.clear()
                    module(inputs)
                    rows.append(caught[-1].double().cpu())
                else:
                    rows.append(feature_fn(module, inputs).detach().flatten(1).double().cpu())
                labels.append(torch.as_tensor(batch_labels).cpu())
    finally:
        if handle is not None:
            handle.remove()
        module.train(was_training)
    return torch.cat(rows).numpy(), torch.cat(labels)


@dataclass
class Kernel:
    """The centred Gram matrix of a lineage's subset, eigendecomposed once.

    ``features`` are the subset's features centred by their mean (``mean``); ``eigenvalues``
    descend (clipped at 0), ``basis`` holds the eigenvectors as columns. ``labels`` are the
    subset's labels; ``heldout_features`` (raw) and ``heldout_labels`` feed the forecast.
    """

    indices: np.ndarray
    mean: np.ndarray
    features: np.ndarray
    eigenvalues: np.ndarray
    basis: np.ndarray
    labels: np.ndarray
    heldout_features: np.ndarray
    heldout_labels: np.ndarray

    @property
    def size(self) -> int:
        return len(self.indices)

    def coefficients(self, outputs: np.ndarray) -> np.ndarray:
        """The eigencomponents ``V^T (Y - mean(Y))`` of outputs on the subset (``r x C``, one
        row per eigenvector of a non-zero eigenvalue)."""
        outputs = np.asarray(outputs, dtype=np.float64).reshape(self.size, -1)
        return self.basis.T @ (outputs - outputs.mean(axis=0))

    def outside(self, outputs: np.ndarray, coefficients: np.ndarray | None = None) -> float:
        """The energy of the centred outputs outside the kernel's span (the null space of
        ``G``, where eigh's basis would be an arbitrary rotation)."""
        outputs = np.asarray(outputs, dtype=np.float64).reshape(self.size, -1)
        found = self.coefficients(outputs) if coefficients is None else coefficients
        total = float(np.square(outputs - outputs.mean(axis=0)).sum())
        return max(0.0, total - float(np.square(found).sum()))


def build_kernel(
    indices: np.ndarray,
    features: np.ndarray,
    labels: np.ndarray,
    heldout_features: np.ndarray,
    heldout_labels: np.ndarray,
) -> Kernel:
    """Centre ``features`` (rows: the subset's samples) and decompose ``G = F F^T``: with
    ``numpy.linalg.eigh`` of the ``m x m`` Gram matrix when the features are at least as wide
    as the subset, else from the thin SVD of ``F`` (``G``'s eigenvectors are ``F``'s left
    singular vectors, its eigenvalues the squared singular values; O(m p^2) instead of O(m^3)).
    Only the eigenvectors of non-zero eigenvalues are kept: singular values above
    ``s_max * max(m, p) * eps``, numpy.linalg.matrix_rank's default tolerance. Descending."""
    features = np.asarray(features, dtype=np.float64)
    mean = features.mean(axis=0)
    centred = features - mean
    m, p = centred.shape
    if p >= m:
        eigenvalues, basis = np.linalg.eigh(centred @ centred.T)
        order = np.argsort(eigenvalues)[::-1]
        eigenvalues, basis = np.clip(eigenvalues[order], 0.0, None), basis[:, order]
    else:
        basis, singular, _ = np.linalg.svd(centred, full_matrices=False)
        eigenvalues = np.square(singular)
    singular = np.sqrt(eigenvalues)
    tolerance = (singular.max() if len(singular) else 0.0) * max(m, p) * np.finfo(np.float64).eps
    kept = singular > tolerance
    return Kernel(
        indices=np.asarray(indices, dtype=np.int64),
        mean=mean,
        features=centred,
        eigenvalues=np.ascontiguousarray(eigenvalues[kept]),
        basis=np.ascontiguousarray(basis[:, kept]),
        labels=np.asarray(labels),
        heldout_features=np.asarray(heldout_features, dtype=np.float64),
        heldout_labels=np.asarray(heldout_labels),
    )


def spectrum_figures(coefficients: np.ndarray, outside: float = 0.0) -> dict[str, float | int]:
    """The record's figures of one generation's eigencomponents (``r x C``) and its energy
    ``outside`` the kernel's span: ``energy`` (the squared norm of the centred outputs), the
    cumulative shares of it in the leading ``top1``, ``top10``, ``top50`` % of the ``r``
    eigen-indices, ``rest`` (everything else, the outside included), ``outside`` (its share),
    ``components95`` (the fewest eigencomponents holding 95 % of the energy inside the span)
    and ``participation`` (``(sum e)^2 / sum e^2`` of the energies ``e`` inside the span)."""
    energy = np.square(np.asarray(coefficients, dtype=np.float64)).reshape(len(coefficients), -1)
    per_index = energy.sum(axis=1)
    inside = float(per_index.sum())
    total = inside + float(outside)
    r = len(per_index)
    figures: dict[str, float | int] = {"energy": total}
    if total <= 0.0 or inside <= 0.0 or r == 0:
        figures.update({name: 0.0 for name, _ in BANDS})
        share = 1.0 if total > 0 else 0.0
        figures.update({"rest": share, "outside": share, "components95": 0, "participation": 0.0})
        return figures
    cumulative = np.cumsum(per_index) / total
    for name, share in BANDS:
        figures[name] = float(cumulative[max(1, math.ceil(share * r)) - 1])
    figures["rest"] = 1.0 - float(figures["top50"])
    figures["outside"] = float(outside) / total
    ranked = np.cumsum(np.sort(per_index)[::-1]) / inside
    figures["components95"] = int(np.searchsorted(ranked, HELD - 1e-12) + 1)
    figures["participation"] = float(inside**2 / np.square(per_index).sum())
    return figures


# -- the forecast ----------------------------------------------------------------------------


def _targets(labels: np.ndarray, width: int) -> np.ndarray:
    """One-hot rows for integer labels (``width`` classes), the values themselves otherwise."""
    labels = np.asarray(labels)
    if np.issubdtype(labels.dtype, np.integer):
        return np.eye(width)[labels]
    return labels.astype(np.float64).reshape(len(labels), -1)


@dataclass
class _Surrogate:
    """Kernel ridge regression with an unpenalised intercept on a kernel's features."""

    kernel: Kernel
    targets: np.ndarray  # (m, C)
    intercept: np.ndarray  # (C,)
    first: np.ndarray  # eigencomponents of the centred targets (m, C)
    across: np.ndarray  # held-out centred features x subset features x basis (n_h, m)

    outside: float  # the centred targets' energy outside the kernel's span (never fitted)

    @classmethod
    def of(cls, kernel: Kernel, width: int) -> _Surrogate:
        targets = _targets(kernel.labels, width)
        intercept = targets.mean(axis=0)
        held = kernel.heldout_features - kernel.mean
        across = (held @ kernel.features.T) @ kernel.basis
        first = kernel.coefficients(targets)
        outside = kernel.outside(targets, first)
        return cls(kernel, targets, intercept, first, across, outside)

    def train(self, components: np.ndarray) -> np.ndarray:
        return self.intercept + self.kernel.basis @ components

    def heldout(self, components: np.ndarray, ridge: float) -> np.ndarray:
        """Held-out predictions of the ridge fit to targets with eigencomponents ``components``:
        ``k(x, X) (G + cI)^-1 (y - mean)`` in the eigenbasis, plus the intercept."""
        return self.intercept + self.across @ (
            components / (self.kernel.eigenvalues + ridge)[:, None]
        )

    def shrink(self, ridge: float) -> np.ndarray:
        d = self.kernel.eigenvalues
        return (d / (d + ridge))[:, None]


def _bisect(goal: Callable[[float], float], level: float, low: float, high: float) -> float:
    """The ``c`` in ``[low, high]`` (searched in log space) where the decreasing ``goal(c)``
    crosses ``level``; the nearer end when it does not."""
    if goal(low) <= level:
        return low
    if goal(high) >= level:
        return high
    a, b = math.log(low), math.log(high)
    for _ in range(100):
        mid = 0.5 * (a + b)
        if goal(math.exp(mid)) > level:
            a = mid
        else:
            b = mid
        if b - a < 1e-13:
            break
    return math.exp(0.5 * (a + b))


def _as_tensor(values: np.ndarray) -> torch.Tensor:
    return torch.from_numpy(np.ascontiguousarray(values, dtype=np.float32))


def _labels_tensor(labels: np.ndarray) -> torch.Tensor:
    return torch.from_numpy(np.ascontiguousarray(labels))


def fit_ridge(surrogate: _Surrogate, metric: Metric, train_fit: float) -> float:
    """The ridge ``c`` at which the surrogate's training metric against the labels equals
    ``train_fit`` (generation 0's): a larger ``c`` fits the labels less."""
    top = float(surrogate.kernel.eigenvalues.max()) or 1.0
    labels = _labels_tensor(surrogate.kernel.labels)

    def fit(ridge: float) -> float:
        return metric(
            _as_tensor(surrogate.train(surrogate.shrink(ridge) * surrogate.first)), labels
        )

    return _bisect(fit, train_fit, top * 1e-10, top * 1e6)


def _refit_ridge(surrogate: _Surrogate, components: np.ndarray, residual: float) -> float | None:
    """The ``c`` whose fit to targets ``components`` leaves squared residual ``residual``
    (``sum_i (c / (d_i + c))^2 |a_i|^2``, increasing in ``c``); None when the targets hold no
    more than that energy (the fit is then the intercept alone: collapse)."""
    energy = np.square(components).sum(axis=1)
    if energy.sum() <= residual:
        return None
    d = surrogate.kernel.eigenvalues
    top = float(d.max()) or 1.0

    def fit(ridge: float) -> float:  # decreasing in 1/c: bisect on the negative residual
        return -float((np.square(ridge / (d + ridge)) * energy).sum())

    return _bisect(fit, -residual, top * 1e-12, top * 1e12)


def _regime(values: list[float], energies: list[float], threshold: float) -> dict[str, Any]:
    best = int(np.argmax(values)) if values else None
    collapse = next((t for t, e in enumerate(energies) if t > 0 and e <= threshold), None)
    return {"heldout": values, "energy": energies, "best": best, "collapse": collapse}


def forecast(
    kernel: Kernel,
    metric: Metric,
    train_fit: float,
    generations: int,
    width: int,
    ridge: float | None = None,
) -> dict[str, Any]:
    """The surrogate lineage of generations ``0..generations`` (see the module docstring).

    ``ridge`` is fitted from ``train_fit`` unless given. Both regimes report the predicted
    held-out metric per generation (``heldout``), the energy of the centred training outputs
    (``energy``), the best generation and the collapse generation: the first one whose energy is
    at most generation 0's squared residual against the labels (the paper's collapse condition:
    a target holding no more than the fit's tolerance is fitted by the constant function).
    ``collapse_share`` is that residual over generation 0's energy, the scale-free threshold
    to compare a run's recorded spectra with."""
    surrogate = _Surrogate.of(kernel, width)
    c = fit_ridge(surrogate, metric, train_fit) if ridge is None else float(ridge)
    held_labels = _labels_tensor(kernel.heldout_labels)
    components = surrogate.shrink(c) * surrogate.first
    residual = float(np.square(components - surrogate.first).sum()) + surrogate.outside
    first_energy = float(np.square(components).sum())
    fixed_values = [metric(_as_tensor(surrogate.heldout(surrogate.first, c)), held_labels)]
    fixed_energy = [first_energy]
    targets = components
    for _ in range(generations):
        fixed_values.append(metric(_as_tensor(surrogate.heldout(targets, c)), held_labels))
        targets = surrogate.shrink(c) * targets
        fixed_energy.append(float(np.square(targets).sum()))
    refit_values, refit_energy = fixed_values[:1], fixed_energy[:1]
    ridges: list[float | None] = [c]
    targets = components
    for _ in range(generations):
        step = _refit_ridge(surrogate, targets, residual)
        if step is None:
            targets = np.zeros_like(targets)
            held = np.broadcast_to(surrogate.intercept, (len(kernel.heldout_labels), width))
        else:
            held = surrogate.heldout(targets, step)
            targets = surrogate.shrink(step) * targets
        ridges.append(step)
        refit_values.append(metric(_as_tensor(held), held_labels))
        refit_energy.append(float(np.square(targets).sum()))
    threshold = residual
    return {
        "ridge": c,
        "fit_level": float(train_fit),
        "samples": kernel.size,
        "heldout_samples": len(kernel.heldout_labels),
        "collapse_share": residual / first_energy if first_energy > 0 else None,
        "fixed": _regime(fixed_values, fixed_energy, threshold),
        "refit": {**_regime(refit_values, refit_energy, threshold), "ridges": ridges},
    }


def recorded_collapse(records: Sequence[dict[str, Any]], share: float | None) -> int | None:
    """The first generation after 0 whose recorded spectrum energy, as a share of generation
    0's, is at most ``share`` (a forecast's ``collapse_share``); None when none is."""
    if share is None or not records or "spectrum" not in records[0]:
        return None
    first = records[0]["spectrum"]["energy"]
    for record in records[1:]:
        spectrum = record.get("spectrum")
        if spectrum is not None and first > 0 and spectrum["energy"] / first <= share:
            return int(record["generation"])
    return None


def compare_forecast(records: Sequence[Any]) -> dict[str, Any] | None:
    """Generation 0's forecast beside what the run then did: per generation the predicted
    held-out metric in both regimes and the recorded one, the best and collapse generations of
    each (the recorded best over the finished generations; the recorded collapse from the
    spectra, :func:`recorded_collapse`). None without a forecast."""
    if not records or "forecast" not in records[0]:
        return None
    found = records[0]["forecast"]
    fixed, refit = found["fixed"], found["refit"]
    actual = {int(r["generation"]): r.get("heldout") for r in records}
    rows = [
        {
            "generation": g,
            "fixed": fixed["heldout"][g],
            "refit": refit["heldout"][g],
            "actual": actual.get(g),
        }
        for g in range(len(fixed["heldout"]))
    ]
    scored = {g: v for g, v in actual.items() if isinstance(v, (int, float))}
    real_best = max(scored, key=lambda g: (scored[g], -g)) if scored else None
    return {
        "ridge": found["ridge"],
        "rows": rows,
        "best": {"fixed": fixed["best"], "refit": refit["best"], "actual": real_best},
        "collapse": {
            "fixed": fixed["collapse"],
            "refit": refit["collapse"],
            "actual": recorded_collapse(list(records), found.get("collapse_share")),
        },
        "trained": max(actual) if actual else None,
    }


def forecast_run(
    lineage_dir: str | Path,
    *,
    generations: int | None = None,
    metric: Metric | None = None,
) -> dict[str, Any]:
    """The spectral forecast of a lineage whose generation 0 is finished, beside what it then
    did (:func:`compare_forecast`), from its run directory alone (``RUN/spectral/`` and
    ``lineage.json``; no model is built). ``generations`` (default: the run's
    ``max_generations``) recomputes it over that many generations; a run scored with a metric
    of its own needs that ``metric`` to recompute."""
    from .metrics import default_metric
    from .reading import read_state
    from .rundir import RunDirectory

    run = RunDirectory(lineage_dir)
    state = read_state(run.state_path)
    records, settings = state["records"], state["settings"]
    if not records or records[0].get("diverged") or records[0].get("train") is None:
        raise InputError(f"{run.root}: generation 0 has not finished (or diverged); run it first")
    if not settings.get("spectrum_samples"):
        raise InputError(
            f"{run.root} ran without the spectral view; run it with spectrum_samples=2000 "
            "(recipe key generations.spectrum_samples) to forecast"
        )
    kernel = load_kernel(run.root / FOLDER)
    if metric is None and settings.get("metric") != "default":
        raise InputError(
            f"{run.root} was scored with the metric {settings.get('metric')}; pass it as "
            "metric= to recompute its forecast"
        )
    metric = metric or default_metric(torch.from_numpy(kernel.labels))
    width = load_coefficients(run.root / FOLDER, 0)
    assert width is not None, "generation 0's eigencomponents are written with its record"
    count = settings["max_generations"] if generations is None else int(generations)
    found = forecast(kernel, metric, records[0]["train"], count, width.shape[1])
    compared = compare_forecast([{**records[0], "forecast": found}, *records[1:]])
    assert compared is not None
    return compared


# -- files -----------------------------------------------------------------------------------


def _arrays(kernel: Kernel) -> dict[str, np.ndarray]:
    return {
        "indices": kernel.indices,
        "mean": kernel.mean,
        "features": kernel.features,
        "eigenvalues": kernel.eigenvalues,
        "basis": kernel.basis,
        "labels": kernel.labels,
        "heldout_features": kernel.heldout_features,
        "heldout_labels": kernel.heldout_labels,
    }


def _save_array(path: Path, array: np.ndarray) -> None:
    atomic_write(
        path, lambda handle: np.save(handle, np.ascontiguousarray(array), allow_pickle=False)
    )


def save_kernel(folder: Path, kernel: Kernel) -> Path:
    """Write the kernel's arrays into ``folder`` (each atomically), then the manifest (sha256,
    shape and dtype of each), so a manifest always describes whole files."""
    folder.mkdir(parents=True, exist_ok=True)
    files: dict[str, Any] = {}
    for name, array in _arrays(kernel).items():
        path = folder / f"{name}.npy"
        _save_array(path, array)
        files[name] = {
            "sha256": sha256_file(path),
            "shape": list(array.shape),
            "dtype": str(array.dtype),
        }
    return atomic_write_json(folder / MANIFEST, {"format": FORMAT, "files": files})


def load_kernel(folder: Path) -> Kernel:
    """The kernel saved by :func:`save_kernel`, every file checked against the manifest
    (``np.load(allow_pickle=False)``); a damaged or missing file raises ``ValueError``."""
    manifest_path = folder / MANIFEST
    if not manifest_path.is_file():
        raise ValueError(f"{folder} holds no spectral kernel ({MANIFEST} is missing)")
    manifest = json.loads(manifest_path.read_text())
    if manifest.get("format") != FORMAT:
        raise ValueError(f"{manifest_path} is not a {FORMAT} manifest")
    arrays: dict[str, np.ndarray] = {}
    for name, entry in manifest["files"].items():
        path = folder / f"{name}.npy"
        if not path.is_file() or sha256_file(path) != entry["sha256"]:
            raise ValueError(f"{path} is missing or does not match its sha256 in {manifest_path}")
        array = np.load(path, allow_pickle=False)
        if list(array.shape) != entry["shape"] or str(array.dtype) != entry["dtype"]:
            raise ValueError(f"{path} has shape {array.shape}, not {entry['shape']}")
        arrays[name] = array
    return Kernel(**arrays)


def save_coefficients(folder: Path, generation: int, coefficients: np.ndarray) -> Path:
    """A generation's eigencomponents on the subset: ``RUN/spectral/genG.npy`` (``m x C``)."""
    path = folder / f"gen{generation}.npy"
    _save_array(path, coefficients)
    return path


def load_coefficients(folder: Path, generation: int) -> np.ndarray | None:
    path = folder / f"gen{generation}.npy"
    return np.load(path, allow_pickle=False) if path.is_file() else None


# -- the consumer and the view ---------------------------------------------------------------


class SubsetRows:
    """Consumer of the teacher pass (:mod:`filial.passes`): view 0's outputs and labels of the
    subset's samples only, gathered to rank 0 in subset order (None elsewhere)."""

    def __init__(self, indices: np.ndarray, views: int) -> None:
        self.indices = indices
        self.views = views
        self._positions: list[torch.Tensor] = []
        self._outputs: list[torch.Tensor] = []
        self._labels: list[torch.Tensor] = []

    def add(self, codes: np.ndarray, outputs: torch.Tensor, labels: torch.Tensor) -> None:
        samples = codes // self.views
        position = np.searchsorted(self.indices, samples)
        inside = (codes % self.views == 0) & (position < len(self.indices))
        inside[inside] = self.indices[position[inside]] == samples[inside]
        if not inside.any():
            return
        chosen = torch.from_numpy(inside)
        self._positions.append(torch.from_numpy(position[inside]))
        self._outputs.append(outputs[chosen.to(outputs.device)].cpu())
        self._labels.append(labels[chosen])

    def result(self) -> tuple[np.ndarray, np.ndarray] | None:
        if self._positions:
            positions, outputs = torch.cat(self._positions), torch.cat(self._outputs)
            labels = torch.cat(self._labels)
        else:  # a rank whose shard holds none of the subset
            positions = torch.zeros(0, dtype=torch.int64)
            outputs, labels = torch.zeros(0, 1), torch.zeros(0, dtype=torch.int64)
        self.abandon()
        whole = distributed.gather_indexed(positions, len(self.indices), outputs, labels)
        return None if whole is None else (whole[0].double().numpy(), whole[1].numpy())

    def abandon(self) -> None:
        self._positions, self._outputs, self._labels = [], [], []


@dataclass(frozen=True)
class SpectralOptions:
    """The view's settings: ``samples`` (subset size; 0: no view), ``stop`` (the stop rule may
    end the lineage at the forecast's best generation), ``feature_fn``."""

    samples: int = 0
    stop: bool = False
    feature_fn: FeatureFn | None = None


class SpectralView:
    """The view of one lineage: the subset, the consumer for each teacher pass, and the
    figures of each generation (kernel and forecast after generation 0). Runs on rank 0 for
    its figures; the consumer runs on every rank."""

    def __init__(
        self,
        folder: Path,
        options: SpectralOptions,
        train_size: int,
        views: int,
        seed: int,
        loaders: tuple[DataLoader, DataLoader],
        metric: Metric,
        generations: int,
    ) -> None:
        self.folder = folder
        self.options = options
        self.views = views
        self.seed = seed
        self.loaders = loaders
        self.metric = metric
        self.generations = generations
        self.indices = subset_indices(train_size, options.samples, seed)
        self._kernel: Kernel | None = None

    def consumer(self) -> SubsetRows:
        return SubsetRows(self.indices, self.views)

    def kernel(self) -> Kernel:
        if self._kernel is None:
            self._kernel = load_kernel(self.folder)
        return self._kernel

    def build(self, model: nn.Module, train: DataLoader, heldout: DataLoader) -> Kernel:
        """Generation 0's kernel: its features on the subset and on (at most as many) held-out
        samples, decomposed and saved in ``RUN/spectral/``."""
        fn = self.options.feature_fn
        features, labels = features_of(
            model, train.dataset, self.indices, train.collate_fn, train.batch_size or 256, fn
        )
        held = subset_indices(
            len(heldout.dataset),  # type: ignore[arg-type]
            self.options.samples,
            self.seed,
            _HELDOUT_STREAM,
        )
        held_features, held_labels = features_of(
            model, heldout.dataset, held, heldout.collate_fn, heldout.batch_size or 256, fn
        )
        kernel = build_kernel(
            self.indices, features, labels.numpy(), held_features, held_labels.numpy()
        )
        save_kernel(self.folder, kernel)
        self._kernel = kernel
        return kernel

    def measure(
        self,
        index: int,
        model: nn.Module,
        rows: tuple[np.ndarray, np.ndarray] | None,
        record: Any,
    ) -> dict[str, Any]:
        """The record's fields of a finished generation (rank 0): its ``spectrum``, and after
        generation 0 also the kernel (built and saved) and the ``forecast``."""
        assert rows is not None  # rank 0 holds the gathered subset rows
        outputs = rows[0]
        found: dict[str, Any] = {}
        if index == 0:
            kernel = self.build(model, *self.loaders)
            found["forecast"] = forecast(
                kernel, self.metric, record["train"], self.generations, outputs.shape[1]
            )
        found["spectrum"] = self.figures(index, outputs)
        return found

    def figures(self, index: int, rows: np.ndarray) -> dict[str, Any]:
        """The record's ``spectrum`` of a generation whose subset outputs are ``rows``."""
        kernel = self.kernel()
        coefficients = kernel.coefficients(rows)
        save_coefficients(self.folder, index, coefficients)
        return spectrum_figures(coefficients, kernel.outside(rows, coefficients))


def view_settings(options: SpectralOptions) -> dict[str, Any]:
    """What ``lineage.json``'s settings keep of the view (feature functions by name)."""
    saved = dataclasses.asdict(options)
    fn = saved.pop("feature_fn")
    name = None if fn is None else metric_name(fn)
    return {
        "spectrum_samples": saved["samples"],
        "spectrum_stop": saved["stop"],
        "spectrum_features": name,
    }
