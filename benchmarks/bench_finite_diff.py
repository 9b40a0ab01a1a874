"""Cost of the finite-difference checks, as ratios to the oracle calls they replace.

    python benchmarks/bench_finite_diff.py

1. Dense FD Jacobian of conv2d, input (2, 3, 8, 8), weight (4, 3, 3, 3): seconds, and the ratio
   to one forward call times the number of inputs perturbed (4 evaluations per input element
   are needed; batching them into one call is what brings the ratio down).
2. Directional check of conv2d, input (8, 64, 56, 56), weight (64, 64, 3, 3): time of one probe
   per array relative to one forward + vjp.
"""
from __future__ import annotations

import time

import numpy as np

import refops.ops as ops
from refops.numerics import dense_jacobian, directional_check


def best_of(fn, repeat=3):
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def dense_conv(rng):
    x = rng.standard_normal((2, 3, 8, 8))
    w = rng.standard_normal((4, 3, 3, 3))
    conv = ops.get("conv2d")

    def batched_input(stack):                       # (B, 2, 3, 8, 8) -> (B, 2, 4, 6, 6)
        out = conv(stack.reshape((-1,) + x.shape[1:]), w)
        return out.reshape(stack.shape[:2] + out.shape[1:])

    forward = best_of(lambda: conv(x, w), repeat=20)
    rows = []
    for label, call, n in [
        ("input, batched", lambda: dense_jacobian(batched_input, x, batched=True), x.size),
        ("input, one call per point", lambda: dense_jacobian(lambda a: conv(a, w), x), x.size),
        ("weight, one call per point", lambda: dense_jacobian(lambda b: conv(x, b), w), w.size),
    ]:
        seconds = best_of(call, repeat=2)
        rows.append((label, n, seconds, seconds / (forward * n)))
    print(f"dense FD Jacobian of conv2d (2,3,8,8) x (4,3,3,3); one forward = {forward * 1e3:.3f} ms")
    print(f"  {'array':28s} {'inputs':>7s} {'seconds':>9s} {'/ (forward x inputs)':>22s}")
    for label, n, seconds, ratio in rows:
        print(f"  {label:28s} {n:7d} {seconds:9.3f} {ratio:22.2f}")


def directional_conv(rng):
    x = rng.standard_normal((8, 64, 56, 56))
    w = rng.standard_normal((64, 64, 3, 3)) / 24
    conv = ops.get("conv2d")
    v = rng.standard_normal(conv.output_shape(x, w))
    grads = conv.vjp(v, x, w)
    reference = best_of(lambda: (conv(x, w), conv.vjp(v, x, w)), repeat=2)
    probe_input = best_of(lambda: directional_check(lambda a: conv(a, w), x, v, grads["input"],
                                                    rng=rng), repeat=1)
    probe_weight = best_of(lambda: directional_check(lambda b: conv(x, b), w, v, grads["weight"],
                                                     rng=rng), repeat=1)
    result = directional_check(lambda a: conv(a, w), x, v, grads["input"], rng=rng)
    print(f"directional check of conv2d (8,64,56,56) x (64,64,3,3); "
          f"forward + vjp = {reference:.2f} s")
    print(f"  {'probe':10s} {'seconds':>9s} {'/ (forward + vjp)':>18s}")
    print(f"  {'input':10s} {probe_input:9.2f} {probe_input / reference:18.2f}")
    print(f"  {'weight':10s} {probe_weight:9.2f} {probe_weight / reference:18.2f}")
    print(f"  (input probe: error {result.error:.2e}, estimate {result.estimate:.2e}, "
          f"passed {result.passed})")


def main():
    rng = np.random.default_rng(0)
    dense_conv(rng)
    directional_conv(rng)


if __name__ == "__main__":
    main()
