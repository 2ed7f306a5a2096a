"""Atomic file output: write to a temporary file beside the target, then rename.

The finished file gets the ordinary permissions of a new file (0666 less the
umask), not the private mode of a temporary file.
"""

from __future__ import annotations

import os
import tempfile
from typing import Callable

__all__ = ["atomic_write_text", "atomic_write_bytes", "atomic_write_with"]


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def atomic_write_with(path: str | os.PathLike, write: Callable[[str], None], *, suffix: str = "") -> None:
    """Call ``write(tmp_path)`` on a temporary file in the target folder, then
    move it onto ``path`` (readers never see a half-written file)."""
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    os.makedirs(folder, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", suffix=suffix, dir=folder)
    os.close(fd)
    try:
        write(tmp)
        os.chmod(tmp, 0o666 & ~_umask())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> None:
    def write(tmp: str) -> None:
        with open(tmp, "wb") as fh:
            fh.write(data)

    atomic_write_with(path, write)


def atomic_write_text(path: str | os.PathLike, text: str) -> None:
    atomic_write_bytes(path, text.encode("utf-8"))
