"""The generation loop: hook and managed mode, seeding, records, resume, refusals, divergence."""

from __future__ import annotations

import json
import logging

import numpy as np
import pytest
import torch
from conftest import TinyNet, blobs
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

import filial
import filial.rundir
import filial.store
from filial.checkpoint import load_checkpoint
from filial.errors import InputError


def _hook(lineage, epochs=2, lr=0.1, stop_after=None, poison=None):
    """The user's own loop, as in the README; ``poison``: that generation's weights become NaN."""
    for gen in lineage:
        model = gen.model
        opt = torch.optim.SGD(model.parameters(), lr=lr)
        for _ in range(epochs):
            for inputs, labels, targets in gen.loader:
                loss = gen.loss(model(inputs), labels, targets)
                opt.zero_grad()
                loss.backward()
                opt.step()
        if gen.index == poison:
            with torch.no_grad():
                for p in model.parameters():
                    p.fill_(float("nan"))
        gen.finish(model)
        if gen.index == stop_after:
            break
    return lineage.result


def _stable(records):
    """Records without wall-clock fields, for comparing two runs."""
    return [{k: v for k, v in r.items() if k not in ("seconds", "epochs")} for r in records]


def _lineage(loaders, run_dir, **kwargs):
    train, heldout, test = loaders
    options = {"max_generations": 3, "patience": 5, "test_loader": test}
    options.update(kwargs)
    return filial.Lineage(TinyNet(), train, heldout, run_dir=run_dir, **options)


def test_records_have_every_field(loaders, tmp_path):
    result = _hook(_lineage(loaders, tmp_path / "run"))
    assert [r["generation"] for r in result.records] == [0, 1, 2, 3]
    assert result.stop_reason == "max-generations"
    first, second = result.records[0], result.records[1]
    for key in ("heldout", "test", "train", "ensemble", "target_entropy", "seconds"):
        assert isinstance(first[key], float), key
    assert first["agreement"] is None and first["teacher"] is None
    assert second["teacher"] == 0 and 0.0 <= second["agreement"] <= 1.0
    assert first["ensemble"] == first["heldout"]  # an ensemble of one is that generation
    assert (tmp_path / "run" / first["checkpoint"]).is_file()
    assert "stop" in result.records[-1] and "stop" not in first
    heldout = [r["heldout"] for r in result.records]
    assert heldout[result.best] == max(heldout)  # the held-out argmax ...
    assert heldout.index(max(heldout)) == result.best  # ... and the earliest of any tie
    # lineage.json is strict JSON (no NaN) and holds the same records.
    state = json.loads((tmp_path / "run" / "lineage.json").read_text(), parse_constant=pytest.fail)
    assert state["records"] == result.records
    assert state["decision"]["reason"] == "max-generations"


def test_l2_records_output_norm(loaders, tmp_path):
    result = _hook(_lineage(loaders, tmp_path / "run", targets="l2", max_generations=1))
    assert all("output_norm" in r and "target_entropy" not in r for r in result.records)


def test_hook_and_managed_mode_share_one_engine(loaders, tmp_path):
    hook = _hook(_lineage(loaders, tmp_path / "hook"), epochs=2, lr=0.1)
    fit = filial.fit_epochs(2, lambda params: torch.optim.SGD(params, lr=0.1))
    managed = _lineage(loaders, tmp_path / "managed").run(fit)
    assert _stable(hook.records) == _stable(managed.records)
    assert [len(r["epochs"]) for r in managed.records] == [2, 2, 2, 2]


def test_generations_get_different_inits_and_runs_repeat(loaders, tmp_path):
    train, heldout, _ = loaders
    inits = {}
    for name in ("a", "b"):
        train.generator.manual_seed(0)
        lineage = filial.Lineage(
            TinyNet(), train, heldout, run_dir=tmp_path / name, max_generations=2, patience=5
        )
        inits[name] = []
        for gen in lineage:  # the weights each generation's student starts from
            inits[name].append(gen.model[0].weight.detach().clone())
            gen.finish(gen.model)
    a, b = inits["a"], inits["b"]
    assert len(a) == len(b) == 3
    assert not torch.equal(a[0], a[1]) and not torch.equal(a[1], a[2])
    assert all(torch.equal(x, y) for x, y in zip(a, b, strict=True))
    for g in range(3):
        left = load_checkpoint(tmp_path / "a" / f"gen{g}" / "student.pt")
        right = load_checkpoint(tmp_path / "b" / f"gen{g}" / "student.pt")
        assert all(torch.equal(left[k], right[k]) for k in left)


def test_resume_continues_without_retraining(loaders, tmp_path):
    train = loaders[0]
    whole = _hook(_lineage(loaders, tmp_path / "whole"))
    train.generator.manual_seed(0)
    run = tmp_path / "run"
    _hook(_lineage(loaders, run), stop_after=1)
    before = {g: (run / f"gen{g}" / "student.pt").read_bytes() for g in (0, 1)}
    stamps = {g: (run / f"gen{g}" / "student.pt").stat().st_mtime_ns for g in (0, 1)}

    started = []
    resumed = _lineage(loaders, run)
    assert [r["generation"] for r in resumed.result.records] == [0, 1]
    for gen in resumed:
        started.append(gen.index)
        break
    assert started == [2]  # no finished generation is trained again

    train.generator.manual_seed(0)  # the user's loader as it would be in a fresh process
    result = _hook(_lineage(loaders, run))
    assert [r["generation"] for r in result.records] == [0, 1, 2, 3]
    for g in (0, 1):
        assert (run / f"gen{g}" / "student.pt").read_bytes() == before[g]
        assert (run / f"gen{g}" / "student.pt").stat().st_mtime_ns == stamps[g]
    # Each generation reseeds everything from (seed, generation), so a resumed run equals one
    # that was never interrupted.
    assert _stable(result.records) == _stable(whole.records)


def test_finished_run_yields_no_more_generations(loaders, tmp_path):
    first = _hook(_lineage(loaders, tmp_path / "run", max_generations=1))
    again = _lineage(loaders, tmp_path / "run", max_generations=1)
    assert list(again) == []
    assert again.result.records == first.records and again.result.stop_reason == "max-generations"


def test_other_settings_are_refused_by_name(loaders, tmp_path):
    run = tmp_path / "run"
    _hook(_lineage(loaders, run, max_generations=1))
    # The .lock records the last process that opened the run (the README's "unchanged"
    # excludes it): the first object's lock is released whenever it is collected.
    def files():
        return sorted((p.name, p.stat().st_mtime_ns) for p in run.rglob("*") if p.name != ".lock")

    before = files()
    with pytest.raises(ValueError) as info:
        _lineage(loaders, run, max_generations=1, temperature=4.0, label_weight=0.5)
    message = str(info.value)
    assert "temperature: 1.0 in the run, 4.0 now" in message and "label_weight" in message
    assert "max_generations" not in message
    other_data = (DataLoader(blobs(80, seed=9), batch_size=16), loaders[1], loaders[2])
    with pytest.raises(ValueError, match="train_fingerprint"):
        _lineage(other_data, run, max_generations=1)
    assert files() == before


def test_fresh_starts_over_and_foreign_folders_are_refused(loaders, tmp_path):
    run = tmp_path / "run"
    _hook(_lineage(loaders, run, max_generations=1))
    lineage = _lineage(loaders, run, max_generations=2, fresh=True)
    assert lineage.result.records == [] and not (run / "gen0").exists()
    foreign = tmp_path / "photos"
    foreign.mkdir()
    (foreign / "cat.jpg").write_bytes(b"meow")
    with pytest.raises(ValueError, match="not a filial run directory"):
        _lineage(loaders, foreign, fresh=True)
    assert [p.name for p in foreign.iterdir()] == ["cat.jpg"]


def test_unfinished_generation_is_an_error(loaders, tmp_path):
    lineage = _lineage(loaders, tmp_path / "run")
    with pytest.raises(RuntimeError, match=r"call gen.finish\(model\)"):
        for _gen in lineage:
            pass


def test_diverged_generation_is_recorded_and_stops(loaders, tmp_path):
    run = tmp_path / "run"
    result = _hook(_lineage(loaders, run), poison=1)
    assert [r["generation"] for r in result.records] == [0, 1]
    assert result.records[1]["diverged"] and result.records[1]["heldout"] is None
    assert result.stop_reason == "diverged" and result.best == 0
    assert not (run / "gen1" / "targets.json").exists()  # never a teacher
    best = result.best_model()
    expected = load_checkpoint(run / "gen0" / "student.pt")
    assert all(torch.equal(best.state_dict()[k], expected[k]) for k in expected)


def test_damaged_targets_are_recomputed_from_the_checkpoint(loaders, tmp_path, caplog):
    run = tmp_path / "run"
    _hook(_lineage(loaders, run, store_dtype="float32"), stop_after=0)
    original = filial.TargetStore(run / "gen0").read_all()
    path = run / "gen0" / "targets.npy"
    data = bytearray(path.read_bytes())
    data[-1] ^= 0xFF
    path.write_bytes(bytes(data))
    lineage = _lineage(loaders, run, store_dtype="float32")
    with caplog.at_level(logging.WARNING, logger="filial"):
        gen = next(iter(lineage))
    assert "recomputing generation 0's targets" in caplog.text
    assert torch.equal(torch.from_numpy(gen.store.read_all()), torch.from_numpy(original))


def test_model_fn_must_build_a_new_module(loaders, tmp_path):
    shared = TinyNet()()
    train, heldout, _ = loaders
    lineage = filial.Lineage(lambda: shared, train, heldout, run_dir=tmp_path / "run")
    with pytest.raises(ValueError, match="same module object"):
        _hook(lineage)

    base = TinyNet()()

    def sharing():
        return nn.Sequential(base[0], nn.ReLU(), nn.Linear(16, 3))

    lineage = filial.Lineage(sharing, train, heldout, run_dir=tmp_path / "run2")
    with pytest.raises(ValueError, match="sharing 2 parameter tensors"):
        _hook(lineage)


def test_labels_outside_the_output_range_are_named(tmp_path):
    data = blobs(40, classes=5)
    train = DataLoader(data, batch_size=8)
    heldout = DataLoader(blobs(20, classes=5, seed=4), batch_size=8)
    # Found on the probe samples at construction, before the run directory exists.
    with pytest.raises(InputError, match=r"labels range over \[0, 4\] but the model has 3 outputs"):
        filial.Lineage(TinyNet(classes=3), train, heldout, run_dir=tmp_path / "run")
    assert not (tmp_path / "run").exists()
    # A label the probe did not see is still named at the first batch that holds it.
    loss = filial.losses.StudentLoss("ce")
    with pytest.raises(InputError, match="class labels must lie in"):
        loss(torch.zeros(2, 3), torch.tensor([0, 7]), None)


def test_bad_arguments_are_reported_together_and_write_nothing(loaders, tmp_path):
    train, heldout, _ = loaders
    with pytest.raises(ValueError) as info:
        filial.Lineage(
            TinyNet(),
            train,
            heldout,
            run_dir=tmp_path / "run",
            targets="kl",
            patience=0,
            label_weight=float("nan"),
            store_dtype="int8",
        )
    message = str(info.value)
    for word in ("targets", "patience", "store_dtype"):
        assert word in message
    assert not (tmp_path / "run").exists()
    # label_weight is not clamped: a teacher weight above one is allowed (Das & Sanghavi 2023).
    filial.Lineage(TinyNet(), train, heldout, run_dir=tmp_path / "ok", label_weight=-0.5)
    with pytest.raises(ValueError, match="label_weight"):
        filial.Lineage(TinyNet(), train, heldout, run_dir=tmp_path / "x", label_weight=float("inf"))


def test_label_weight_mixes_labels_into_student_loss(loaders, tmp_path):
    lineage = _lineage(loaders, tmp_path / "run", label_weight=0.25, max_generations=1)
    gens = iter(lineage)
    gen0 = next(gens)
    gen0.finish(gen0.model)
    gen1 = next(gens)
    inputs, labels, targets = next(iter(gen1.loader))
    outputs = gen1.model(inputs)
    expected = 0.75 * filial.losses.soft_cross_entropy(outputs, targets, 1.0)
    expected = expected + 0.25 * nn.functional.cross_entropy(outputs, labels)
    assert torch.allclose(gen1.loss(outputs, labels, targets), expected)


def test_progress_prints_one_line_per_generation(loaders, tmp_path, capsys):
    _hook(_lineage(loaders, tmp_path / "loud", max_generations=1))
    lines = capsys.readouterr().err.splitlines()
    assert [line.split(":")[1].strip() for line in lines] == ["generation 0", "generation 1"]
    assert "stop (max-generations)" in lines[-1]
    _hook(_lineage(loaders, tmp_path / "quiet", max_generations=1, progress=False))
    assert capsys.readouterr().err == ""


def test_metric_results_become_floats_and_bad_ones_are_named(loaders, tmp_path):
    def numpy_accuracy(outputs, labels):
        return np.float32((outputs.argmax(1) == labels).float().mean())

    result = _hook(_lineage(loaders, tmp_path / "np", max_generations=1, metric=numpy_accuracy))
    assert all(type(r["heldout"]) is float and type(r["train"]) is float for r in result.records)
    assert result.best is not None

    def words(outputs, labels):
        return "good"

    lineage = _lineage(loaders, tmp_path / "bad", metric=words)
    with pytest.raises(TypeError, match="metric .*words must return a number"):
        _hook(lineage)
    assert json.loads((tmp_path / "bad" / "lineage.json").read_text())["records"] == []


def test_failed_state_write_keeps_memory_and_disk_in_step(loaders, tmp_path, monkeypatch):
    lineage = _lineage(loaders, tmp_path / "run", max_generations=1)
    gen = next(iter(lineage))
    real = filial.rundir.atomic_write_json

    def full_disk(path, data):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(filial.rundir, "atomic_write_json", full_disk)
    with pytest.raises(OSError, match="(?i)no space"):
        gen.finish(gen.model)
    assert lineage.result.records == [] and not gen.finished
    monkeypatch.setattr(filial.rundir, "atomic_write_json", real)
    gen.finish(gen.model)  # the same generation can be finished once the disk has room
    assert [r["generation"] for r in lineage.result.records] == [0]


def test_crash_inside_finish_resumes_to_the_same_records(loaders, tmp_path, monkeypatch):
    whole = _hook(_lineage(loaders, tmp_path / "whole"))
    real = filial.store.StoreWriter.publish

    def crash_in_generation_two(writer, **kwargs):
        if str(writer.directory).endswith("gen2"):
            raise KeyboardInterrupt  # as if the process stopped while publishing targets
        return real(writer, **kwargs)

    monkeypatch.setattr(filial.store.StoreWriter, "publish", crash_in_generation_two)
    with pytest.raises(KeyboardInterrupt):
        _hook(_lineage(loaders, tmp_path / "run"))
    monkeypatch.setattr(filial.store.StoreWriter, "publish", real)
    assert (tmp_path / "run" / "gen2" / "student.pt").is_file()  # written, never recorded
    # the streamed rows' temporaries went with the interrupted generation
    assert not list((tmp_path / "run").rglob(".*.tmp-*"))
    assert not (tmp_path / "run" / "gen2" / "targets.npy").exists()
    resumed = _lineage(loaders, tmp_path / "run")
    assert [r["generation"] for r in resumed.result.records] == [0, 1]
    assert _stable(_hook(resumed).records) == _stable(whole.records)


def test_settings_may_change_until_a_generation_finishes(loaders, tmp_path, caplog):
    run = tmp_path / "run"
    _lineage(loaders, run, temperature=2.0)  # created, nothing finished
    with caplog.at_level(logging.WARNING, logger="filial"):
        lineage = _lineage(loaders, run, temperature=3.0)
    assert "no generation had finished" in caplog.text
    assert json.loads((run / "lineage.json").read_text())["settings"]["temperature"] == 3.0
    assert lineage.settings["temperature"] == 3.0


def test_conflicting_or_mistyped_options_are_refused(loaders, tmp_path):
    train, heldout, _ = loaders
    with pytest.raises(ValueError, match="applies to targets='ce' only"):
        filial.Lineage(
            TinyNet(), train, heldout, run_dir=tmp_path / "a", targets="l2", temperature=3.0
        )
    floats = DataLoader(TensorDataset(torch.randn(20, 5), torch.randn(20, 3)), batch_size=5)
    with pytest.raises(ValueError, match="targets='ce' needs integer class labels"):
        filial.Lineage(TinyNet(), floats, heldout, run_dir=tmp_path / "b")
    with pytest.raises(ValueError, match="max_generations should be an integer"):
        filial.Lineage(TinyNet(), train, heldout, run_dir=tmp_path / "c", max_generations=True)
    lineage = filial.Lineage(
        TinyNet(), train, heldout, run_dir=tmp_path / "d", seed=np.int64(3), patience=np.int32(2)
    )
    assert lineage.settings["seed"] == 3 and type(lineage.settings["seed"]) is int
    assert not any((tmp_path / name).exists() for name in "abc")


def test_best_model_leaves_the_global_rng_alone(loaders, tmp_path):
    result = _hook(_lineage(loaders, tmp_path / "run", max_generations=1))
    before = torch.get_rng_state()
    result.best_model()
    assert torch.equal(before, torch.get_rng_state())


def test_diverged_retry_removes_an_earlier_attempts_targets(loaders, tmp_path, monkeypatch):
    real = filial.rundir.atomic_write_json
    crashed = []

    def crash_on_record_of_generation_one(path, data):
        if len(data["records"]) == 2 and not crashed:
            crashed.append(path)
            raise KeyboardInterrupt  # gen1's store is on disk, its record is not
        return real(path, data)

    monkeypatch.setattr(filial.rundir, "atomic_write_json", crash_on_record_of_generation_one)
    with pytest.raises(KeyboardInterrupt):
        _hook(_lineage(loaders, tmp_path / "run"))
    monkeypatch.setattr(filial.rundir, "atomic_write_json", real)
    assert (tmp_path / "run" / "gen1" / "targets.json").is_file()
    result = _hook(_lineage(loaders, tmp_path / "run"), poison=1)
    assert result.stop_reason == "diverged"
    assert not (tmp_path / "run" / "gen1" / "targets.json").exists()
    assert not (tmp_path / "run" / "gen1" / "targets.npy").exists()


def test_other_inputs_with_the_same_labels_are_refused_on_resume(loaders, tmp_path):
    run = tmp_path / "run"
    _hook(_lineage(loaders, run, max_generations=1), stop_after=0)
    inputs, labels = loaders[0].dataset.tensors
    scaled = DataLoader(TensorDataset(inputs * 100, labels), batch_size=16, shuffle=True)
    with pytest.raises(ValueError, match="train_fingerprint"):
        _lineage((scaled, loaders[1], loaders[2]), run, max_generations=1)


@pytest.mark.skipif(not torch.cuda.is_available(), reason="needs a CUDA device")
def test_model_and_loaders_on_the_gpu(tmp_path):
    """A user with CUDA passes a model and data on the GPU; nothing assumes the CPU."""
    device = torch.device("cuda")
    data = blobs(64)
    train = DataLoader(
        TensorDataset(*(t.to(device) for t in data.tensors)),
        batch_size=16,
        shuffle=True,
        generator=torch.Generator(device="cpu"),
    )
    heldout = DataLoader(blobs(32, seed=5), batch_size=16)
    lineage = filial.Lineage(
        lambda: TinyNet()().to(device), train, heldout, run_dir=tmp_path / "gpu", max_generations=1
    )
    for gen in lineage:
        model = gen.model
        assert next(model.parameters()).is_cuda
        opt = torch.optim.SGD(model.parameters(), lr=0.1)
        for inputs, labels, targets in gen.loader:
            loss = gen.loss(model(inputs.to(device)), labels, targets)
            assert loss.is_cuda
            opt.zero_grad()
            loss.backward()
            opt.step()
        gen.finish(model)
    result = lineage.result
    assert [r["generation"] for r in result.records] == [0, 1]
    assert all(isinstance(r["heldout"], float) for r in result.records)
    assert not next(result.best_model().parameters()).is_cuda  # checkpoints load on the CPU


def test_fresh_deletes_only_what_a_lineage_writes(loaders, tmp_path):
    run = tmp_path / "run"
    _hook(_lineage(loaders, run, max_generations=1))
    (run / "notes.txt").write_text("mine")
    lineage = _lineage(loaders, run, max_generations=1, fresh=True)
    assert lineage.result.records == []
    assert sorted(p.name for p in run.iterdir()) == [".lock", "lineage.json", "notes.txt"]
