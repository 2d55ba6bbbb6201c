"""Atomic file writes: write to a temporary file beside the target, then rename."""

from __future__ import annotations

import contextlib
import os
import tempfile

__all__ = ["atomic_write", "atomic_path"]


def _umask():
    mask = os.umask(0)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def atomic_path(path):
    """Yield a temporary path beside ``path``; on success it is renamed onto ``path``.

    On an exception the temporary file is removed and ``path`` is untouched.
    """
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    os.makedirs(folder, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix="." + os.path.basename(path) + ".", suffix=".part", dir=folder)
    os.close(fd)
    try:
        yield tmp
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; give the usual permissions
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


@contextlib.contextmanager
def atomic_write(path, mode="w", **kwargs):
    """Open a temporary file for writing; it replaces ``path`` only when the block succeeds."""
    with atomic_path(path) as tmp:
        with open(tmp, mode, **({"encoding": "utf-8"} if "b" not in mode else {}), **kwargs) as f:
            yield f
            f.flush()
            os.fsync(f.fileno())
