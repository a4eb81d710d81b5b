"""Wall time of the torchrun digits loop on two processes against the same loop in one process.

Both sides run ``recipes/torchrun_loop.py`` on the same recipe (the mail-room digits MLP, the
same global batch, epochs and number of generations: ``patience`` is set above
``generations`` so that no side stops early): one process with ``--threads-one`` torch threads
against ``torchrun --standalone --nproc-per-node=2`` with ``--threads-rank`` per rank (both 1 by
default: on a small, shared machine a second intra-op thread can cost more than it gives, so
compare thread settings by hand before reading the ratio as the cost of DDP). The sides
alternate (A B A B ...) after one warm-up each. Two times are reported per run: the script's own
wall time from its start to its end (process-group set-up included) and the whole command's
(interpreter, imports and, for torchrun, its agent included). Medians, with the per-repetition
ratios' min-max spread. Nothing is asserted; ``--out`` writes JSON.

    .venv/bin/python scripts/bench_torchrun.py --repeats 5
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
RECIPE = ROOT / "recipes" / "torchrun_loop.py"


def once(processes: int, args: argparse.Namespace, folder: Path, tag: str) -> dict:
    summary = folder / f"{tag}.json"
    threads = args.threads_one if processes == 1 else args.threads_rank
    recipe = [
        str(RECIPE),
        f"--epochs={args.epochs}",
        f"--generations={args.generations}",
        f"--patience={args.generations + 1}",
        f"--threads={threads}",
        f"--run-dir={folder / tag}",
        f"--summary={summary}",
    ]
    launcher = [sys.executable]
    if processes > 1:
        launcher += ["-m", "torch.distributed.run", "--standalone", f"--nproc-per-node={processes}"]
    env = {**os.environ, "OMP_NUM_THREADS": str(threads)}
    started = time.perf_counter()
    subprocess.run(launcher + recipe, check=True, capture_output=True, env=env)
    command = time.perf_counter() - started
    result = json.loads(summary.read_text(encoding="utf-8"))
    return {
        "script_s": result["seconds"],
        "command_s": command,
        "generations": len(result["records"]),
        "heldout": [r["heldout"] for r in result["records"]],
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--epochs", type=int, default=30)
    parser.add_argument("--generations", type=int, default=2, help="max generations after 0")
    parser.add_argument("--threads-one", type=int, default=1, help="threads of the 1-process side")
    parser.add_argument("--threads-rank", type=int, default=1, help="threads of each rank")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--out", help="write the figures here (JSON)")
    args = parser.parse_args()
    runs: dict[str, list[dict]] = {"one": [], "two": []}
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        once(1, args, folder, "warm1")
        once(2, args, folder, "warm2")
        for repeat in range(args.repeats):
            runs["one"].append(once(1, args, folder, f"one{repeat}"))
            runs["two"].append(once(2, args, folder, f"two{repeat}"))
    figures = {}
    for key in ("script_s", "command_s"):
        ratios = [b[key] / a[key] for a, b in zip(runs["one"], runs["two"], strict=True)]
        figures[key] = {
            "one_process_median": statistics.median(r[key] for r in runs["one"]),
            "two_processes_median": statistics.median(r[key] for r in runs["two"]),
            "ratio_median": statistics.median(ratios),
            "ratio_min": min(ratios),
            "ratio_max": max(ratios),
        }
    report = {"settings": vars(args), "cores": os.cpu_count(), "figures": figures, "runs": runs}
    for key, figure in figures.items():
        print(
            f"{key}: 1 process {figure['one_process_median']:.1f} s, 2 processes "
            f"{figure['two_processes_median']:.1f} s, ratio 2/1 {figure['ratio_median']:.2f} "
            f"({figure['ratio_min']:.2f}-{figure['ratio_max']:.2f})"
        )
    print(
        "generations:",
        [r["generations"] for r in runs["one"]],
        [r["generations"] for r in runs["two"]],
    )
    print("held-out, 1 process:", [round(h, 3) for h in runs["one"][0]["heldout"]])
    print("held-out, 2 processes:", [round(h, 3) for h in runs["two"][0]["heldout"]])
    if args.out:
        Path(args.out).write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
        print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
