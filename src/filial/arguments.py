"""What a :class:`~filial.Lineage` checks before anything is written.

Every argument is checked, and every problem found is raised together (:class:`Problems`):
the callables, the loaders, the settings (:meth:`filial.settings.Settings.parse`), the data's
first samples (:func:`filial.probe.probe`), the pool's settings, ``top_k`` against the model's
width, whether the target stores fit on the run directory's disk, and, under a process group,
that every rank built the same lineage.
"""

from __future__ import annotations

import functools
import json
import logging
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.utils.data import DataLoader, DistributedSampler

from . import distributed
from .data import check_loader
from .errors import InputError, Problems
from .pool import Admission, PoolData, check_mixable, check_no_label, check_pool_settings, pool_data
from .probe import Probe, check_augmentation, probe, say_once, warn_changing_heldout
from .seeding import samplers_of
from .settings import Settings
from .space import check_store_fits
from .store import index_dtype

log = logging.getLogger("filial")


def check_callables(problems: Problems, model_fn: Any, metric: Any) -> None:
    if isinstance(model_fn, nn.Module):
        problems.add(
            TypeError(
                f"model_fn must be a function that builds a new model each time it is called "
                f"(filial calls it once per generation), but got a {type(model_fn).__name__} "
                "module: pass make_model, not make_model()"
            )
        )
    elif not callable(model_fn):
        problems.add(TypeError(f"model_fn must be callable, but got {model_fn!r}"))
    if metric is not None and not callable(metric):
        problems.add(TypeError(f"metric must be callable or None, but got {metric!r}"))


def check_loaders(problems: Problems, loaders: tuple[Any, Any, Any]) -> None:
    train_loader, heldout_loader, _ = loaders
    roles = ("train_loader", "heldout_loader", "test_loader")
    for role, loader in zip(roles, loaders, strict=True):
        if loader is not None or role != "test_loader":
            problems.attempt(functools.partial(check_loader, loader, role))
    if heldout_loader is train_loader or (
        isinstance(heldout_loader, DataLoader)
        and isinstance(train_loader, DataLoader)
        and heldout_loader.dataset is train_loader.dataset
    ):
        problems.add(
            ValueError(
                "heldout_loader is the training loader (or reads the same dataset object); "
                "held-out evidence must come from samples the students do not train on. "
                "Split off a held-out set, e.g. with torch.utils.data.random_split."
            )
        )


def online(settings: Settings) -> bool:
    return settings.teacher_mode == "online"


def checked_arguments(
    model_fn: Any, loaders: tuple[Any, Any, Any], metric: Any, given: dict[str, Any]
) -> tuple[Settings, Probe, Probe]:
    """Check every argument, then the data's first samples; raise all problems together."""
    train_loader, heldout_loader, _ = loaders
    problems = Problems()
    check_callables(problems, model_fn, metric)
    check_loaders(problems, loaders)
    settings = Settings.parse(problems, **given)
    train = heldout = None
    if not len(problems):
        train = problems.attempt(lambda: probe(train_loader))
        heldout = problems.attempt(lambda: probe(heldout_loader))
    if train is not None and settings is not None and not online(settings):
        problems.attempt(lambda: check_augmentation(train, settings.views))
    if heldout is not None:
        warn_changing_heldout(heldout)
    labels = getattr(train, "labels", None)
    if isinstance(labels, torch.Tensor) and given["targets"] == "ce" and labels.is_floating_point():
        problems.add(
            ValueError(
                f"targets='ce' needs integer class labels, but the training labels are "
                f"{labels.dtype}. Use targets='l2' for regression."
            )
        )
    problems.raise_if_any()
    assert settings is not None and train is not None and heldout is not None  # checked above
    return settings, train, heldout


def checked_pool(
    admission: Any,
    unlabeled_loader: Any,
    train_loader: DataLoader,
    targets: str,
    mode: str,
    labels: Any,
) -> Admission | None:
    """The pool's settings, whether the training loader can carry mixed epochs, and the
    probed training labels against the "no label" value."""
    problems = Problems()
    found = check_pool_settings(problems, admission, unlabeled_loader, targets, mode)
    if found is not None:
        problems.attempt(lambda: check_mixable(train_loader, found))
        problems.attempt(lambda: check_no_label(labels))
    problems.raise_if_any()
    return found


def check_top_k(settings: Settings, width: int) -> None:
    """``top_k`` must fit the model's outputs; say when it saves nothing."""
    top_k = settings.top_k
    if top_k is None:
        return
    if top_k > width:
        raise InputError(
            f"top_k={top_k} is more than the model's {width} outputs; use at most top_k={width}"
        )
    value = np.dtype(settings.store_dtype).itemsize
    compact = top_k * (value + np.dtype(index_dtype(width)).itemsize)
    if compact >= width * value:
        say_once(
            f"top_k{top_k}:{width}:{settings.store_dtype}",
            f"top_k={top_k} stores {compact} bytes per sample and view (values and class "
            f"indices), no fewer than the {width * value} of the full store of {width} outputs; "
            "top_k=None keeps every output for less",
        )


def check_stores_fit(
    run_dir: str | Path, settings: Settings, train_loader: DataLoader, width: int
) -> None:
    """The next generation's store must fit on the run directory's disk (online: no store)."""
    if online(settings):
        return
    check_store_fits(
        run_dir,
        len(train_loader.dataset),  # type: ignore[arg-type]
        settings.views,
        width,
        settings.store_dtype,
        settings.top_k,
    )


def pool_for(
    unlabeled_loader: DataLoader | None,
    admission: Admission | None,
    replay: Any,
    settings: Settings,
    run_dir: str | Path,
    width: int,
) -> PoolData | None:
    """The unlabelled pool (:mod:`filial.pool`) with its fingerprint, once its store is known
    to fit (one more store a generation); None without a pool."""
    if admission is None or unlabeled_loader is None:
        return None
    pool = pool_data(unlabeled_loader, admission, replay, settings.seed)
    check_store_fits(
        run_dir,
        pool.size,
        pool.replay.views if pool.replay is not None else 1,
        width,
        settings.store_dtype,
        settings.top_k,
    )
    return pool


def check_ranks(settings: dict[str, Any], train_loader: DataLoader) -> None:
    """Under a process group: every rank must build the same lineage over the same data,
    and the training loader should give each rank its own shard."""
    differing = distributed.ranks_differing(json.dumps(settings, sort_keys=True))
    if differing:
        raise InputError(
            f"rank(s) {differing} built the Lineage with other settings or data than rank 0 "
            "(compared: the settings saved in lineage.json, which include fingerprints of "
            "the training and held-out data). Every rank must pass the same arguments and "
            "the same datasets; shard the training set with a DistributedSampler instead of "
            "giving each rank a dataset of its own."
        )
    samplers = samplers_of(train_loader)
    if distributed.is_main() and not any(isinstance(s, DistributedSampler) for s in samplers):
        # A warning, not a refusal: a batch sampler of the user's own may shard as well.
        log.warning(
            "%d processes run this lineage, but the training loader has no "
            "DistributedSampler: unless its sampler shards the data itself, every rank "
            "trains on the whole training set in every epoch. Pass DataLoader(dataset, "
            "sampler=torch.utils.data.DistributedSampler(dataset), ...) to give each rank "
            "its shard.",
            distributed.world_size(),
        )
