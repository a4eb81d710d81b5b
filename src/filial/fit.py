"""``fit_epochs``: the ready training loop for users without one of their own.

>>> fit = fit_epochs(epochs=30, optimizer=lambda params: torch.optim.SGD(params, lr=0.05))
>>> fit.epochs
30
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from typing import TYPE_CHECKING, Any

import torch
from torch import nn
from tqdm.auto import tqdm

from . import distributed
from ._faults import armed, fault_point
from .evaluation import model_device, move_to

if TYPE_CHECKING:
    from .generation import Generation

OptimizerFactory = Callable[[Iterable[nn.Parameter]], torch.optim.Optimizer]
SchedulerFactory = Callable[[torch.optim.Optimizer], Any]
# Called on every rank after each epoch's optimizer and scheduler steps with the generation, the
# trained module (not its DDP wrapper) and the epoch; returns more figures for that epoch's log.
EpochEnd = Callable[["Generation", nn.Module, int], Mapping[str, float]]


class EpochFit:
    """Train ``gen.model`` for a fixed number of epochs; see :func:`fit_epochs`."""

    def __init__(
        self,
        epochs: int,
        optimizer: OptimizerFactory,
        scheduler: SchedulerFactory | None = None,
        progress: bool | None = None,
        device: str | torch.device | None = None,
    ) -> None:
        problems = []
        if not isinstance(epochs, int) or isinstance(epochs, bool) or epochs < 1:
            problems.append(f"epochs should be a positive integer, but got epochs={epochs!r}")
        if not callable(optimizer):
            problems.append(
                "optimizer should be a factory such as lambda params: torch.optim.SGD(params, "
                f"lr=0.05), but got {optimizer!r}"
            )
        if scheduler is not None and not callable(scheduler):
            problems.append(
                "scheduler should be a factory such as lambda opt: "
                f"torch.optim.lr_scheduler.CosineAnnealingLR(opt, 30), but got {scheduler!r}"
            )
        if problems:
            raise ValueError("; ".join(problems))
        self.epochs = epochs
        self.optimizer = optimizer
        self.scheduler = scheduler
        self.progress = progress
        self.device = None if device is None else torch.device(device)
        self.epoch_end: EpochEnd | None = None
        self.title: str | None = None

    def with_epoch_end(self, epoch_end: EpochEnd | None, title: str | None = None) -> EpochFit:
        """The same fit, calling ``epoch_end(gen, model, epoch)`` (if given) after every epoch
        and logging the figures it returns with that epoch (the early-stopped baselines of
        :mod:`filial.baselines` score held-out data there). ``title`` names the progress bar.
        This fit itself is left as it is."""
        fit = EpochFit(self.epochs, self.optimizer, self.scheduler, self.progress, self.device)
        fit.epoch_end, fit.title = epoch_end, title
        return fit

    def __call__(self, gen: Generation) -> nn.Module:
        model = gen.model if self.device is None else gen.model.to(self.device)
        device = model_device(model)
        # Note: several processes. Under a process group the student trains inside
        # DistributedDataParallel (gradients averaged over the ranks' shards); the module itself
        # is returned for finish, and the epoch figures are summed over the ranks.
        trained = distributed.wrap(model)
        optimizer = self.optimizer(model.parameters())
        scheduler = self.scheduler(optimizer) if self.scheduler is not None else None
        model.train()
        fault_name = f"gen{gen.index}" if armed("batch") else None
        # disable=None lets tqdm switch itself off when stderr is not a terminal.
        disable = None if self.progress is None else not self.progress
        if not distributed.is_main():
            disable = True
        bar = tqdm(
            range(self.epochs),
            desc=self.title or f"generation {gen.index}",
            unit="epoch",
            leave=False,
            disable=disable,
        )
        for epoch in bar:
            # Sums stay on the device; they are read once per epoch (no sync per step).
            total = torch.zeros((), device=device)
            hits = torch.zeros((), device=device)
            counted = torch.zeros((), dtype=torch.int64, device=device)
            batches = 0
            classify = True
            for inputs, labels, targets in gen.loader:
                if fault_name is not None:
                    fault_point("batch", fault_name)
                labels = labels.to(device, non_blocking=True)
                outputs = trained(move_to(inputs, device))
                loss = gen.loss(outputs, labels, targets)
                optimizer.zero_grad(set_to_none=True)
                loss.backward()
                optimizer.step()
                total += loss.detach()
                classify = not labels.is_floating_point()
                if classify:
                    hits += (outputs.detach().argmax(dim=1) == labels).sum()
                    # pool rows (label NO_LABEL, -1) have no label to score against
                    counted += (labels >= 0).sum()
                else:
                    hits -= (outputs.detach() - labels.view_as(outputs)).pow(2).mean() * len(labels)
                    counted += len(labels)
                batches += 1
            if scheduler is not None:
                scheduler.step()
            sums = [float(total), float(hits), batches, int(counted)]
            if distributed.is_distributed():
                sums = distributed.all_sum([total, hits, batches, counted])
            mean = sums[0] / max(sums[2], 1)
            running = sums[1] / max(sums[3], 1)
            name = "running_accuracy" if classify else "running_neg_mse"
            extra = self.epoch_end(gen, model, epoch) if self.epoch_end is not None else {}
            gen.log_epoch(epoch, loss=mean, **{name: running}, **extra)
            bar.set_postfix(loss=f"{mean:.4f}", refresh=False)
        bar.close()
        return model


def fit_epochs(
    epochs: int,
    optimizer: OptimizerFactory,
    scheduler: SchedulerFactory | None = None,
    progress: bool | None = None,
    device: str | torch.device | None = None,
) -> EpochFit:
    """A fit function for :meth:`Lineage.run`: ``epochs`` epochs of ``optimizer(params)``.

    Every epoch logs its mean loss and a running metric against the original labels over the
    epoch's training batches (``running_accuracy``, or ``running_neg_mse`` for regression),
    computed in train mode as the batches go by, so it costs no extra pass.

    ``scheduler(optimizer)`` (optional) is stepped once per epoch. ``progress`` None shows a tqdm
    bar only when stderr is a terminal; True or False forces it. ``device`` moves each fresh
    student there (default: wherever ``model_fn`` put it); batches follow the model.
    """
    return EpochFit(epochs, optimizer, scheduler, progress, device)
