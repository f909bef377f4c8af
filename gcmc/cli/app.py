"""The `gcmc` command line. Each sub-command lives in gcmc/cli/<name>.py with
``register(subparsers)``; errors in the user's input end with one line and exit code 2."""

from __future__ import annotations

import argparse
import importlib
import sys

from gcmc import __version__
from gcmc.errors import InputError

COMMANDS = ("point", "build", "show", "export", "check", "diff")
_MODULES = {
    "point": "point",
    "build": "build",
    "show": "kernel",
    "export": "kernel",
    "check": "check",
    "diff": "check",
}


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``gcmc`` command, with every subcommand registered."""
    parser = argparse.ArgumentParser(
        prog="gcmc",
        description=(
            "Grand canonical Monte Carlo kernels for porous-carbon characterisation: "
            "Lennard-Jones probes in graphitic slit pores (Steele 10-4-3 walls)."
        ),
        epilog="Run 'gcmc COMMAND --help' for the options of a command.",
    )
    parser.add_argument("--version", action="version", version=f"gcmc {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    registered = set()
    for name in COMMANDS:
        mod_name = _MODULES[name]
        if mod_name in registered:
            continue
        try:
            mod = importlib.import_module(f"gcmc.cli.{mod_name}")
        except ModuleNotFoundError as exc:
            if exc.name and exc.name == f"gcmc.cli.{mod_name}":
                continue
            raise
        mod.register(sub)
        registered.add(mod_name)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Run the ``gcmc`` command line; returns the exit code (2 for an input error)."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except InputError as exc:
        print(f"gcmc {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"gcmc {args.command}: interrupted", file=sys.stderr)
        return 130
