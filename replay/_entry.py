"""The `rangefuse` command's entry point: quiet on Ctrl-C or SIGTERM while starting.

Importing the command's modules (numpy, scipy, h5py, matplotlib, the compiled kernels)
takes most of a second; an interrupt then would print a traceback of the import
machinery. Until `replay.cli.main` installs its own handling, an interrupt ends the
command with one line (nothing has been written yet).
"""
import signal
import sys


def _starting(signum, frame):
    what, code = ("terminated", 128 + signal.SIGTERM) if signum == signal.SIGTERM else \
        ("interrupted", 130)
    sys.stderr.write(f"rangefuse: {what} while starting; nothing was written\n")
    raise SystemExit(code)


def main():
    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, _starting)
    from replay.cli import main as command
    code = command()
    for sig in (signal.SIGINT, signal.SIGTERM):
        # done: its outputs are in place and its lines printed; an interrupt while the
        # interpreter shuts down would only turn a finished run into a failed one
        signal.signal(sig, signal.SIG_IGN)
    return code
