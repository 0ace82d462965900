"""The ``jointfmu`` command line.

Each subcommand is a pair of functions, ``_args_<name>(parser)`` to declare its arguments and
``_cmd_<name>(args) -> int`` to run it, registered in :data:`_COMMANDS`.  To add one, write the pair
and add one line to the table.  Only the public API of the package is used here.
"""
from __future__ import annotations

import argparse
import sys
from typing import Callable, Sequence

from . import __version__
from .errors import JointFmuError
from .params import check_parameter_file, load_parameter_set

__all__ = ["main"]


# --- check -------------------------------------------------------------------------------------
def _args_check(p: argparse.ArgumentParser) -> None:
    p.add_argument("files", nargs="+", metavar="FILE", help="parameter file(s) (jointfmu-params/1 TOML)")


def _cmd_check(args: argparse.Namespace) -> int:
    """Check parameter files; exit 1 if any is invalid."""
    bad = 0
    for path in args.files:
        problems = check_parameter_file(path)
        if problems:
            bad += 1
            n = len(problems)
            print(f"FAIL {path}: {n} problem{'s' if n != 1 else ''}")
            for prob in problems:
                print(f"  {prob}")
            continue
        ps = load_parameter_set(path)
        print(f"OK  {path}: {ps.set_id}, {ps.n_modes} modes, {len(ps.points)} points, "
              f"hash {ps.short_hash()}")
    return 1 if bad else 0


# --- the table -------------------------------------------------------------------------------------
#: name -> (declare arguments, run, one-line help)
_COMMANDS: dict[str, tuple[Callable[[argparse.ArgumentParser], None],
                           Callable[[argparse.Namespace], int], str]] = {
    "check": (_args_check, _cmd_check, "check parameter files and print their content hash"),
}


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="jointfmu",
        description="Modal Iwan models of bolted structures as FMI 2.0 co-simulation FMUs. "
                    "A fitted model is no substitute for qualification testing.")
    parser.add_argument("--version", action="version", version=f"jointfmu {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (declare, run, help_text) in _COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        declare(p)
        p.set_defaults(_run=run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit code (0 ok, 1 failure, 2 usage error)."""
    parser = _parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as e:  # argparse: usage error (2) or --help/--version (0)
        return e.code if isinstance(e.code, int) else (0 if e.code is None else 2)
    if getattr(args, "_run", None) is None:
        parser.print_usage(sys.stderr)
        print("jointfmu: error: a command is required", file=sys.stderr)
        return 2
    try:
        return int(args._run(args))
    except JointFmuError as e:
        print(f"jointfmu: error: {e}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("jointfmu: interrupted", file=sys.stderr)
        return 130
