"""The ``rangefuse`` command.

Each subcommand lives in its own module that exposes ``register(subparsers)``; the
module adds its parser and sets ``func`` to a callable taking the parsed arguments and
returning an exit code. User errors (`fusion.errors.RangefuseError`) print as one line
and exit 2; ``--debug`` shows the traceback.
"""
from __future__ import annotations

import argparse
import importlib
import os
import sys
import textwrap

from fusion import __version__
from fusion.errors import RangefuseError

SAFETY = ("Fused ranges are not a safety-rated protective function: do not rely on them to "
          "protect people; follow local codes, standards and licensed practice.")

# (module, subcommand) in the order --help lists them.
COMMANDS = [
    ("replay.demo", "demo"),
    ("replay.simulate", "simulate"),
    ("replay.csvimport", "import"),
    ("replay.check", "check"),
    ("replay.calibrate", "calibrate"),
    ("replay.run", "replay"),
    ("replay.tune", "tune"),
    ("replay.plots", "plot"),
    ("replay.schedule", "schedule"),
]


class _Formatter(argparse.RawDescriptionHelpFormatter):
    pass


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="rangefuse",
        description=("Fuse IR triangulation rangers and ultrasonic echo rangers into one range "
                     "with an honest uncertainty; replay, tune and plot logged runs."),
        epilog="examples:\n  rangefuse demo --out demo-out\n"
               "  rangefuse replay datasets/shelf-pass.h5 -o pass.track.h5 --smooth\n"
               "  rangefuse COMMAND --help     (each command's options and an example)\n\n"
               + SAFETY, formatter_class=_Formatter)
    parser.add_argument("--version", action="version", version=f"rangefuse {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks for errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for modname, _ in COMMANDS:
        try:
            mod = importlib.import_module(modname)
        except ModuleNotFoundError as exc:  # a command still being written
            if exc.name != modname:
                raise
            continue
        mod.register(sub)
    for p in sub.choices.values():  # every command's --help carries the caution
        if "safety-rated" not in (p.epilog or ""):
            raw = issubclass(p.formatter_class, argparse.RawDescriptionHelpFormatter)
            caution = textwrap.fill(SAFETY, 88) if raw else SAFETY
            p.epilog = ((p.epilog + "\n\n") if p.epilog else "") + caution
    return parser


def main(argv=None) -> int:
    parser = build_parser()
    argv = list(sys.argv[1:] if argv is None else argv)
    # --debug is accepted anywhere on the line, before or after the command
    debug = "--debug" in argv
    args = parser.parse_args([a for a in argv if a != "--debug"])
    args.debug = debug
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except RangefuseError as exc:
        if args.debug:
            raise
        print(f"rangefuse {args.command}: error: {exc.one_line()}", file=sys.stderr)
        return 2
    except BrokenPipeError:  # e.g. piped into head: the reader left, nothing is wrong
        try:
            sys.stdout = open(os.devnull, "w")
        except OSError:
            pass
        return 0
    except OSError as exc:  # disk full, quota, an unreadable file: one line, not a traceback
        if args.debug:
            raise
        where = f"{exc.filename}: " if getattr(exc, "filename", None) else ""
        print(f"rangefuse {args.command}: error: {where}{exc.strerror or exc}; no partial "
              "output was kept", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"rangefuse {args.command}: interrupted; no partial output was kept", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
