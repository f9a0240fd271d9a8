"""Command-line entry point: a thin layer over the Python API."""

from __future__ import annotations

import argparse
import sys

from filmmap import __version__


def build_parser():
    parser = argparse.ArgumentParser(
        prog="filmmap",
        description="Oxide thickness maps, lot uniformity and next-run advice from optical spectra.")
    parser.add_argument("--version", action="version", version=f"filmmap {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    demo = sub.add_parser("demo", help="generate the invented demo lot and reduce it")
    demo.add_argument("-o", "--output", default="filmmap-demo", help="output folder")
    return parser


def main(argv=None):
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    if args.command == "demo":
        print("filmmap demo: not built yet - the demo lot arrives with the 'reduce' capability.")
        return 0
    return 0


if __name__ == "__main__":
    sys.exit(main())
