"""``fanmap show MAP``: print what was read from a map file and every guess made."""

import json

from ..prepare import prepare_map
from ..reading import describe_map
from ._options import add_reading_options, open_from_args


def register(subparsers):
    parser = subparsers.add_parser(
        "show", help="show what fanmap reads from a map file",
        description="Read a map file and print its axes, signals and everything fanmap "
                    "recognised (each guess can be overridden by the reading options).")
    parser.add_argument("map", metavar="MAP", help="netCDF, CSV/TSV/text or npz file")
    parser.add_argument("--prepare", action="store_true",
                        help="also run the preparation steps and print their notes")
    add_reading_options(parser)
    parser.set_defaults(run=run)
    return parser


def run(args):
    ds = open_from_args(args)
    print(describe_map(ds))
    if args.prepare:
        _, notes = prepare_map(ds)
        print("prepared:")
        for step, note in notes.items():
            print(f"  {step}: {json.dumps(note, default=str)}")
    return 0
