"""conv2d oracle speed and memory against torch float64, measured in the same run.

    python benchmarks/bench_conv.py [--repeat R] [--threads T] [--quick]

For each shape, refops forward + vjp and torch float64 forward + backward run alternately R times;
the table gives the median times and the median of the R paired ratios (each pair measured back to
back, so that a busy machine slows both sides alike), refops GFLOP/s (at its median time) as a
share of numpy's own float64 matmul rate (a 2048^2 GEMM timed here), and the scratch memory traced
by tracemalloc (numpy allocations are traced): for the forward and for the vjp, the traced peak
minus its results, the larger of the two. A last table runs a cheap shape at batch 256 under
several memory bounds.
Targets: ratio <= 1.0 on the dense shapes, <= 2.0 on the others; >= 60% of the matmul rate on
the large dense shape.
"""
from __future__ import annotations

import argparse
import ctypes
import glob
import os
import time
import tracemalloc

import numpy as np
import torch
import torch.nn.functional as F

import refops.ops as ops

# name, (N, C_in, H, W, C_out, k), conv params, target ratio
CASES = [
    ("dense 8x64x56x56->64 k3", (8, 64, 56, 56, 64, 3), dict(padding=1), 1.0),
    ("dense 32x3x32x32->16 k3", (32, 3, 32, 32, 16, 3), dict(padding=1), 1.0),
    ("dense 4x128x28x28->128 k3", (4, 128, 28, 28, 128, 3), dict(padding=1), 1.0),
    ("stride 2 8x64x56x56->64 k3", (8, 64, 56, 56, 64, 3), dict(padding=1, stride=2), 2.0),
    ("dilation 2 8x64x56x56->64 k3", (8, 64, 56, 56, 64, 3), dict(padding=2, dilation=2), 2.0),
    ("depthwise 8x64x56x56 g64 k3", (8, 64, 56, 56, 64, 3), dict(padding=1, groups=64), 2.0),
]
MIB = 2 ** 20


def seconds(run) -> float:
    start = time.perf_counter()
    run()
    return time.perf_counter() - start


def paired_times(ours, theirs, repeat: int) -> tuple[float, float, float]:
    """Median time of each and median ratio of back-to-back pairs, after one warm-up each."""
    ours(), theirs()
    pairs = np.array([(seconds(ours), seconds(theirs)) for _ in range(repeat)])
    return (float(np.median(pairs[:, 0])), float(np.median(pairs[:, 1])),
            float(np.median(pairs[:, 0] / pairs[:, 1])))


def best_time(run, repeat: int) -> float:
    run()  # warm-up
    return min(seconds(run) for _ in range(repeat))


def openblas_call(suffix: str, *args, restype=ctypes.c_int):
    """Call ``*openblas_<suffix>`` in the OpenBLAS that numpy loaded (None if not found)."""
    folder = os.path.join(os.path.dirname(np.__file__), "..", "numpy.libs")
    for path in glob.glob(os.path.join(folder, "*openblas*")):
        lib = ctypes.CDLL(path)
        for symbol in (f"scipy_openblas_{suffix}64_", f"openblas_{suffix}"):
            if hasattr(lib, symbol):
                function = getattr(lib, symbol)
                function.restype = restype
                return function(*args)
    return None


def blas_kernel() -> str:
    """The OpenBLAS core that runs (what OPENBLAS_CORETYPE would force) and its thread count."""
    name = openblas_call("get_corename", restype=ctypes.c_char_p)
    return f"{name.decode() if name else 'unknown'}, {openblas_call('get_num_threads')} threads"


def matmul_rate(repeat: int) -> float:
    a = np.random.default_rng(0).standard_normal((2048, 2048))
    return 2 * 2048 ** 3 / best_time(lambda: a @ a, repeat) / 1e9


def arrays(shape, params, rng):
    n, c_in, h, w, c_out, k = shape
    x = rng.standard_normal((n, c_in, h, w))
    weight = rng.standard_normal((c_out, c_in // params.get("groups", 1), k, k))
    bias = rng.standard_normal(c_out)
    g = rng.standard_normal(ops.conv2d.output_shape(x, weight, bias, **params))
    return x, weight, bias, g


def refops_run(x, weight, bias, g, params):
    ops.conv2d(x, weight, bias, **params)
    return ops.conv2d.vjp(g, x, weight, bias, **params)


def torch_run(tensors, g, params):
    x, weight, bias = tensors
    for t in tensors:
        t.grad = None
    F.conv2d(x, weight, bias, **params).backward(g)


def traced_scratch(run) -> int:
    """Traced peak of ``run()`` minus the bytes of what it returns."""
    tracemalloc.start()
    result = run()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    kept = result.values() if isinstance(result, dict) else [result]
    return peak - sum(a.nbytes for a in kept)


def scratch_bytes(x, weight, bias, g, params) -> int:
    """Scratch of the forward and of the vjp (peak minus results), the larger of the two."""
    return max(traced_scratch(lambda: ops.conv2d(x, weight, bias, **params)),
               traced_scratch(lambda: ops.conv2d.vjp(g, x, weight, bias, **params)))


def flops(shape, params, g) -> float:
    """Multiply-adds of forward + input gradient + weight gradient, times 2."""
    n, c_in, _, _, c_out, k = shape
    return 3 * 2 * g.size * c_in // params.get("groups", 1) * k * k


def speed_table(repeat: int, cases) -> None:
    rate = matmul_rate(repeat)
    print(f"numpy float64 matmul (2048^2): {rate:.1f} GFLOP/s; BLAS kernel: {blas_kernel()}; "
          f"torch threads: {torch.get_num_threads()}; memory bound {ops.get_memory_limit() // MIB} MiB")
    print(f"{'case':32} {'refops s':>9} {'torch s':>9} {'ratio':>6} {'target':>6} {'GFLOP/s':>8} "
          f"{'of matmul':>9} {'scratch MiB':>11}")
    rng = np.random.default_rng(0)
    for name, shape, params, target in cases:
        x, weight, bias, g = arrays(shape, params, rng)
        tensors = [torch.tensor(a, requires_grad=True) for a in (x, weight, bias)]
        gt = torch.from_numpy(g)
        ours, theirs, ratio = paired_times(lambda: refops_run(x, weight, bias, g, params),
                                           lambda: torch_run(tensors, gt, params), repeat)
        gflops = flops(shape, params, g) / ours / 1e9
        scratch = scratch_bytes(x, weight, bias, g, params) / MIB
        verdict = "ok" if ratio <= target else "MISSED"
        print(f"{name:32} {ours:9.4f} {theirs:9.4f} {ratio:6.2f} {target:6.1f} {gflops:8.1f} "
              f"{gflops / rate:8.0%} {scratch:11.1f}  {verdict}")


def memory_table(repeat: int) -> None:
    print("\nbatch 256, 256x16x32x32->32 k3 (padding 1): scratch of forward + vjp under each bound")
    print(f"{'bound MiB':>9} {'scratch MiB':>11} {'within':>6} {'refops s':>9}")
    x, weight, bias, g = arrays((256, 16, 32, 32, 32, 3), dict(padding=1), np.random.default_rng(1))
    for bound in (256, 64, 16, 4):
        previous = ops.set_memory_limit(bound * MIB)
        try:
            scratch = scratch_bytes(x, weight, bias, g, dict(padding=1)) / MIB
            seconds = best_time(lambda: refops_run(x, weight, bias, g, dict(padding=1)), repeat)
        finally:
            ops.set_memory_limit(previous)
        print(f"{bound:9d} {scratch:11.1f} {'yes' if scratch <= bound else 'NO':>6} {seconds:9.3f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=9)
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--quick", action="store_true", help="the first two shapes only")
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    openblas_call("set_num_threads", args.threads, restype=None)
    speed_table(args.repeat, CASES[:2] if args.quick else CASES)
    memory_table(1 if args.quick else 3)


if __name__ == "__main__":
    main()
