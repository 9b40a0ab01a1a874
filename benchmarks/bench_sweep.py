"""Sweep throughput of ``check_layer`` on small conv2d cases with a float32 subject, and where a
case's time goes, measured in the same run.

    python benchmarks/bench_sweep.py [--cases N] [--repeat R] [--threads T] [--quick] [--profile]

Subjects: torch's ``nn.Conv2d`` (:func:`torch_conv2d` below) and the hand-written
``refops.examples.denoiser:tile_conv``, each in this process (a factory callable) and in worker
processes (a TARGET string) with jobs=1 and jobs=2. Cases are drawn from the whole conv2d space
(no pins, no shrinking); repeat r sweeps seed r in every mode, the modes run round-robin, and
every figure is the median over the repeats.

A case's time is split by wrapping harness functions here (refops itself is unchanged):
``oracle`` is the harness's oracle step (``runner.oracle_results`` and ``runner.allowed_errors``:
forward + vjp + error terms + allowed bound), ``subject`` the ``seconds`` that
``run_subject`` reports per case, and ``overhead`` the rest of the wall time (drawing and
rounding, ``compare``, the rest of judging, worker messaging and pickling). The fixed costs of a
worker (its start, its first case, which pays torch's first calls, and its stop) are measured
apart and left out of cases/s and of the shares. With jobs=2 the parts overlap (the parent judges
while the workers run), so only cases/s and the speedup over jobs=1 are printed.
Target: overhead below 30% of a case.
"""
from __future__ import annotations

import argparse
import cProfile
import pstats
import statistics
import time
from pathlib import Path

import torch

from refops.examples.denoiser import tile_conv
from refops.harness import check_layer, runner, worker

TARGET = 0.30
TILE_CONV = "refops.examples.denoiser:tile_conv"


def torch_conv2d(**layer) -> torch.nn.Module:
    """The subject factory: torch's own layer for the drawn configuration."""
    return torch.nn.Conv2d(**layer)


ORACLE = ("oracle_results", "allowed_errors")  # the oracle's part of judging
TORCH_TARGET = f"{Path(__file__).resolve()}:torch_conv2d"
# label, target, jobs
MODES = [("nn.Conv2d  in-process", torch_conv2d, 1),
         ("nn.Conv2d  worker", TORCH_TARGET, 1),
         ("nn.Conv2d  worker", TORCH_TARGET, 2),
         ("tile_conv  in-process", tile_conv, 1),
         ("tile_conv  worker", TILE_CONV, 1),
         ("tile_conv  worker", TILE_CONV, 2)]


class Timers:
    """Wraps harness functions for the length of one sweep and adds up their seconds."""

    def __init__(self):
        self.seconds = dict(oracle=0.0, subject=0.0, draw=0.0, compare=0.0, judge=0.0, first=0.0)
        self.fixed: list[tuple[float, float]] = []  # (began, ended) of worker starts and stops
        self.saved: list[tuple[object, str, object]] = []
        self.fresh: dict[int, tuple[float, float]] = {}  # started workers yet to run a case

    def _wrap(self, owner, name: str, wrapper) -> None:
        """Replace ``owner.name`` by ``wrapper(original)`` until the sweep ends."""
        original = getattr(owner, name)
        self.saved.append((owner, name, original))
        setattr(owner, name, wrapper(original))

    def __enter__(self) -> "Timers":
        for name, key in [(name, "oracle") for name in ORACLE] + [
                ("draw_case", "draw"), ("compare", "compare"), ("judge", "judge")]:
            self._wrap(runner, name, lambda original, key=key: self._timed(original, key))
        self._wrap(runner, "judge", self._noting_subject)
        self._wrap(worker.Worker, "_start", self._noting_start)
        self._wrap(worker.Worker, "_run_until_fault", self._noting_first_case)
        self._wrap(worker.Worker, "close", self._noting_stop)
        return self

    def __exit__(self, *exc) -> None:
        for owner, name, original in reversed(self.saved):
            setattr(owner, name, original)

    def _timed(self, original, key: str):
        def timed(*args, **kwargs):
            began = time.perf_counter()
            try:
                return original(*args, **kwargs)
            finally:
                self.seconds[key] += time.perf_counter() - began
        return timed

    def _noting_subject(self, judge):
        def noted(op, case, result, *args, **kwargs):
            self.seconds["subject"] += result.get("seconds", 0.0)
            return judge(op, case, result, *args, **kwargs)
        return noted

    def _noting_start(self, start):
        def noted(process):
            began = time.perf_counter()
            start(process)
            self.fresh[id(process)] = (began, time.perf_counter())
        return noted

    def _noting_first_case(self, run):
        def noted(process, jobs):
            results = run(process, jobs)
            if id(process) in self.fresh and results:  # the first case pays torch's first calls
                began, ended = self.fresh.pop(id(process))
                first = results[0].get("seconds", 0.0) if isinstance(results[0], dict) else 0.0  # judges: tuples
                self.seconds["first"] += first
                self.fixed.append((began, ended + first))
            return results
        return noted

    def _noting_stop(self, close):
        def noted(process):
            began = time.perf_counter()
            close(process)
            self.fixed.append((began, time.perf_counter()))
        return noted

    def fixed_seconds(self) -> float:
        """Seconds during which some worker was starting or stopping (overlaps counted once)."""
        total, reached = 0.0, float("-inf")
        for began, ended in sorted(self.fixed):
            total += max(0.0, ended - max(began, reached))
            reached = max(reached, ended)
        return total


def sweep(target, jobs: int, cases: int, seed: int) -> dict:
    """One sweep: cases/s and shares of the wall time, both without the fixed costs of workers."""
    with Timers() as timers:
        began = time.perf_counter()
        report = check_layer(target, "conv2d", cases=cases, seed=seed, dtype="float32", shrink=0,
                             jobs=jobs)
        wall = time.perf_counter() - began
    if len(report.cases) != cases or not report.passed:
        raise RuntimeError(f"{target}: expected {cases} passing cases, got "
                           f"{[c.status for c in report.cases if not c.passed][:3] or len(report.cases)}")
    fixed, seconds = timers.fixed_seconds(), dict(timers.seconds)
    wall -= fixed
    seconds["subject"] -= seconds["first"]
    seconds["judge rest"] = seconds["judge"] - seconds["oracle"] - seconds["compare"]
    shares = {key: seconds[key] / wall for key in ("oracle", "subject", "draw", "compare", "judge rest")}
    shares["overhead"] = 1.0 - shares["oracle"] - shares["subject"]
    shares["other"] = shares["overhead"] - shares["draw"] - shares["compare"] - shares["judge rest"]
    return dict(shares, rate=cases / wall, fixed=fixed)


def table(results: list[list[dict]]) -> None:
    """Medians over the repeats, one row per mode."""
    print(f"{'subject':22} {'jobs':>4} {'cases/s':>8} {'speedup':>7} {'fixed s':>7} {'oracle':>7} "
          f"{'subject':>7} {'overhead':>8} {'(draw':>6} {'compare':>7} {'judge':>6} {'other)':>6}")
    serial = {}
    for (label, _, jobs), runs in zip(MODES, results):
        m = {key: statistics.median(run[key] for run in runs) for key in runs[0]}
        fixed = f"{m['fixed']:7.2f}" if m["fixed"] else f"{'-':>7}"
        if jobs > 1:
            print(f"{label:22} {jobs:4d} {m['rate']:8.1f} {m['rate'] / serial[label]:7.2f} {fixed}")
            continue
        serial[label] = m["rate"]
        verdict = "met" if m["overhead"] < TARGET else "MISSED"
        print(f"{label:22} {jobs:4d} {m['rate']:8.1f} {'':>7} {fixed} " + " ".join(
            f"{m[key]:{width}.0%}" for key, width in (("oracle", 7), ("subject", 7), ("overhead", 8),
                                                       ("draw", 6), ("compare", 7), ("judge rest", 6),
                                                       ("other", 6)))
              + f"  overhead < {TARGET:.0%}: {verdict}")


def profile(cases: int, top: int = 30) -> None:
    """cProfile of one in-process nn.Conv2d sweep: refops functions by cumulative time."""
    profiler = cProfile.Profile()
    profiler.runcall(check_layer, torch_conv2d, "conv2d", cases=cases, seed=0, shrink=0)
    print(f"\ncProfile, nn.Conv2d in-process, {cases} cases (profiling inflates Python-level calls):")
    pstats.Stats(profiler).sort_stats("cumulative").print_stats("refops", top)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cases", type=int, default=64)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--threads", type=int, default=1, help="torch threads here (workers use 1)")
    parser.add_argument("--quick", action="store_true", help="16 cases, one repeat")
    parser.add_argument("--profile", action="store_true", help="also profile one in-process sweep")
    args = parser.parse_args()
    cases, repeat = (16, 1) if args.quick else (args.cases, args.repeat)
    torch.set_num_threads(args.threads)
    for target in (torch_conv2d, tile_conv):  # warm-up: first-call costs of torch and numpy
        check_layer(target, "conv2d", cases=8, seed=repeat, shrink=0)
    print(f"conv2d float32, {cases} cases per sweep (seed r in repeat r), median of {repeat}; "
          f"torch threads here: {torch.get_num_threads()}")
    results = [[] for _ in MODES]
    for seed in range(repeat):
        for runs, (_, target, jobs) in zip(results, MODES):
            runs.append(sweep(target, jobs, cases, seed))
    table(results)
    if args.profile:
        profile(cases)


if __name__ == "__main__":
    main()
