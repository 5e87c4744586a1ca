"""Output files are written atomically and never over an input.

A command (`replay.cli.main`) runs inside `command_outputs`: every output it names is
checked before any work (`check_outputs`), each file it writes goes to a hidden
temporary file beside its target (`atomic_output`), and only when the command ends
without an error or interrupt are they all renamed into place together. On any error,
Ctrl-C or SIGTERM every temporary file is removed, so a command's outputs appear all
together or not at all. Outside a command (the library) each `atomic_output` renames its
own file when its block ends.
"""
from __future__ import annotations

import contextlib
import os
import signal
import tempfile
from typing import NamedTuple

from fusion.errors import InputError

__all__ = ["atomic_output", "write_atomic", "same_file", "refuse_overwrite", "check_output",
           "check_outputs", "command_outputs", "make_folder", "staged", "Output",
           "note_interrupt", "last_interrupt", "outputs_committed", "committing",
           "FIGURE_SUFFIXES"]

# Figure formats matplotlib writes without extra packages.
FIGURE_SUFFIXES = (".png", ".pdf", ".svg", ".jpg", ".jpeg", ".tif", ".tiff", ".webp", ".eps",
                   ".ps")


class Output(NamedTuple):
    """One output a command will write, as its arguments name it."""

    path: str
    option: str                 # the option naming it, for messages (-o, --plot, --csv)
    suffixes: tuple | None = None  # the endings a format can be told from (figures)
    folder: bool = False        # a folder (made by the command) that holds other outputs


class _Plan:
    """The running command's outputs: which option names each, and the temporary files
    written so far that wait for the command to end."""

    def __init__(self):
        self.options = {}   # _key(path) -> option
        self.temps = {}     # temporary file -> its target, every one not yet renamed
        self.ready = {}     # _key(path) -> (temporary file, target), complete, in order
        self.folders = []   # folders made for the outputs (removed again on failure)

    def _remove_temps(self):
        for tmp in list(self.temps):
            with contextlib.suppress(OSError):
                os.remove(tmp)
        self.temps.clear()
        self.ready.clear()

    def discard(self):
        """Remove every temporary file and the folders made (those left empty)."""
        self._remove_temps()
        for folder in reversed(self.folders):
            with contextlib.suppress(OSError):
                os.rmdir(folder)

    def commit(self):
        """Rename every complete output into place, in one step that Ctrl-C or SIGTERM
        do not cut in two (they wait until it is done)."""
        global _committed, _committing
        _committing = True  # a handler that runs now only notes its signal (note_interrupt)
        try:
            with _signals_held():
                for tmp, path in list(self.ready.values()):
                    os.replace(tmp, path)
                    del self.temps[tmp]
                _committed = True  # before a held signal arrives: the outputs are in place
        finally:
            _committing = False
        if _interrupt is not None:
            # noted during the renames (taken by another thread, whose mask was not held):
            # raised now that every output is in place
            raise KeyboardInterrupt()
        self._remove_temps()  # none is left unless a caller swallowed a failed write


_plan: _Plan | None = None
_interrupt = None  # the signal noted by note_interrupt while a command runs
_committed = False  # whether the running (or last) command's outputs were put in place
_committing = False  # while the outputs are being renamed into place


def note_interrupt(signum) -> None:
    """Note that the running command was interrupted (signal number): it will keep none
    of its outputs, even if the KeyboardInterrupt raised for it was swallowed."""
    global _interrupt
    _interrupt = signum


def committing() -> bool:
    """Whether the running command is renaming its outputs into place: a signal handler
    then only notes the signal (`note_interrupt`), and `command_outputs` raises it when
    the renames are done (a signal mask holds the main thread only: numpy's worker
    threads may take the signal, and Python runs the handler in the main thread between
    two renames)."""
    return _committing


def last_interrupt():
    """The signal noted for the running (or last) command, or None."""
    return _interrupt


def outputs_committed() -> bool:
    """Whether the running (or last) command's outputs were all put in place (an
    interrupt held off during the renames arrives after them)."""
    return _committed


@contextlib.contextmanager
def _signals_held():
    held = {signal.SIGINT, signal.SIGTERM}
    try:
        old = signal.pthread_sigmask(signal.SIG_BLOCK, held)
    except (AttributeError, ValueError, OSError):  # no POSIX signal masks here
        yield
        return
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, old)


@contextlib.contextmanager
def command_outputs():
    """Run one command: its outputs are renamed into place together when the block ends
    normally, and none is kept if it ends by an exception (an error, Ctrl-C, SIGTERM)."""
    global _plan, _interrupt, _committed
    outer, plan = _plan, _Plan()
    _plan, _interrupt, _committed = plan, None, False
    try:
        yield plan
        if _interrupt is not None:
            # interrupted, though the KeyboardInterrupt was swallowed on its way (inside
            # a callback from compiled code): the command did not finish as asked
            raise KeyboardInterrupt()
    except BaseException:
        _plan = outer
        plan.discard()
        raise
    _plan = outer
    try:
        plan.commit()
    except BaseException:
        if not _committed:
            plan.discard()
        raise


def _key(path) -> str:
    """A path compared as the file it names (its folder resolved through links)."""
    path = os.path.abspath(os.fspath(path))
    head, tail = os.path.split(path)
    return os.path.join(os.path.realpath(head), tail)


def _option(path, field):
    """The name an error about output `path` gives: the caller's `field`, else the
    option that named it in the running command, else the library's argument ``out``."""
    if field is not None:
        return field
    if _plan is not None:
        return _plan.options.get(_key(path), "-o")
    return "out"


def staged(path) -> str:
    """Where to read an output that this command has written but not yet put in place
    (its temporary file); any other path is returned as it is."""
    if _plan is not None:
        hit = _plan.ready.get(_key(path))
        if hit is not None:
            return hit[0]
    return os.fspath(path)


def make_folder(path) -> None:
    """Make a folder for outputs (and its parents); removed again, if left empty, when
    the command fails."""
    path = os.path.abspath(os.fspath(path))
    missing = []
    p = path
    while not os.path.isdir(p) and os.path.dirname(p) != p:
        missing.append(p)
        p = os.path.dirname(p)
    os.makedirs(path, exist_ok=True)
    if _plan is not None:
        _plan.folders.extend(reversed(missing))


def same_file(a, b) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return os.path.abspath(os.fspath(a)) == os.path.abspath(os.fspath(b))


def refuse_overwrite(out, inputs, field=None):
    for src in inputs or ():
        if same_file(out, src):
            raise InputError(f"output {os.fspath(out)!r} is one of the inputs; choose another "
                             "path (inputs are never overwritten)", file=os.fspath(out),
                             field=_option(out, field))


def _check_folder(folder, path, field, will_be_made=False):
    """`folder` must be one we can create files in (or, `will_be_made`, one that an
    existing writable folder can hold)."""
    if not os.path.isdir(folder):
        p = folder
        while not os.path.lexists(p) and os.path.dirname(p) != p:
            p = os.path.dirname(p)
        if os.path.exists(p) and not os.path.isdir(p):
            raise InputError(f"{p!r} is a file, not a folder; expected a folder to write "
                             "into", file=path, field=field)
        if will_be_made and os.path.isdir(p):  # made with its parents
            return _check_folder(p, path, field)
        raise InputError(f"folder {folder!r} does not exist", file=path, field=field)
    if not os.access(folder, os.W_OK):
        raise InputError(f"folder {folder!r} cannot be written", file=path, field=field)
    try:  # some folders pass the permission test and still refuse files
        fd, probe = tempfile.mkstemp(prefix=".rangefuse-probe-", dir=folder)
    except OSError as exc:
        raise InputError(f"cannot create a file in folder {folder!r} ({exc.strerror})",
                         file=path, field=field) from None
    os.close(fd)
    os.remove(probe)


# bytes the temporary file's name adds to the output's: "." + name + "." + 8 random
# characters (tempfile) + ".tmp"
_TEMP_EXTRA = 1 + 1 + 8 + 4


def check_output(path, inputs=(), field=None, suffixes=None, _new_folders=()):
    """Refuse an output before any work is done: one of the inputs, a folder that does
    not exist or cannot be written, or (with `suffixes`) a name whose ending says no
    format we write. Returns the folder."""
    path = os.fspath(path)
    field = _option(path, field)
    refuse_overwrite(path, inputs, field=field)
    if suffixes is not None and os.path.splitext(path)[1].lower() not in suffixes:
        raise InputError(f"cannot tell the format from the name; expected it to end in one "
                         f"of {', '.join(suffixes)}", file=path, field=field)
    if os.path.isdir(path):
        raise InputError("is a folder; expected a file name", file=path, field=field)
    if os.path.exists(path) and not os.path.isfile(path):
        # a device or a pipe (/dev/null): the file is written beside it and renamed over
        # it, which would put an ordinary file in the device's place
        raise InputError("is a device or a pipe, not a regular file; expected a file name "
                         "(outputs are written to a temporary file and renamed into place)",
                         file=path, field=field)
    folder = os.path.dirname(os.path.abspath(path)) or "."
    name = os.path.basename(path)
    try:
        longest = os.pathconf(folder if os.path.isdir(folder) else "/", "PC_NAME_MAX")
    except (OSError, ValueError, AttributeError):
        longest = 255
    if len(os.fsencode(name)) + _TEMP_EXTRA > longest:
        # the temporary file beside it is longer than the name: refused now, not after
        # the work
        raise InputError(f"the file name is {len(os.fsencode(name))} bytes long; expected at "
                         f"most {longest - _TEMP_EXTRA} here", file=path, field=field)
    if _key(folder) not in _new_folders:
        _check_folder(folder, path, field)
    return folder


def check_outputs(outputs, inputs=()) -> None:
    """Check every output of a command together, before it does any work: no two share
    a path, none is an input, each can be created (see `check_output`); a folder output
    (`Output.folder`) may be made by the command, then the files in it are checked
    against its parent. The options that name them are remembered for later messages."""
    outputs = [o for o in outputs if o.path is not None]
    for i, a in enumerate(outputs):
        for b in outputs[:i]:
            if _key(a.path) == _key(b.path) or same_file(a.path, b.path):
                both = a.option if a.option == b.option else f"{b.option} and {a.option}"
                raise InputError(f"two outputs share this path ({both}); give each its own",
                                 file=os.fspath(a.path), field=a.option)
    new = set()
    for o in outputs:
        if not o.folder:
            continue
        path = os.fspath(o.path)
        refuse_overwrite(path, inputs, field=o.option)
        if os.path.lexists(path) and not os.path.isdir(path):
            raise InputError("is a file; expected a folder", file=path, field=o.option)
        _check_folder(os.path.abspath(path), path, o.option, will_be_made=True)
        if not os.path.isdir(path):
            new.add(_key(path))
    for o in outputs:
        if not o.folder:
            check_output(o.path, inputs, field=o.option, suffixes=o.suffixes, _new_folders=new)
    if _plan is not None:
        _plan.options.update({_key(o.path): o.option for o in outputs})


@contextlib.contextmanager
def atomic_output(path, inputs=(), suffix=".tmp", field=None):
    """Yield a temporary path beside `path`; rename it over `path` only on success (in a
    command, when the command ends: see `command_outputs`).

    A run killed part-way leaves no partial output (at worst, after SIGKILL or a power
    cut, a hidden ``.*.tmp`` file beside it).
    """
    path = os.fspath(path)
    field = _option(path, field)
    folder = check_output(path, inputs, field=field)
    plan = _plan
    try:
        fd, tmp = tempfile.mkstemp(prefix="." + os.path.basename(path) + ".", suffix=suffix,
                                   dir=folder)
    except OSError as exc:
        raise InputError(f"cannot create a file in folder {folder!r} ({exc.strerror})",
                         file=path, field=field) from None
    if plan is not None:
        plan.temps[tmp] = path
    os.close(fd)
    try:
        yield tmp
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; outputs are ordinary files
        if plan is None:
            os.replace(tmp, path)
        else:
            old = plan.ready.pop(_key(path), None)
            if old is not None:  # written twice in one command: the last one counts
                with contextlib.suppress(OSError):
                    os.remove(old[0])
                plan.temps.pop(old[0], None)
            plan.ready[_key(path)] = (tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.remove(tmp)
        if plan is not None:
            plan.temps.pop(tmp, None)
        raise


def write_atomic(path, data, inputs=()):
    """Write ``data`` (bytes or str) to ``path`` atomically (see `atomic_output`)."""
    if isinstance(data, str):
        data = data.encode("utf-8")
    with atomic_output(path, inputs=inputs) as tmp:
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
