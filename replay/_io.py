"""Output files are written atomically and never over an input."""
from __future__ import annotations

import contextlib
import os
import tempfile

from fusion.errors import InputError

__all__ = ["atomic_output", "write_atomic", "same_file", "refuse_overwrite"]


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


@contextlib.contextmanager
def atomic_output(path, inputs=(), suffix=".tmp"):
    """Yield a temporary path beside `path`; rename it over `path` only on success.

    A run killed part-way leaves no partial output (at worst a hidden ``.*.tmp`` file
    that is removed on the next clean exit of the same command).
    """
    path = os.fspath(path)
    refuse_overwrite(path, inputs)
    folder = os.path.dirname(os.path.abspath(path)) or "."
    if not os.path.isdir(folder):
        raise InputError(f"folder {folder!r} does not exist", file=path, field="-o")
    if not os.access(folder, os.W_OK):
        raise InputError(f"folder {folder!r} cannot be written", file=path, field="-o")
    try:
        fd, tmp = tempfile.mkstemp(prefix="." + os.path.basename(path) + ".", suffix=suffix,
                                   dir=folder)
    except OSError as exc:
        raise InputError(f"cannot write to folder {folder!r} ({exc.strerror})", file=path,
                         field="-o") from None
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
