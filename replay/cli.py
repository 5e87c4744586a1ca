"""The ``rangefuse`` command.

Each subcommand lives in its own module that exposes ``register(subparsers)``; the
module adds its parser and sets ``func`` to a callable taking the parsed arguments and
returning an exit code. User errors (`fusion.errors.RangefuseError`) print as one line
and exit 2; ``--debug`` shows the traceback.

Every command's outputs are checked before it runs and are put in place together when
it ends (`replay._io.command_outputs`): by convention ``-o`` names the file a command
writes and ``--plot`` a figure; a module whose outputs follow otherwise from its
arguments defines ``outputs(args)`` returning `replay._io.Output` items. Every other
argument that names an existing file is an input, which no output may overwrite.
Ctrl-C and SIGTERM stop a command the same way, keeping no output.
"""
from __future__ import annotations

import argparse
import contextlib
import importlib
import math
import os
import signal
import sys
import textwrap

from fusion import __version__
from fusion.errors import InputError, RangefuseError

from . import _io

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


# Count options checked here, whatever command has them: option -> least value. (The
# commands check their other numbers themselves.)
WHOLE_NUMBER_AT_LEAST = {"--max-evals": 1}


class _Formatter(argparse.RawDescriptionHelpFormatter):
    pass


class _Parser(argparse.ArgumentParser):
    """A command-line mistake is one line, like every other input error: what is wrong
    and where to read the options, exit status 2 (argparse prints the usage as well)."""

    def error(self, message):
        self.exit(2, f"{self.prog}: error: {message} (see `{self.prog} --help`)\n")


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised where the command is so that it stops as Ctrl-C stops it."""


@contextlib.contextmanager
def _signals_as_interrupts():
    """Ctrl-C and SIGTERM stop the command as KeyboardInterrupt (`Terminated` for
    SIGTERM), and each is also noted with `replay._io.note_interrupt`: an interrupt that
    lands inside a callback from compiled code is swallowed there ("Exception ignored
    ..."), and the note still keeps the command from putting its outputs in place."""
    def handler(signum, frame):
        _io.note_interrupt(signum)
        if _io.committing():
            return  # raised once the outputs are all in place, not between two of them
        raise Terminated() if signum == signal.SIGTERM else KeyboardInterrupt()

    old = {}
    try:
        for sig in (signal.SIGINT, signal.SIGTERM):
            old[sig] = signal.signal(sig, handler)
    except (ValueError, OSError, AttributeError):  # not the main thread: leave them be
        for sig, h in old.items():
            signal.signal(sig, h)
        yield
        return
    try:
        yield
    finally:
        for sig, h in old.items():
            signal.signal(sig, h)


class _Stdout:
    """sys.stdout while a command runs: when the reader leaves (a broken pipe, e.g.
    piped into head), the rest of the text is dropped and the command goes on to its
    end, so that its outputs are still put in place, all of them."""

    def __init__(self, stream):
        self._stream = stream
        self.left = False

    def write(self, text):
        if not self.left:
            try:
                return self._stream.write(text)
            except BrokenPipeError:
                self.left = True
        return len(text)

    def flush(self):
        if not self.left:
            try:
                self._stream.flush()
            except BrokenPipeError:
                self.left = True

    def __getattr__(self, name):
        return getattr(self._stream, name)


@contextlib.contextmanager
def _reader_may_leave():
    real = sys.stdout
    proxy = sys.stdout = _Stdout(real)
    try:
        yield
        proxy.flush()
    finally:
        sys.stdout = real
        if proxy.left:  # nothing more reaches the reader, nor at exit
            try:
                sys.stdout = open(os.devnull, "w")
            except OSError:
                pass


def _option_name(action) -> str:
    for s in ("-o", "--plot"):
        if s in action.option_strings:
            return s
    return max(action.option_strings, key=len) if action.option_strings else action.dest


def _option_of_argument(command_parser, args, field):
    """The option of `command_parser` whose value is the library argument `field`, when
    the command line gave it (a value the library chose itself is not the option's
    fault), or None."""
    if not isinstance(field, str) or field.startswith("-"):
        return None
    for a in command_parser._actions:
        if a.dest == field and a.option_strings and getattr(args, a.dest, None) != a.default:
            return _option_name(a)
    return None


def _outputs_and_inputs(command_parser, args):
    """The outputs the command will write and the files it reads, from its arguments."""
    actions = [a for a in command_parser._actions if a.dest not in ("help", "version")]
    out_dests = {a.dest for a in actions
                 if {"-o", "--out", "--output", "--plot"} & set(a.option_strings)}
    declared = getattr(args, "_outputs", None)
    if declared is not None:
        outputs = list(declared(args))
    else:
        outputs = []
        for a in actions:
            value = getattr(args, a.dest, None)
            if a.dest in out_dests and isinstance(value, str):
                outputs.append(_io.Output(value, "-o") if "-o" in a.option_strings else
                               _io.Output(value, "--plot", _io.FIGURE_SUFFIXES))
    inputs = []
    for a in actions:
        if a.dest in out_dests:
            continue
        value = getattr(args, a.dest, None)
        for v in value if isinstance(value, (list, tuple)) else [value]:
            if isinstance(v, str) and os.path.isfile(v):
                inputs.append(v)
    return outputs, inputs


def _check_numbers(command_parser, args):
    for a in command_parser._actions:
        value = getattr(args, a.dest, None)
        if value is None or not a.option_strings:
            continue
        least = next((WHOLE_NUMBER_AT_LEAST[s] for s in a.option_strings
                      if s in WHOLE_NUMBER_AT_LEAST), None)
        if least is not None and not (isinstance(value, int) and value >= least):
            raise InputError(f"expected a whole number >= {least}, got {value}",
                             field=_option_name(a))
        if a.type is float and isinstance(value, float) and not math.isfinite(value):
            raise InputError(f"expected a finite number, got {value}", field=_option_name(a))


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="rangefuse", allow_abbrev=False,
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
        before = set(sub.choices)
        mod.register(sub)
        if hasattr(mod, "outputs"):
            for name in set(sub.choices) - before:
                sub.choices[name].set_defaults(_outputs=mod.outputs)
    parser.command_parsers = dict(sub.choices)
    for p in sub.choices.values():
        # an option is spelt out: a shortened one (--smoo) could mean another tomorrow
        p.allow_abbrev = False
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
    args, extra = parser.parse_known_args([a for a in argv if a != "--debug"])
    if extra:
        # said by the command's own parser, so its usage line is the one shown
        (parser.command_parsers.get(getattr(args, "command", None)) or parser).error(
            f"unrecognized arguments: {' '.join(extra)}")
    args.debug = debug
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    command_parser = parser.command_parsers[args.command]
    try:
        with _signals_as_interrupts(), _reader_may_leave(), _io.command_outputs():
            # every number and every output is checked before any work
            _check_numbers(command_parser, args)
            _io.check_outputs(*_outputs_and_inputs(command_parser, args))
            code = int(args.func(args) or 0)
        return code
    except RangefuseError as exc:
        if args.debug:
            raise
        # a library argument that this command takes as an option is named as the option
        # (max_points -> --max-points), so the line says what to change on the command line
        option = _option_of_argument(command_parser, args, exc.field)
        if option:
            exc.field = option
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
    except KeyboardInterrupt as exc:  # Ctrl-C, or SIGTERM (Terminated)
        term = isinstance(exc, Terminated) or _io.last_interrupt() == signal.SIGTERM
        what, code = ("terminated", 128 + signal.SIGTERM) if term else ("interrupted", 130)
        kept = "after its outputs were written" if _io.outputs_committed() else \
            "no partial output was kept"
        print(f"rangefuse {args.command}: {what}; {kept}", file=sys.stderr)
        return code


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
