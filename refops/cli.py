"""The ``refops`` command line."""
from __future__ import annotations

import argparse
import inspect
import json
import os
import sys
import textwrap

from . import ops


def _list_ops(args: argparse.Namespace) -> int:
    chosen = args.names or ops.names()
    for name in chosen:
        try:
            op = ops.get(name)
        except ops.UnknownOpError as error:
            print(f"refops ops: {error}", file=sys.stderr)
            return 2
        params = ", ".join(f"{k}" if v is inspect.Parameter.empty else f"{k}={v!r}"
                           for k, v in op.defaults.items())
        arrays = ", ".join(f"{a}=None" if a in op.optional else a for a in op.arrays)
        print(f"{op.name}({arrays}{'; ' + params if params else ''})")
        for title in ("Formula", "Output shape", "Non-differentiable points"):
            text = op.doc_section(title)
            if text:
                print(f"  {title}:")
                print(textwrap.indent(text, "    "))
        print()
    return 0


def _pin(text: str) -> tuple[str, object]:
    """``NAME=VALUE``: VALUE as JSON, or a plain string when it is not JSON."""
    if "=" not in text:
        raise argparse.ArgumentTypeError(f"--set {text!r}: expected NAME=VALUE, e.g. --set kernel_size=3")
    name, value = text.split("=", 1)
    try:
        return name, json.loads(value)
    except json.JSONDecodeError:
        return name, value


class _Progress:
    """A progress bar on a terminal (rich), nothing otherwise."""

    def __init__(self, enabled: bool):
        self.bar = None
        if enabled and sys.stderr.isatty():
            from rich.progress import Progress
            self.bar = Progress(transient=True)
            self.task = self.bar.add_task("cases", total=None)
            self.bar.start()

    def __call__(self, done: int, total: int) -> None:
        if self.bar:
            self.bar.update(self.task, completed=done, total=total)

    def close(self) -> None:
        if self.bar:
            self.bar.stop()


def _shard(text: str) -> tuple[int, int]:
    """``I/N`` (1-based I) -> ``(I - 1, N)``."""
    try:
        part, parts = (int(v) for v in text.split("/"))
    except ValueError:
        raise argparse.ArgumentTypeError(f"--shard {text!r}: expected I/N, e.g. 2/4") from None
    if not 1 <= part <= parts:
        raise argparse.ArgumentTypeError(f"--shard {text!r}: needs 1 <= I <= N")
    return part - 1, parts


def _jobs(text: str) -> int:
    if not text.isdigit() or int(text) < 1:
        raise argparse.ArgumentTypeError(f"--jobs {text!r}: expected a whole number >= 1, e.g. --jobs 2")
    return int(text)


def _merge(args: argparse.Namespace) -> int:
    """Merge JSON reports of shards into one."""
    reports = []
    for path in args.reports:
        try:
            with open(path, encoding="utf-8") as stream:
                reports.append(json.load(stream))
        except (OSError, json.JSONDecodeError) as error:
            print(f"refops merge: {path}: {error}", file=sys.stderr)
            return 2
    merged = {**reports[0], "cases": sum(r["cases"] for r in reports),
              "failures": [f for r in reports for f in r["failures"]],
              "deviations": sorted({d for r in reports for d in r.get("deviations", [])}),
              "summary": {}}
    for r in reports:
        for status, count in r.get("summary", {}).items():
            merged["summary"][status] = merged["summary"].get(status, 0) + count
    merged["passed"] = all(r["passed"] for r in reports)
    with open(args.output, "w", encoding="utf-8") as stream:
        json.dump(merged, stream, indent=1)
    print(f"merged {len(reports)} reports: {merged['cases']} cases, "
          f"{'passed' if merged['passed'] else str(len(merged['failures'])) + ' failing'}")
    return 0 if merged["passed"] else 1


def _input_shapes(args: argparse.Namespace, command: str) -> dict[str, tuple[int, ...]] | None:
    """``--input-shape [NAME=]2,1,16,16`` (repeatable) by name (``input0``, ... when unnamed);
    None (after a message) when malformed."""
    shapes = {}
    for i, text in enumerate(args.input_shape):
        name, _, sizes = text.rpartition("=")
        try:
            shape = tuple(int(n) for n in sizes.split(","))
        except ValueError:
            shape = ()
        name = name or f"input{i}"
        if not shape or min(shape) < 1 or name in shapes:
            shapes = {}
            break
        shapes[name] = shape
    if not shapes:
        print(f"refops {command}: --input-shape {args.input_shape}: expected positive comma-separated sizes, "
              f"optionally named and each name once, e.g. --input-shape 2,1,16,16 or --input-shape "
              f"image=2,1,16,16", file=sys.stderr)
        return None
    return shapes


def _record(args: argparse.Namespace) -> int:
    from .harness.replay import record_layer, record_model
    from .harness.subject import TargetError
    from .ops._space import PinError
    if (args.op is None) == (not args.input_shape) or (args.op is None and args.set):
        print("refops record: give --op OP (a layer, cases drawn as by `refops check`) or --input-shape "
              "(a whole model), not both; --set only with --op", file=sys.stderr)
        return 2
    try:
        if args.op is not None:
            path = record_layer(args.target, args.op, args.output, cases=args.cases, seed=args.seed,
                                dtype=args.dtype, pins=dict(args.set))
        else:
            shapes = _input_shapes(args, "record")
            if shapes is None:
                return 2
            path = record_model(args.target, shapes, args.output, dtype=args.dtype, seed=args.seed)
    except (TargetError, ops.UnknownOpError, PinError, ValueError, RuntimeError) as error:
        print(f"refops record: {error}", file=sys.stderr)
        return 2
    print(f"bundle written to {path}")
    return 0


def _emit(report, args: argparse.Namespace) -> int:
    """Print the report, write the files asked for; the exit status of a finished check."""
    from .report.text import render_text
    print(render_text(report))
    if getattr(args, "json", None):
        with open(args.json, "w", encoding="utf-8") as stream:
            json.dump(report.to_json(), stream, indent=1)
    if getattr(args, "junit", None):
        from .report.junit import write_junit
        write_junit(report, args.junit)
    if getattr(args, "html", None):
        from .report.html import write_html
        print(f"HTML report written to {write_html(report, args.html)}")
    if getattr(args, "markdown", None):
        from .report.markdown import write_markdown
        write_markdown(report, args.markdown)
    return 0 if report.passed else 1


def _replay_bundle(args: argparse.Namespace) -> int:
    from .golden import BundleError
    from .harness.replay import replay
    from .harness.subject import TargetError
    try:
        report = replay(args.target, args.bundle, dtype=args.dtype, factor=args.factor)
    except (TargetError, BundleError, ValueError) as error:
        print(f"refops replay: {error}", file=sys.stderr)
        return 2
    return _emit(report, args)


_OP_ONLY = {"--set": lambda a: bool(a.set), "--shard": lambda a: a.shard != (0, 1),
            "--jobs": lambda a: a.jobs != 1, "--layout": lambda a: a.layout != "contiguous",
            "--device": lambda a: a.device != "cpu", "--budget": lambda a: a.budget is not None,
            "--dtype": lambda a: a.dtype not in (None, "float64")}


def _check_mode_error(args: argparse.Namespace) -> str:
    """Why this combination of options cannot run ("" when it can)."""
    if args.op is None and not args.input_shape:
        return ("give --op OP (an oracle; `refops ops` lists them) or, for an operator without one, "
                "--input-shape (its backward is checked against finite differences of its own forward)")
    if args.op is not None and args.input_shape:
        return "--input-shape is for a check without --op; with --op every case draws its own shapes"
    given = [option for option, used in _OP_ONLY.items() if args.op is None and used(args)]
    if given:
        return (f"{', '.join(given)}: only with --op; a check without --op runs the subject in float64 "
                f"on the given input shapes")
    return ""


def _check(args: argparse.Namespace) -> int:
    from .harness import check_layer
    from .harness.selfcheck import check_self
    from .harness.subject import TargetError, load_factory
    from .ops._space import PinError
    problem = _check_mode_error(args)
    if problem:
        print(f"refops check: {problem}", file=sys.stderr)
        return 2
    if args.device != "cpu":
        import torch
        if args.device.startswith("cuda") and not torch.cuda.is_available():
            print(f"refops check: --device {args.device}: no CUDA device is available here", file=sys.stderr)
            return 2
    shapes = _input_shapes(args, "check") if args.input_shape else None
    if args.input_shape and shapes is None:
        return 2
    try:
        if args.op is not None:
            ops.get(args.op)
        load_factory(args.target)
    except (ops.UnknownOpError, TargetError) as error:
        print(f"refops check: {error}", file=sys.stderr)
        return 2
    progress = _Progress(not args.quiet)
    case_ids = [args.case] if args.case else None
    try:
        if args.op is None:
            report = check_self(args.target, shapes, cases=10 if args.cases is None else args.cases, seed=args.seed, timeout=args.timeout,
                                case_ids=case_ids, progress=progress)
        else:
            report = check_layer(args.target, args.op, cases=50 if args.cases is None else args.cases, seed=args.seed,
                                 dtype=args.dtype or "float32", pins=dict(args.set), layout=args.layout,
                                 device=args.device, timeout=args.timeout, budget=args.budget,
                                 case_ids=case_ids, progress=progress, shard=args.shard, jobs=args.jobs)
    except (PinError, ValueError, RuntimeError) as error:
        print(f"refops check: {error}", file=sys.stderr)
        return 2
    finally:
        progress.close()
    return _emit(report, args)


DEMO_PINS = {"padding": "same", "stride": 1, "padding_mode": "zeros"}


def _demo(args: argparse.Namespace) -> int:
    """Check the demo port's correct and slipped convolutions; the slip must be caught."""
    from pathlib import Path
    from .harness import check_layer
    from .report.html import write_html
    from .report.text import render_text
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    print("Demo: a team ports its residual denoiser for greyscale microscope tiles to a new accelerator.\n"
          "Its hand-written convolution (forward and backward) is checked in the configurations the\n"
          "denoiser uses (padding='same', stride 1, zero padding) against refops's float64 oracle.\n")
    verdicts = {}
    for name in ("tile_conv", "tile_conv_slipped"):
        progress = _Progress(not args.quiet)
        try:
            report = check_layer(f"refops.examples.denoiser:{name}", "conv2d", cases=args.cases, seed=0,
                                 pins=DEMO_PINS, progress=progress)
        finally:
            progress.close()
        print(f"=== refops.examples.denoiser:{name}")
        print(render_text(report, max_cases=2))
        path = write_html(report, out / f"{name}.html")
        print(f"HTML report written to {path}\n")
        verdicts[name] = report.passed
    caught = verdicts["tile_conv"] and not verdicts["tile_conv_slipped"]
    print("The correct layer passed and the slipped one was caught." if caught
          else "Unexpected: the demo did not separate the correct layer from the slipped one.")
    return 0 if caught else 1


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="refops", description=__doc__)
    commands = parser.add_subparsers(dest="command", required=True)
    listing = commands.add_parser("ops", help="list every oracle with its parameters, formula and output size")
    listing.add_argument("names", nargs="*", help="only these ops")
    listing.set_defaults(run=_list_ops)

    check = commands.add_parser("check", help="check a layer factory against an oracle over drawn cases")
    check.add_argument("target", help="package.module:attr or path/to/file.py:attr (a layer factory)")
    check.add_argument("--op", help="the oracle to compare with (refops ops lists them); without it, "
                                    "--input-shape checks the backward against the subject's own forward")
    check.add_argument("--input-shape", action="append", default=[], metavar="SIZES",
                       help="without --op: an input's shape, e.g. 2,3,8,8 or image=2,3,8,8 (repeatable, one "
                            "per input, in call order)")
    check.add_argument("--cases", type=int, help="number of drawn cases (default 50; 10 without --op)")
    check.add_argument("--seed", type=int, default=0)
    check.add_argument("--dtype", choices=["float64", "float32", "float16", "bfloat16"],
                       help="the subject's format (default float32; float64 without --op)")
    check.add_argument("--set", type=_pin, action="append", default=[], metavar="NAME=VALUE",
                       help="pin a configuration value (JSON, else a string); repeatable")
    check.add_argument("--case", help="replay one case by its id (SEED-INDEX, as printed)")
    check.add_argument("--layout", default="contiguous", choices=["contiguous", "channels_last", "strided"])
    check.add_argument("--device", default="cpu", help="cpu (default) or cuda")
    check.add_argument("--timeout", type=float, default=60.0, help="seconds one case may take (default 60)")
    check.add_argument("--budget", type=float, help="stop drawing new cases after this many seconds")
    check.add_argument("--json", metavar="PATH", help="write the report as JSON")
    check.add_argument("--junit", metavar="PATH", help="write JUnit XML")
    check.add_argument("--html", metavar="PATH", help="write a self-contained HTML report")
    check.add_argument("--markdown", metavar="PATH", help="write a Markdown summary")
    check.add_argument("--shard", type=_shard, default=(0, 1), metavar="I/N",
                       help="run the I-th of N deterministic shares of the cases (1-based)")
    check.add_argument("--jobs", type=_jobs, default=1, metavar="N",
                       help="worker processes at once, e.g. one per local core (default 1); the verdicts "
                            "do not depend on it")
    check.add_argument("--quiet", action="store_true", help="no progress bar")
    check.set_defaults(run=_check)

    merge = commands.add_parser("merge", help="merge JSON reports of shards into one")
    merge.add_argument("reports", nargs="+")
    merge.add_argument("-o", "--output", required=True)
    merge.set_defaults(run=_merge)

    record = commands.add_parser("record", help="record a trusted run of a layer or a model as a bundle")
    record.add_argument("target", help="a layer factory (with --op) or a factory called with no arguments "
                                       "that returns the model (with --input-shape)")
    record.add_argument("--op", help="record cases of this op's configuration space (references: its oracle)")
    record.add_argument("--cases", type=int, default=20, help="with --op: number of cases (default 20)")
    record.add_argument("--set", type=_pin, action="append", default=[], metavar="NAME=VALUE",
                        help="with --op: pin a configuration value, as for check")
    record.add_argument("--input-shape", action="append", default=[],
                        help="a model input's shape, e.g. 2,1,16,16 or tiles=2,1,16,16 (repeatable, "
                             "in call order; the name labels its arrays)")
    record.add_argument("-o", "--output", required=True, help="bundle folder (must not exist or be empty)")
    record.add_argument("--dtype", default="float32", choices=["float64", "float32", "float16", "bfloat16"])
    record.add_argument("--seed", type=int, default=0)
    record.set_defaults(run=_record)

    replay = commands.add_parser("replay", help="run a model on a recorded bundle and compare")
    replay.add_argument("target")
    replay.add_argument("bundle")
    replay.add_argument("--dtype", help="default: the recorded format")
    replay.add_argument("--factor", type=float, default=4.0, help="headroom over the trusted run's error")
    replay.add_argument("--json", metavar="PATH")
    replay.set_defaults(run=_replay_bundle)

    demo = commands.add_parser("demo", help="watch refops catch a padding slip in a hand-written convolution")
    demo.add_argument("--out", default="refops-demo", help="folder for the HTML reports (default refops-demo)")
    demo.add_argument("--cases", type=int, default=30)
    demo.add_argument("--quiet", action="store_true")
    demo.set_defaults(run=_demo)
    return parser


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return args.run(args)
    except BrokenPipeError:  # the reader went away (``refops check ... | head``): stop quietly
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1


if __name__ == "__main__":
    sys.exit(main())
