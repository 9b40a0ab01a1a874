"""The ``refops`` command line."""
from __future__ import annotations

import argparse
import inspect
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


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="refops", description=__doc__)
    commands = parser.add_subparsers(dest="command", required=True)
    listing = commands.add_parser("ops", help="list every oracle with its parameters, formula and output size")
    listing.add_argument("names", nargs="*", help="only these ops")
    listing.set_defaults(run=_list_ops)
    return parser


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    return args.run(args)


if __name__ == "__main__":
    sys.exit(main())
