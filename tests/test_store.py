"""TargetStore: round trips, the manifest, and refusal of incomplete, damaged or foreign stores."""

from __future__ import annotations

import pickle

import numpy as np
import pytest

from filial.store import StoreError, TargetStore


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
