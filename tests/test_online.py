"""Online teacher mode: the previous generation runs on every training batch instead of a cache."""

from __future__ import annotations

import pytest
import torch
from conftest import TinyNet, blobs
from torch.utils.data import DataLoader

import filial


def _targets_by_batch(run_dir, mode):
    train = DataLoader(
        blobs(64), batch_size=16, shuffle=True, generator=torch.Generator().manual_seed(0)
    )
    heldout = DataLoader(blobs(32, seed=2), batch_size=16)
    lineage = filial.Lineage(
        TinyNet(),
        train,
        heldout,
        run_dir=run_dir,
        max_generations=1,
        teacher_mode=mode,
        progress=False,
    )
    seen = []
    for gen in lineage:
        model = gen.model
        opt = torch.optim.SGD(model.parameters(), lr=0.1)
        for _ in range(2):
            for inputs, labels, targets in gen.loader:
                if gen.index == 1:
                    seen.append((inputs.clone(), targets.detach().clone()))
                loss = gen.loss(model(inputs), labels, targets)
                opt.zero_grad()
                loss.backward()
                opt.step()
        gen.finish(model)
    return seen, lineage.result


def test_online_targets_equal_the_cache_on_a_deterministic_dataset(tmp_path):
    cached, cached_result = _targets_by_batch(tmp_path / "cached", "cached")
    online, online_result = _targets_by_batch(tmp_path / "online", "online")
    assert len(cached) == len(online) == 8
    for (x_cached, t_cached), (x_online, t_online) in zip(cached, online, strict=True):
        assert torch.equal(x_cached, x_online)  # same batches, same order
        # The cache keeps float16 (11-bit significand); online targets are float32.
        torch.testing.assert_close(t_online, t_cached, rtol=2**-10, atol=1e-3)
    assert [r["mode"] for r in online_result.records] == ["labels", "online"]
    assert [r["mode"] for r in cached_result.records] == ["labels", "cached"]
    keys = ("generation", "teacher", "diverged")
    assert [{k: r[k] for k in keys} for r in online_result.records] == [
        {k: r[k] for k in keys} for r in cached_result.records
    ]


def test_online_mode_is_a_setting_and_refuses_top_k(loaders, tmp_path):
    train, heldout, _ = loaders
    with pytest.raises(ValueError, match="teacher_mode must be one of"):
        filial.Lineage(TinyNet(), train, heldout, run_dir=tmp_path / "a", teacher_mode="live")
    with pytest.raises(ValueError, match="caches none"):
        filial.Lineage(
            TinyNet(), train, heldout, run_dir=tmp_path / "b", teacher_mode="online", top_k=2
        )
    lineage = filial.Lineage(
        TinyNet(), train, heldout, run_dir=tmp_path / "c", teacher_mode="online"
    )
    assert lineage.settings["teacher_mode"] == "online"


def test_online_loader_acts_as_the_loader_and_no_cache_is_written(loaders, tmp_path):
    train, heldout, _ = loaders
    lineage = filial.Lineage(
        TinyNet(),
        train,
        heldout,
        run_dir=tmp_path / "run",
        max_generations=1,
        teacher_mode="online",
        progress=False,
    )
    gens = iter(lineage)
    gen0 = next(gens)
    gen0.finish(gen0.model)
    gen1 = next(gens)
    assert gen1.loader.dataset is not None and gen1.loader.sampler is not None  # passed through
    assert len(gen1.loader) == len(train)
    assert not (tmp_path / "run" / "gen0" / "targets.npy").exists()


def test_runs_written_before_teacher_mode_existed_still_resume(loaders, tmp_path):
    import json

    train, heldout, _ = loaders
    run = tmp_path / "run"
    lineage = filial.Lineage(
        TinyNet(), train, heldout, run_dir=run, max_generations=2, progress=False
    )
    gen0 = next(iter(lineage))
    gen0.finish(gen0.model)
    lineage.close()
    state = json.loads((run / "lineage.json").read_text())
    del state["settings"]["teacher_mode"]  # as an older filial wrote it
    (run / "lineage.json").write_text(json.dumps(state))
    resumed = filial.Lineage(
        TinyNet(), train, heldout, run_dir=run, max_generations=2, progress=False
    )
    assert [r["generation"] for r in resumed.result.records] == [0]
