"""Checkpoints: weights-only round trips, unwrapping, checksums, and refusal of pickled code."""

from __future__ import annotations

import os
import pickle

import pytest
import torch
from torch import nn

from filial.checkpoint import CheckpointError, load_checkpoint, save_checkpoint, unwrap


def _model():
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(4, 8), nn.BatchNorm1d(8), nn.Linear(8, 2))


def test_round_trip_with_weights_only(tmp_path):
    model = _model()
    sha = save_checkpoint(model, tmp_path / "student.pt")
    state = load_checkpoint(tmp_path / "student.pt", sha)
    reference = torch.load(tmp_path / "student.pt", weights_only=True)  # torch's own safe loader
    assert state.keys() == model.state_dict().keys() == reference.keys()
    for key, value in model.state_dict().items():
        assert torch.equal(state[key], value)
    fresh = _model()
    fresh.load_state_dict(state)


def test_wrappers_are_removed_before_saving(tmp_path):
    model = _model()
    wrapped = nn.DataParallel(model)  # on the CPU it only forwards, but its keys carry "module."
    assert all(k.startswith("module.") for k in wrapped.state_dict())
    assert unwrap(wrapped) is model
    save_checkpoint(wrapped, tmp_path / "student.pt")
    assert load_checkpoint(tmp_path / "student.pt").keys() == model.state_dict().keys()


def test_changed_file_is_refused(tmp_path):
    sha = save_checkpoint(_model(), tmp_path / "student.pt")
    save_checkpoint(nn.Linear(4, 2), tmp_path / "student.pt")
    with pytest.raises(CheckpointError, match="sha256"):
        load_checkpoint(tmp_path / "student.pt", sha)
    with pytest.raises(CheckpointError, match="does not exist"):
        load_checkpoint(tmp_path / "missing.pt")


class _Trap:
    """Unpickling this would create a marker file: the loader must never run it."""

    def __init__(self, marker):
        self.marker = marker

    def __reduce__(self):
        return (open, (self.marker, "w"))


def test_pickled_callable_is_refused_and_never_run(tmp_path):
    marker = tmp_path / "ran"
    path = tmp_path / "evil.pt"
    with open(path, "wb") as handle:
        pickle.dump({"weight": _Trap(str(marker))}, handle, protocol=2)
    with pytest.raises(CheckpointError, match="weights-only"):
        load_checkpoint(path)
    assert not marker.exists()


def test_failed_save_leaves_nothing_behind(tmp_path, monkeypatch):
    def broken_save(obj, handle, *args, **kwargs):
        handle.write(b"PK partial")
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(torch, "save", broken_save)
    with pytest.raises(OSError):
        save_checkpoint(_model(), tmp_path / "student.pt")
    assert os.listdir(tmp_path) == []
