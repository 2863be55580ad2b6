"""The ``fanmap`` command: a thin shell over the Python API.

Each sub-command lives in its own module under :mod:`fanmap.commands` and
provides ``register(subparsers)``, which adds its parser and sets
``run=callable(args) -> int``.
"""

import argparse
import importlib
import sys

from . import __version__
from .errors import FanmapError

#: Sub-command modules, in the order ``fanmap --help`` lists them.
COMMANDS = ("simulate", "show", "fit", "gates", "check", "batch")


def build_parser():
    parser = argparse.ArgumentParser(
        prog="fanmap",
        description="Calibrate gated quantum Hall devices from Landau fans and gate maps. "
                    "fanmap analyses data; it drives no instrument.",
    )
    parser.add_argument("--version", action="version", version=f"fanmap {__version__}")
    subparsers = parser.add_subparsers(title="commands", metavar="COMMAND")
    for name in COMMANDS:
        importlib.import_module(f"fanmap.commands.{name}").register(subparsers)
    return parser


def main(argv=None):
    parser = build_parser()
    args = parser.parse_args(argv)
    if not hasattr(args, "run"):
        parser.print_help()
        return 2
    try:
        return int(args.run(args) or 0)
    except FanmapError as exc:
        print(f"fanmap: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("fanmap: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
