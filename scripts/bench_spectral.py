"""The spectral view's costs (issue 15): the kernel and its eigendecomposition once per
lineage, and the per-generation projection, at subset size m.

    OMP_NUM_THREADS=2 PYTHONPATH=src python scripts/bench_spectral.py --samples 3000

Features are random (m x p, p the width of the last layer's input); times are the best of
``--repeat`` runs. The projection is ``V^T (Y - mean)`` for C outputs plus the figures.
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np

from filial import spectral


def best_of(repeat: int, work) -> float:
    times = []
    for _ in range(repeat):
        started = time.perf_counter()
        work()
        times.append(time.perf_counter() - started)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--samples", type=int, default=3000)
    parser.add_argument("--width", type=int, default=512)
    parser.add_argument("--classes", type=int, default=10)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    m = args.samples
    features = rng.standard_normal((m, args.width))
    labels = rng.integers(0, args.classes, m)
    held = rng.standard_normal((m, args.width))
    outputs = rng.standard_normal((m, args.classes))
    kernel = spectral.build_kernel(np.arange(m), features, labels, held, labels)

    def build() -> None:
        spectral.build_kernel(np.arange(m), features, labels, held, labels)

    def project() -> None:
        spectral.spectrum_figures(kernel.coefficients(outputs))

    def forecast() -> None:
        spectral.forecast(
            kernel,
            lambda o, y: float((o.argmax(1) == y).double().mean()),
            0.9,
            8,
            args.classes,
        )

    print(f"m = {m}, features {args.width}, OMP_NUM_THREADS={os.environ.get('OMP_NUM_THREADS')}")
    route = "thin SVD" if args.width < m else "numpy.linalg.eigh"
    print(f"kernel (centre, decompose by {route}): {best_of(args.repeat, build):.2f} s")
    print(f"projection + figures per generation: {best_of(args.repeat, project) * 1e3:.1f} ms")
    print(f"forecast (8 generations, both regimes): {best_of(args.repeat, forecast):.2f} s")


if __name__ == "__main__":
    main()
