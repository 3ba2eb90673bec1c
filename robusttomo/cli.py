"""Command line ``robusttomo``: one subcommand per step of the loop."""

from __future__ import annotations

import argparse
import sys

from robusttomo._version import __version__


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="robusttomo",
        description="SPAM-robust error-channel reconstruction from random Clifford sequences.",
    )
    p.add_argument("--version", action="version", version=f"robusttomo {__version__}")
    p.add_subparsers(dest="command", metavar="COMMAND")
    return p


def main(argv: list[str] | None = None) -> int:
    """Entry point; returns the exit status."""
    parser = _parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    return 0


if __name__ == "__main__":
    sys.exit(main())
