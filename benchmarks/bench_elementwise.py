"""Speed of the elementwise oracles: forward + vjp on 10**6 float64 elements, as a ratio to
numpy's own ``np.exp`` on the same array, measured in the same run.

    python benchmarks/bench_elementwise.py [--size N] [--repeat R]

The ratio includes the oracles' argument checks (a finite-check and a float64 copy of each
array per call). Target: within 5x of one ``np.exp`` pass.
"""
from __future__ import annotations

import argparse
import time

import numpy as np

import refops.ops as ops

CASES = [
    ("relu", {}), ("relu6", {}), ("leaky_relu", {}), ("elu", {}), ("selu", {}),
    ("celu", {"alpha": 1.3}), ("gelu", {}), ("gelu", {"approximate": "tanh"}), ("silu", {}),
    ("mish", {}), ("softplus", {}), ("softplus", {"beta": 1.7}), ("sigmoid", {}),
    ("logsigmoid", {}), ("tanh", {}), ("atan", {}), ("hardtanh", {}), ("hardsigmoid", {}),
    ("hardswish", {}), ("softsign", {}),
]


def best_time(run, repeat: int) -> float:
    """The fastest of ``repeat`` runs, in seconds (the least disturbed by other load)."""
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        run()
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=10 ** 6)
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    x = 4.0 * rng.standard_normal(args.size)
    g = rng.standard_normal(args.size)
    baseline = best_time(lambda: np.exp(x), args.repeat)
    print(f"np.exp on {args.size} float64: {baseline * 1e3:.2f} ms")
    print(f"{'op':28s} {'forward+vjp ms':>14s} {'ratio':>7s}")
    for name, params in CASES:
        op = ops.get(name)

        def both():
            op(x, **params)
            op.vjp(g, x, **params)

        seconds = best_time(both, args.repeat)
        label = name + "".join(f" {k}={v}" for k, v in params.items())
        print(f"{label:28s} {seconds * 1e3:14.2f} {seconds / baseline:7.1f}")
    w = np.array([0.25, 0.1, 0.3, 0.2])
    x4 = x.reshape(-1, 4, 250) if args.size % 1000 == 0 else x.reshape(1, 1, -1)
    if x4.shape[1] != 4:
        w = w[:1]
    seconds = best_time(lambda: (ops.prelu(x4, w), ops.prelu.vjp(g.reshape(x4.shape), x4, w)),
                        args.repeat)
    print(f"{'prelu (C=' + str(w.size) + ')':28s} {seconds * 1e3:14.2f} {seconds / baseline:7.1f}")


if __name__ == "__main__":
    main()
