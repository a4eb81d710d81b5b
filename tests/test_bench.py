"""scripts/bench runs in its quick mode and writes well-formed JSON (no timing is asserted)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.slow
def test_bench_quick_mode_writes_its_table(tmp_path):
    out = tmp_path / "bench.json"
    done = subprocess.run(
        [sys.executable, str(ROOT / "scripts" / "bench.py"), "--quick", "--out", str(out)],
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert done.returncode == 0, done.stderr
    report = json.loads(out.read_text())
    assert report["quick"] is True and report["cores"] >= 1
    names = [row["figure"] for row in report["table"]]
    assert len(names) == len(set(names)) > 0  # every figure once
    for row in report["table"]:
        assert isinstance(row["value"], float) and row["value"] > 0
        assert isinstance(row["met"], bool) and row["goal"].split()[0] in ("<=", ">=", "<")
    for key in ("student_epoch_digits_mlp", "student_epoch_cnn_32x32"):
        for side in ("generation0", "student"):
            figure = report["figures"][key][side]
            assert figure["ratio_min"] <= figure["ratio_median"] <= figure["ratio_max"]
    cifar = report["figures"]["cache_versus_online_cifar"]
    assert cifar["ratio_min"] <= cifar["ratio_median"] <= cifar["ratio_max"]
    assert (cifar["depth"], cifar["images"]) == (8, 64)  # the quick mode's sizes
    sizes = report["figures"]["compact_store"]
    assert [sizes[c]["full"] for c in ("10", "100", "1000")] == [20, 200, 2000]
    assert sizes["bytes_per_sample"] == sizes["1000"]["top_k_10"] == 40
    assert "figure" in done.stdout and "wrote" in done.stdout
    # the teacher pass at scale, at the quick mode's sizes (this checkout only)
    stream = report["stream_table"]
    assert len({row["figure"] for row in stream}) == len(stream) > 0
    for row in stream:
        assert isinstance(row["value"], float) and row["value"] > 0, row
        assert row["before"] is None  # no --before checkout given
    assert "the teacher pass at scale" in done.stdout
