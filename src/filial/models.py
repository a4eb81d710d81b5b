"""Is this model usable? The checks on what ``model_fn`` builds, before anything is written.

Every generation's model comes from the user's ``model_fn``. :class:`ModelChecks` builds one at
construction and runs it on the probe samples (its output width, and labels that fit it, are
known before the run directory is touched), then checks each generation's new model: a fresh
module, with parameters of its own, of the same output width.
"""

from __future__ import annotations

import weakref
from collections.abc import Callable
from typing import Any

import torch
from torch import nn

from .checkpoint import unwrap
from .errors import InputError
from .evaluation import probe_outputs
from .losses import ONE_OUTPUT_HINT, StudentLoss
from .seeding import preserved_rng


class ModelChecks:
    """The checks of one lineage's models, over its probe inputs and labels."""

    def __init__(
        self, model_fn: Callable[[], nn.Module], inputs: Any, labels: Any, loss: StudentLoss
    ) -> None:
        self.model_fn = model_fn
        self.inputs = inputs
        self._previous: weakref.ref[nn.Module] | None = None
        with preserved_rng():
            model = self._built(model_fn())
        outputs = self.outputs(model)
        loss.check(outputs, torch.as_tensor(labels))
        self.width = int(outputs.shape[1])
        # What every finished model must hold: the parameter and buffer names and shapes of
        # what model_fn builds (a checkpoint of anything else would poison the run directory).
        self.shapes = _shapes(model)

    @staticmethod
    def _built(model: Any) -> nn.Module:
        if not isinstance(model, nn.Module):
            raise InputError(
                f"model_fn must return an nn.Module, but returned {type(model).__name__}"
            )
        return model

    def outputs(self, model: nn.Module) -> torch.Tensor:
        """The model's outputs on the probe samples; a model that cannot run on them is an input
        error named here, before any training."""
        try:
            outputs = probe_outputs(model, self.inputs)
        except Exception as exc:  # whatever the user's forward raises
            raise InputError(
                f"the model from model_fn fails on a batch of the training data: "
                f"{type(exc).__name__}: {exc}"
            ) from exc
        if not isinstance(outputs, torch.Tensor) or outputs.ndim != 2:
            found = tuple(outputs.shape) if isinstance(outputs, torch.Tensor) else type(outputs)
            squeezed = isinstance(outputs, torch.Tensor) and outputs.ndim == 1
            raise InputError(
                f"the model must return a tensor of shape (batch, outputs), but returned "
                f"{found}{ONE_OUTPUT_HINT if squeezed else ''}"
            )
        return outputs

    def finished(self, model: nn.Module, index: int) -> None:
        """Refuse a trained model that is not what ``model_fn`` builds (other names or shapes
        of parameters and buffers), before anything of generation ``index`` is written."""
        found = _shapes(unwrap(model))
        if found == self.shapes:
            return
        missing = [k for k in self.shapes if k not in found]
        extra = [k for k in found if k not in self.shapes]
        reshaped = [
            f"{k} {found[k]} instead of {self.shapes[k]}"
            for k in self.shapes
            if k in found and found[k] != self.shapes[k]
        ]
        details = "; ".join(
            part
            for part in (
                f"missing {_some(missing)}" if missing else "",
                f"unexpected {_some(extra)}" if extra else "",
                f"shaped {_some(reshaped)}" if reshaped else "",
            )
            if part
        )
        raise InputError(
            f"generation {index} was finished with a model that is not what model_fn builds "
            f"({details}); pass gen.finish the module trained from gen.model"
        )

    def new_model(self, index: int) -> nn.Module:
        """``model_fn()`` for generation ``index`` (the caller has seeded the generators):
        a new module with parameters of its own and the lineage's output width."""
        model = self._built(self.model_fn())
        previous = self._previous() if self._previous is not None else None
        if previous is not None:
            if previous is model:
                raise InputError(
                    "model_fn returned the same module object as for the previous generation; it "
                    "must build a new, freshly initialised module on every call"
                )
            shared = {id(p) for p in previous.parameters()} & {id(p) for p in model.parameters()}
            if shared:
                raise InputError(
                    f"model_fn returned a module sharing {len(shared)} parameter tensors with the "
                    "previous generation's; every generation needs its own parameters"
                )
        width = self.outputs(model).shape[1]
        if width != self.width:
            raise InputError(
                f"generation {index}'s model has {width} outputs, but the lineage's models have "
                f"{self.width}: model_fn must build the same architecture every generation"
            )
        self._previous = weakref.ref(model)
        return model


def _shapes(model: nn.Module) -> dict[str, tuple[int, ...]]:
    return {name: tuple(value.shape) for name, value in model.state_dict().items()}


def _some(items: list[str], shown: int = 3) -> str:
    return ", ".join(items[:shown]) + (
        f" and {len(items) - shown} more" if len(items) > shown else ""
    )
