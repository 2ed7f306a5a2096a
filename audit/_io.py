"""Safe output: never touch an input, never leave a half-written file or folder.

Rules (the command line relies on them; library users may too):

- :func:`refuse_input_overlap` / :func:`refuse_folder_overlap`: an output path
  that is an input file (same path after resolving links, or the same file
  through a hard link: equal ``st_dev``/``st_ino``), or a report folder that
  contains an input, is refused with :class:`~audit.errors.OutputError`.
- :func:`write_file`: a regular file (or nothing) at the path is replaced
  atomically (temporary file beside it, then ``os.replace``); character devices,
  FIFOs and ``/dev/stdout``-like paths are written through (plain open and
  write, nothing created or renamed); a symbolic link is followed only when it
  points into its own folder, otherwise refused; folders, sockets and block
  devices are refused.
- :func:`replace_folder`: a report folder is built in a temporary sibling and
  moved into place in one step (an atomic exchange where the system offers it),
  replacing only an empty folder or one that twoway-audit wrote (a valid
  manifest of ours names its files, :func:`read_manifest`); any other folder
  that is not empty is refused, whatever its files are called.  A failed or interrupted run leaves the previous folder whole.
- Every message names the path as the user typed it, never a temporary name.

A finished file gets the ordinary permissions of a new file (0666 less the
umask), or keeps the permissions of the file it replaces.
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import shutil
import signal
import stat
import sys
import tempfile
import threading
from typing import Callable, Iterable

from .errors import OutputError

__all__ = [
    "atomic_write_text",
    "atomic_write_bytes",
    "atomic_write_with",
    "write_file",
    "check_file_target",
    "refuse_input_overlap",
    "refuse_folder_overlap",
    "check_folder_target",
    "replace_folder",
    "read_manifest",
    "MANIFEST",
    "MANIFEST_FORMAT",
    "is_inside",
]

#: Name of the manifest written inside every report folder (marks it as ours).
MANIFEST = ".twoway-audit-report.json"
_TMP_PREFIX = ".tmp-"


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _q(path) -> str:
    return repr(os.fspath(path))


def os_error(exc: OSError, shown) -> OutputError:
    """An :class:`OutputError` for ``exc`` that names ``shown`` (the user's path)."""
    p = _q(shown)
    e = exc.errno
    if e == errno.ENOSPC:
        msg = f"cannot write {p}: no space left on the device; free some space or choose another place"
    elif e == errno.EDQUOT:
        msg = f"cannot write {p}: disk quota exceeded; free some space or choose another place"
    elif e in (errno.EACCES, errno.EPERM, errno.EROFS):
        msg = f"cannot write {p}: permission denied; choose a writable place"
    elif e == errno.EISDIR:
        msg = f"cannot write {p}: it is a folder; give a file name"
    elif e in (errno.ENOENT, errno.ENOTDIR):
        msg = f"cannot write {p}: its folder does not exist or is not a folder"
    elif e == errno.EPIPE:
        msg = f"cannot write {p}: the reading end was closed"
    else:
        msg = f"cannot write {p}: {exc.strerror or exc}"
    return OutputError(msg)


@contextlib.contextmanager
def signals_deferred():
    """Hold SIGINT/SIGTERM while a short commit step runs (delivered right after)."""
    if threading.current_thread() is not threading.main_thread() or not hasattr(signal, "pthread_sigmask"):
        yield
        return
    old = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT, signal.SIGTERM})
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, old)


def _unlink_quiet(path: str) -> None:
    with contextlib.suppress(OSError):
        os.unlink(path)


def is_inside(path: str, folder: str) -> bool:
    """``path`` is ``folder`` or lies below it (both already resolved)."""
    return path == folder or path.startswith(folder.rstrip(os.sep) + os.sep)


def _stat_id(path) -> tuple[int, int] | None:
    try:
        st = os.stat(path)
    except (OSError, ValueError):
        return None
    return st.st_dev, st.st_ino


# ------------------------------------------------------------------ inputs


def refuse_input_overlap(path, inputs: Iterable, *, option: str) -> None:
    """Refuse an output ``path`` that is one of ``inputs`` (by resolved path or inode)."""
    out_real = os.path.realpath(path)
    out_id = _stat_id(path)
    for inp in inputs:
        if inp is None:
            continue
        same = os.path.realpath(inp) == out_real or (out_id is not None and _stat_id(inp) == out_id)
        if same:
            raise OutputError(f"{option} {_q(path)} is the input data file {_q(inp)}; "
                              f"it would be overwritten: choose another output path")


def refuse_folder_overlap(folder, inputs: Iterable, *, option: str = "--report") -> None:
    """Refuse a report folder that is, or contains, an input file (by path or inode)."""
    f_real = os.path.realpath(folder)
    ids = {}
    for inp in inputs:
        if inp is None:
            continue
        if is_inside(os.path.realpath(inp), f_real):
            raise OutputError(f"{option} folder {_q(folder)} contains the input data file {_q(inp)}; "
                              f"the report would replace it: choose another folder")
        i = _stat_id(inp)
        if i is not None:
            ids[i] = inp
    if ids and os.path.isdir(folder):
        with contextlib.suppress(OSError), os.scandir(folder) as it:
            for entry in it:
                i = _stat_id(entry.path)
                if i in ids:
                    raise OutputError(f"{option} folder {_q(folder)} holds {entry.name!r}, the same file as "
                                      f"the input {_q(ids[i])} (a hard link); choose another folder")


# ------------------------------------------------------------------ single files


def _is_stream_path(path: str) -> bool:
    """Paths such as /dev/stdout, /dev/fd/N or /proc/self/fd/N: always written through."""
    a = os.path.abspath(path)
    return a.startswith(("/dev/", "/proc/"))


def check_file_target(path, *, shown=None) -> tuple[str, str]:
    """How ``path`` would be written: ``("atomic", target)`` or ``("through", path)``.

    Raises :class:`OutputError` for a folder, a socket or block device, or a
    symbolic link that leads out of its own folder.
    """
    path = os.fspath(path)
    shown = path if shown is None else shown
    try:
        lst = os.lstat(path)
    except FileNotFoundError:
        if _is_stream_path(path):
            raise OutputError(f"cannot write {_q(shown)}: no such device; check the path") from None
        return "atomic", path
    except OSError as exc:
        raise os_error(exc, shown) from None
    if stat.S_ISLNK(lst.st_mode):
        try:
            st = os.stat(path)
        except OSError:
            st = None
        if _is_stream_path(path) or (st is not None and (stat.S_ISCHR(st.st_mode) or stat.S_ISFIFO(st.st_mode))):
            return "through", path
        target = os.path.realpath(path)
        folder = os.path.realpath(os.path.dirname(os.path.abspath(path)))
        if not is_inside(os.path.dirname(target), folder):
            raise OutputError(f"{_q(shown)} is a symbolic link to {target!r}, outside the output folder; "
                              "refusing to replace it: give the target path itself or remove the link")
        if st is not None and stat.S_ISDIR(st.st_mode):
            raise OutputError(f"cannot write {_q(shown)}: it is a folder; give a file name")
        return "atomic", target
    m = lst.st_mode
    if stat.S_ISREG(m):
        return "atomic", path
    if stat.S_ISDIR(m):
        raise OutputError(f"cannot write {_q(shown)}: it is a folder; give a file name")
    if stat.S_ISCHR(m) or stat.S_ISFIFO(m):
        return "through", path
    raise OutputError(f"cannot write {_q(shown)}: it is a socket or block device; give a regular file name")


def _write_fd(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        n = os.write(fd, view)
        view = view[n:]


def _write_through(path: str, data: bytes, shown) -> None:
    target = _stat_id(path)
    for fd, stream in ((1, sys.stdout), (2, sys.stderr)):
        try:
            st = os.fstat(fd)
        except OSError:
            continue
        if target == (st.st_dev, st.st_ino) and stream is not None:
            try:  # our own standard stream: keep its order and position
                stream.flush()
                _write_fd(fd, data)
            except OSError as exc:
                raise os_error(exc, shown) from None
            return
    try:
        st = os.stat(path)
        flags = os.O_WRONLY | (os.O_APPEND if stat.S_ISREG(st.st_mode) else 0)
        fd = os.open(path, flags)
        try:
            _write_fd(fd, data)
        finally:
            os.close(fd)
    except OSError as exc:
        raise os_error(exc, shown) from None


def _atomic(target: str, write: Callable[[str], None], shown, *, suffix: str = "", on_done=None) -> None:
    folder = os.path.dirname(os.path.abspath(target))
    try:
        os.makedirs(folder, exist_ok=True)
        try:
            mode = stat.S_IMODE(os.stat(target).st_mode)
        except FileNotFoundError:
            mode = 0o666 & ~_umask()
        fd, tmp = tempfile.mkstemp(prefix=_TMP_PREFIX, suffix=suffix, dir=folder)
        os.close(fd)
    except OSError as exc:
        raise os_error(exc, shown) from None
    try:
        write(tmp)
        os.chmod(tmp, mode)
        with signals_deferred():
            os.replace(tmp, target)
            if on_done is not None:
                on_done()
    except OSError as exc:
        _unlink_quiet(tmp)
        raise os_error(exc, shown) from None
    except BaseException:
        _unlink_quiet(tmp)
        raise


def _write_bytes_to(tmp: str, data: bytes) -> None:
    with open(tmp, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())


def write_file(path, data: bytes, *, shown=None, on_done=None) -> None:
    """Write ``data`` to ``path`` by the rules in the module docstring; ``on_done()``
    is called once the file is in place (before a pending interrupt is delivered)."""
    path = os.fspath(path)
    shown = path if shown is None else shown
    how, target = check_file_target(path, shown=shown)
    if how == "through":
        _write_through(target, data, shown)
        if on_done is not None:
            on_done()
    else:
        _atomic(target, lambda tmp: _write_bytes_to(tmp, data), shown, on_done=on_done)


def atomic_write_with(path, write: Callable[[str], None], *, suffix: str = "", shown=None) -> None:
    """Call ``write(tmp_path)`` on a temporary file in the target folder, then
    move it onto ``path`` (readers never see a half-written file)."""
    path = os.fspath(path)
    _atomic(path, write, path if shown is None else shown, suffix=suffix)


def atomic_write_bytes(path, data: bytes, *, suffix: str = "", shown=None) -> None:
    """Write ``data`` to ``path`` atomically (see :func:`atomic_write_with`)."""
    atomic_write_with(path, lambda tmp: _write_bytes_to(tmp, data), suffix=suffix, shown=shown)


def atomic_write_text(path, text: str) -> None:
    atomic_write_bytes(path, text.encode("utf-8"))


# ------------------------------------------------------------------ report folders


def _folder_path(folder) -> str:
    path = os.path.abspath(os.fspath(folder))
    if os.path.islink(path):  # a link to a folder: the folder it points at is replaced, the link kept
        path = os.path.realpath(path)
    return path


#: the manifest's format: {"tool": "twoway-audit", "format": MANIFEST_FORMAT, "files": [name, ...]}
#: (reports written before the format number carry only "tool" and "files")
MANIFEST_FORMAT = 1
_MANIFEST_KEYS = {"tool", "format", "files"}


def _plain_name(name) -> bool:
    return (isinstance(name, str) and name not in ("", ".", "..", MANIFEST) and "/" not in name
            and os.sep not in name and "\0" not in name)


def read_manifest(folder) -> list[str] | None:
    """The file names listed by the report manifest in ``folder``; None when there is
    no manifest or it is not one twoway-audit writes.

    A manifest is ours when it is a regular file (not a link) holding a JSON object
    with exactly the keys ``tool`` (``"twoway-audit"``), ``files`` (a list of plain
    file names, each once) and, optionally, ``format`` (:data:`MANIFEST_FORMAT`).
    """
    path = os.path.join(os.fspath(folder), MANIFEST)
    try:
        if not stat.S_ISREG(os.lstat(path).st_mode) or os.lstat(path).st_size > (1 << 20):
            return None
        with open(path, encoding="utf-8") as fh:
            man = json.load(fh)
    except (OSError, ValueError):
        return None
    if not isinstance(man, dict) or set(man) - _MANIFEST_KEYS or man.get("tool") != "twoway-audit":
        return None
    fmt = man.get("format", MANIFEST_FORMAT)
    if isinstance(fmt, bool) or fmt != MANIFEST_FORMAT:
        return None
    files = man.get("files")
    if not isinstance(files, list) or not all(_plain_name(n) for n in files) or len(set(files)) != len(files):
        return None
    return list(files)


def _foreign(path: str, known: set[str]) -> tuple[list[str], bool]:
    """(names that twoway-audit did not write, whether the folder has a manifest of ours)
    for an existing folder.  An empty folder has none; a folder without a valid manifest
    has every name it holds; one with a manifest the names that are neither listed in it
    nor in ``known``, and every sub-folder or link."""
    names = os.listdir(path)
    if not names:
        return [], False
    listed = read_manifest(path)
    if listed is None:
        return sorted(names), False
    allowed = set(listed) | set(known) | {MANIFEST}
    foreign = sorted(n for n in names if n not in allowed
                     or not stat.S_ISREG(os.lstat(os.path.join(path, n)).st_mode))
    return foreign, True


def check_folder_target(folder, *, known: Iterable[str] = (), shown=None) -> None:
    """Refuse a report folder that is not a folder, or is not empty and not a report of ours.

    A folder is replaced only when it is empty or holds a valid manifest
    (:func:`read_manifest`) and nothing but regular files that the manifest lists
    (or that ``known`` names); anything else -- a hand-written ``report.md``, a
    ``findings.json`` without a manifest, a damaged or foreign manifest -- is
    refused with :class:`OutputError`, whatever the files are called.
    """
    shown = folder if shown is None else shown
    path = _folder_path(folder)
    try:
        st = os.stat(path)
    except FileNotFoundError:
        return
    except OSError as exc:
        raise os_error(exc, shown) from None
    if not stat.S_ISDIR(st.st_mode):
        raise OutputError(f"report folder {_q(shown)} exists and is not a folder; choose a folder name")
    try:
        foreign, ours = _foreign(path, set(known))
    except OSError as exc:
        raise os_error(exc, shown) from None
    if foreign:
        more = f" and {len(foreign) - 3} more" if len(foreign) > 3 else ""
        listing = f"{', '.join(map(repr, foreign[:3]))}{more}"
        if ours:
            why = f"holds files twoway-audit did not write ({listing})"
        elif MANIFEST in foreign:
            why = (f"holds files twoway-audit did not write ({listing}): its {MANIFEST} is not a manifest "
                   "twoway-audit wrote")
        else:
            why = f"holds files twoway-audit did not write ({listing}) and no report manifest ({MANIFEST})"
        raise OutputError(f"report folder {_q(shown)} {why}; it would be replaced as a whole: "
                          "choose a new or empty folder")


_RENAME_EXCHANGE = 2
_renameat2 = None


def _exchange(a: str, b: str) -> bool:
    """Swap two paths atomically (Linux renameat2); False when not available."""
    global _renameat2
    if _renameat2 is None:
        try:
            import ctypes

            libc = ctypes.CDLL(None, use_errno=True)
            fn = libc.renameat2
            fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
            fn.restype = ctypes.c_int
            _renameat2 = (fn, ctypes)
        except (OSError, AttributeError):
            _renameat2 = False
    if not _renameat2:
        return False
    fn, ctypes = _renameat2
    at_fdcwd = -100
    if fn(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), _RENAME_EXCHANGE) == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.EINVAL, errno.ENOSYS, errno.EOPNOTSUPP, errno.EPERM):
        return False
    raise OSError(err, os.strerror(err), b)


def _swap_in(new: str, path: str) -> list[str]:
    """Put folder ``new`` at ``path``; return the folders to delete afterwards."""
    old: list[str] = []
    for _ in range(50):
        try:
            os.rename(new, path)  # path absent or an empty folder
            return old
        except OSError as exc:
            if exc.errno not in (errno.EEXIST, errno.ENOTEMPTY):
                raise
        if _exchange(new, path):
            return old + [new]  # ``new`` now holds the previous folder
        aside = tempfile.mkdtemp(prefix=_TMP_PREFIX + "old-", dir=os.path.dirname(path))
        try:
            os.rename(path, aside)  # replaces the empty ``aside``
        except FileNotFoundError:
            os.rmdir(aside)
            continue
        old.append(aside)
    raise OSError(errno.EBUSY, "the folder kept changing during the swap", path)


def replace_folder(folder, build: Callable[[str], Iterable[str]], *, known: Iterable[str] = (), shown=None,
                   on_done=None) -> None:
    """Build a report folder in a temporary sibling with ``build(tmp)`` (returns
    the file names written), add the manifest, then move it onto ``folder`` in
    one step.  On any failure or interrupt the temporary folder is removed and
    the previous folder is left whole.  ``on_done()`` is called once the new
    folder is in place (before a pending interrupt is delivered)."""
    shown = folder if shown is None else shown
    known = set(known)
    path = _folder_path(folder)
    parent = os.path.dirname(path)
    check_folder_target(folder, known=known, shown=shown)
    try:
        os.makedirs(parent, exist_ok=True)
        tmp = tempfile.mkdtemp(prefix=_TMP_PREFIX + "report-", dir=parent)
    except OSError as exc:
        raise os_error(exc, shown) from None
    pending: list[str] = [tmp]
    try:
        try:
            os.chmod(tmp, 0o777 & ~_umask())
            names = sorted(set(build(tmp)))
            with open(os.path.join(tmp, MANIFEST), "w", encoding="utf-8") as fh:
                json.dump({"tool": "twoway-audit", "format": MANIFEST_FORMAT, "files": names}, fh)
                fh.write("\n")
        except OSError as exc:
            raise os_error(exc, shown) from None
        with signals_deferred():
            check_folder_target(folder, known=known, shown=shown)  # again, just before the swap
            try:
                pending = _swap_in(tmp, path)
            except OSError as exc:
                raise os_error(exc, shown) from None
            for p in pending:
                shutil.rmtree(p, ignore_errors=True)
            pending = []
            if on_done is not None:
                on_done()
    finally:
        for p in pending:
            shutil.rmtree(p, ignore_errors=True)
