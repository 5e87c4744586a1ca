"""Output files are written atomically and never over an input."""
from __future__ import annotations

import contextlib
import os
import tempfile

from fusion.errors import InputError

__all__ = ["atomic_output", "write_atomic", "same_file", "refuse_overwrite", "check_output",
           "FIGURE_SUFFIXES"]

# Figure formats matplotlib writes without extra packages.
FIGURE_SUFFIXES = (".png", ".pdf", ".svg", ".jpg", ".jpeg", ".tif", ".tiff", ".webp", ".eps",
                   ".ps")


def same_file(a, b) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return os.path.abspath(os.fspath(a)) == os.path.abspath(os.fspath(b))


def refuse_overwrite(out, inputs, field="-o"):
    for src in inputs or ():
        if same_file(out, src):
            raise InputError(f"output {os.fspath(out)!r} is one of the inputs; choose another "
                             "path (inputs are never overwritten)", file=os.fspath(out), field=field)


def check_output(path, inputs=(), field="-o", suffixes=None):
    """Refuse an output before any work is done: one of the inputs, a folder that does
    not exist or cannot be written, or (with `suffixes`) a name whose ending says no
    format we write. Returns the folder."""
    path = os.fspath(path)
    refuse_overwrite(path, inputs, field=field)
    if suffixes is not None and os.path.splitext(path)[1].lower() not in suffixes:
        raise InputError(f"cannot tell the format from the name; expected it to end in one "
                         f"of {', '.join(suffixes)}", file=path, field=field)
    if os.path.isdir(path):
        raise InputError("is a folder; expected a file name", file=path, field=field)
    folder = os.path.dirname(os.path.abspath(path)) or "."
    if not os.path.isdir(folder):
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
    return folder


@contextlib.contextmanager
def atomic_output(path, inputs=(), suffix=".tmp", field="-o"):
    """Yield a temporary path beside `path`; rename it over `path` only on success.

    A run killed part-way leaves no partial output (at worst a hidden ``.*.tmp`` file
    that is removed on the next clean exit of the same command).
    """
    path = os.fspath(path)
    folder = check_output(path, inputs, field=field)
    try:
        fd, tmp = tempfile.mkstemp(prefix="." + os.path.basename(path) + ".", suffix=suffix,
                                   dir=folder)
    except OSError as exc:
        raise InputError(f"cannot create a file in folder {folder!r} ({exc.strerror})",
                         file=path, field=field) from None
    os.close(fd)
    try:
        yield tmp
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; outputs are ordinary files
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.remove(tmp)
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
