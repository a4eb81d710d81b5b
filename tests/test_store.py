"""TargetStore: round trips, the manifest, and refusal of incomplete, damaged or foreign stores;
StoreWriter: a store written row by row, in any order and from several writers.

Outside reference: ``hashlib.sha256`` over the finished file (what ``verify`` recomputes), and
numpy's own ``.npy`` reader.
"""

from __future__ import annotations

import errno
import hashlib
import os
import pickle

import numpy as np
import pytest

from filial._io import sweep_temporaries
from filial.store import StoreError, StoreWriter, TargetStore


def _outputs(n=20, views=1, classes=4, seed=0):
    return np.random.default_rng(seed).normal(size=(n, views, classes)).astype(np.float32)


def test_float32_round_trip_is_exact(tmp_path):
    outputs = _outputs(views=2)
    TargetStore.write(tmp_path, outputs, dtype="float32", fingerprint="fp", teacher_sha256="t")
    store = TargetStore(tmp_path)
    store.verify(fingerprint="fp")
    np.testing.assert_array_equal(store.read_all(), outputs)
    idx = np.array([7, 3, 3, 19])
    np.testing.assert_array_equal(store.gather(idx), outputs[idx, 0])
    views = np.array([1, 0, 1, 1])
    np.testing.assert_array_equal(store.gather(idx, views), outputs[idx, views])
    assert store.gather(idx).dtype == np.float32


def test_float16_round_trip_within_half_precision(tmp_path):
    outputs = _outputs() * 10
    store = TargetStore.write(tmp_path, outputs, fingerprint="fp", teacher_sha256="t")
    # float16 has an 11-bit significand: relative error at most 2**-11 (IEEE 754 binary16).
    np.testing.assert_allclose(store.read_all(), outputs, rtol=2**-11, atol=1e-7)
    assert np.load(tmp_path / "targets.npy").dtype == np.float16


def test_manifest_describes_the_array(tmp_path):
    outputs = _outputs(n=5, views=3, classes=7)
    TargetStore.write(tmp_path, outputs, dtype="float16", fingerprint="abc", teacher_sha256="def")
    manifest = TargetStore(tmp_path).manifest
    assert manifest["shape"] == [5, 3, 7]
    assert manifest["dtype"] == "float16" and manifest["top_k"] is None
    assert manifest["views"] == 3 and manifest["classes"] == 7
    assert manifest["bytes_per_sample"] == 3 * 7 * 2
    assert manifest["bytes"] == (tmp_path / "targets.npy").stat().st_size
    assert manifest["fingerprint"] == "abc" and manifest["teacher_sha256"] == "def"
    assert len(manifest["sha256"]) == 64


def test_store_without_manifest_is_not_trusted(tmp_path):
    np.save(tmp_path / "targets.npy", _outputs())
    store = TargetStore(tmp_path)
    assert not store.exists()
    with pytest.raises(StoreError, match="targets.json is missing"):
        store.verify()


def test_truncated_array_is_detected(tmp_path):
    TargetStore.write(tmp_path, _outputs(), fingerprint="fp", teacher_sha256="t")
    path = tmp_path / "targets.npy"
    path.write_bytes(path.read_bytes()[:-10])
    with pytest.raises(StoreError, match="truncated"):
        TargetStore(tmp_path).verify()


def test_corrupted_array_is_detected_by_checksum(tmp_path):
    TargetStore.write(tmp_path, _outputs(), fingerprint="fp", teacher_sha256="t")
    path = tmp_path / "targets.npy"
    data = bytearray(path.read_bytes())
    data[-3] ^= 0xFF
    path.write_bytes(bytes(data))
    store = TargetStore(tmp_path)
    store.verify(checksum=False)  # same size: only the checksum can tell
    with pytest.raises(StoreError, match="sha256"):
        store.verify()


def test_other_training_data_is_refused(tmp_path):
    TargetStore.write(tmp_path, _outputs(), fingerprint="one", teacher_sha256="t")
    with pytest.raises(StoreError, match="different training set"):
        TargetStore(tmp_path).verify(fingerprint="two")


def test_non_finite_and_out_of_range_outputs_are_refused(tmp_path):
    bad = _outputs()
    bad[2, 0, 1] = np.nan
    with pytest.raises(StoreError, match="NaN"):
        TargetStore.write(tmp_path, bad, fingerprint="fp", teacher_sha256="t")
    with pytest.raises(StoreError, match="store_dtype='float32'"):
        TargetStore.write(tmp_path, _outputs() * 1e6, fingerprint="fp", teacher_sha256="t")
    assert not (tmp_path / "targets.npy").exists()
    with pytest.raises(StoreError, match="shape"):
        TargetStore.write(tmp_path, np.zeros((3, 4)), fingerprint="fp", teacher_sha256="t")


def test_failed_write_leaves_nothing_behind(tmp_path, monkeypatch):
    def broken_save(handle, array, allow_pickle=False):
        handle.write(b"\x93NUMPY partial")
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(np, "save", broken_save)
    with pytest.raises(OSError, match="(?i)no space"):
        TargetStore.write(tmp_path, _outputs(), fingerprint="fp", teacher_sha256="t")
    assert list(tmp_path.iterdir()) == []


def test_pickled_store_carries_no_open_memory_map(tmp_path):
    store = TargetStore.write(tmp_path, _outputs(), fingerprint="fp", teacher_sha256="t")
    store.gather(np.array([0]))  # opens the memory map in this process
    assert store._array is not None
    clone = pickle.loads(pickle.dumps(store))
    assert clone._array is None
    np.testing.assert_array_equal(clone.gather(np.array([4])), store.gather(np.array([4])))


# -- the streamed writer -----------------------------------------------------------------------


def _layout(**extra):
    return {"count": 20, "views": 2, "classes": 4, "dtype": "float32", **extra}


def test_rows_written_in_any_order_by_two_writers_make_the_in_memory_writers_store(tmp_path):
    """As two ranks write: interleaved codes, each writer its own; the owner publishes. The
    sha256 is then computed from the finished file (the rows did not come in order)."""
    outputs = _outputs(views=2)
    flat = outputs.reshape(40, 4)
    owner = StoreWriter.create(tmp_path / "streamed", **_layout())
    other = StoreWriter.join(tmp_path / "streamed", os.getpid(), **_layout())
    codes = np.random.default_rng(1).permutation(40)
    for writer, share in ((owner, codes[::2]), (other, codes[1::2])):
        for batch in np.array_split(share, 3):
            writer.put(batch, flat[batch])
    other.sync()
    other.close()
    store = owner.publish(peak=float(np.abs(outputs).max()), fingerprint="f", teacher_sha256="t")
    TargetStore.write(
        tmp_path / "whole", outputs, dtype="float32", fingerprint="f", teacher_sha256="t"
    )
    for name in ("targets.npy", "targets.json"):
        assert (tmp_path / "streamed" / name).read_bytes() == (
            tmp_path / "whole" / name
        ).read_bytes()
    digest = hashlib.sha256((tmp_path / "streamed" / "targets.npy").read_bytes()).hexdigest()
    assert store.manifest["sha256"] == digest
    np.testing.assert_array_equal(np.load(tmp_path / "streamed" / "targets.npy"), outputs)


def test_a_writer_in_progress_is_a_temporary_that_only_a_dead_writer_loses(tmp_path):
    writer = StoreWriter.create(tmp_path, **_layout(top_k=2))
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        f".targets.npy.tmp-{os.getpid()}",
        f".targets_index.npy.tmp-{os.getpid()}",
    ]
    assert not TargetStore(tmp_path).exists()
    assert sweep_temporaries(tmp_path) == []  # its writer (this process) is alive
    writer.discard()
    assert list(tmp_path.iterdir()) == []


def test_a_publish_replaces_an_older_store_and_its_manifest_goes_first(tmp_path, monkeypatch):
    old = _outputs(views=2) + 1
    TargetStore.write(tmp_path, old, dtype="float32", fingerprint="f", teacher_sha256="old")
    rows = _outputs(views=2).reshape(40, 4)
    writer = StoreWriter.create(tmp_path, **_layout())
    writer.put(np.arange(40), rows)
    with pytest.raises(StoreError, match="NaN"):  # refused before anything is touched
        writer.publish(peak=float("nan"), fingerprint="f", teacher_sha256="new")
    TargetStore(tmp_path).verify()
    assert not list(tmp_path.glob(".*.tmp-*"))

    writer = StoreWriter.create(tmp_path, **_layout())
    writer.put(np.arange(40), rows)

    def fails(source, target):
        raise OSError(errno.EIO, "input/output error (simulated)")

    monkeypatch.setattr(os, "replace", fails)
    with pytest.raises(OSError, match="simulated"):
        writer.publish(peak=1.0, fingerprint="f", teacher_sha256="new")
    monkeypatch.undo()
    assert not TargetStore(tmp_path).exists()  # the older manifest went before the rename
    assert not list(tmp_path.glob(".*.tmp-*"))

    writer = StoreWriter.create(tmp_path, **_layout())
    writer.put(np.arange(40), rows)
    writer.publish(peak=1.0, fingerprint="f", teacher_sha256="new").verify()
    assert TargetStore(tmp_path).manifest["teacher_sha256"] == "new"


def test_bad_rows_are_refused(tmp_path):
    writer = StoreWriter.create(tmp_path, **_layout(top_k=2))
    with pytest.raises(ValueError, match=r"codes should lie in \[0, 40\)"):
        writer.put(np.array([39, 40]), np.zeros((2, 2)), np.zeros((2, 2)))
    with pytest.raises(ValueError, match=r"shape \(1, 2\)"):
        writer.put(np.array([3]), np.zeros((1, 4)), np.zeros((1, 2)))
    with pytest.raises(ValueError, match="top-k layout takes values and classes"):
        writer.put(np.array([3]), np.zeros((1, 2)))
    writer.discard()
    with pytest.raises(StoreError, match="top_k should lie in"):
        StoreWriter.create(tmp_path, **_layout(top_k=5))
    with pytest.raises(StoreError, match="is not there"):
        StoreWriter.join(tmp_path, 12345, **_layout())


def test_a_full_disk_while_rows_are_written_names_the_file(tmp_path, monkeypatch):
    writer = StoreWriter.create(tmp_path, **_layout())

    def full(fd, data, offset):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "pwrite", full)
    with pytest.raises(OSError, match="no space left on the device while writing .*targets.npy"):
        writer.put(np.arange(4), np.zeros((4, 4)))
    monkeypatch.undo()
    writer.discard()  # what the pass does when a consumer fails
    assert list(tmp_path.iterdir()) == []
