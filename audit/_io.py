"""Atomic file output: write to a temporary file beside the target, then rename."""

from __future__ import annotations

import os
import tempfile

__all__ = ["atomic_write_text", "atomic_write_bytes"]


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> None:
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    os.makedirs(folder, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", dir=folder)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def atomic_write_text(path: str | os.PathLike, text: str) -> None:
    atomic_write_bytes(path, text.encode("utf-8"))
