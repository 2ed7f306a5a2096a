"""Worker processes that draw the report figures in parallel with the audit.

Drawing the figures is matplotlib work in one thread.  :class:`FigureWorkers`
starts its workers before the command line reads the data, so that importing
matplotlib and setting up its fonts overlap the audit, and the audit hands over
figure data as soon as parts of it exist (:meth:`FigureWorkers.early`: the plots
of the fitted model before the checks run, those of the checks before the
methods run); only the figure of the methods' p-values waits for the verdict.

* One worker is forked (POSIX ``fork``) before the parent starts any thread; it
  imports matplotlib, draws every figure once from bundled warm-up coordinates
  and then forks the others, which start warm (one import, not one per worker).  Where ``fork`` is not
  available, or on a single core, or when a worker cannot start or dies, the
  figures are drawn in the calling process: the files are the same bytes
  either way.
* Tasks go through one shared queue (a free worker takes the next figure), the
  most expensive figures first.
* Workers return the files' bytes; only the parent writes files (atomically),
  so an interrupted run never has a worker writing into a folder that is being
  cleaned up.  If the parent is interrupted, the workers are killed before the
  exception leaves.  A worker ignores Ctrl-C (the parent handles it for the
  process group) and exits on its own when its parent is gone.
* Only our own figure data (numbers and already-sanitised strings) cross the
  process boundary; nothing a user supplies is ever unpickled.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import threading

__all__ = ["FigureWorkers"]

#: the most workers worth starting: seven figures of unequal cost balance well over two
MAX_WORKERS = 2
# drawing order that balances two workers: the most expensive figures first
_COST_ORDER = ("methods_p", "cell_means", "spread", "boxcox", "residual_qq", "loo", "sd_n")
_POLL = 0.25
#: the workers' scheduling priority below the parent's (POSIX nice increment): drawing uses
#: the cores the audit leaves idle and never slows the audit down
WORKER_NICENESS = 10  # seconds between checks that the workers are alive while waiting


def _cost_rank(key: str) -> int:
    return _COST_ORDER.index(key) if key in _COST_ORDER else len(_COST_ORDER)


def _watch_parent(parent: int) -> None:
    import time

    while os.getppid() == parent:
        time.sleep(0.5)
    os._exit(0)


def _warm_up(fmt: str) -> None:
    """Draw every report figure once from the bundled warm-up coordinates (a tiny invented
    dataset, ``warmup_figures.json``, made by ``fixtures/make_warmup.py``): matplotlib's
    import and its first-use costs (code paths, font sizes, legends, log axes) are paid
    while the parent reads the data.  A failure here only costs speed."""
    import importlib.resources
    import json

    from .figures import clean_figure_data, draw_figure, figure_keys

    try:
        fd = clean_figure_data(json.loads(importlib.resources.files("audit.render")
                                          .joinpath("warmup_figures.json").read_text(encoding="utf-8")))
        for key in figure_keys(fd):
            draw_figure(key, fd, fmt)
    except Exception:  # noqa: BLE001 - the real figures surface any real error
        pass


def _serve(tasks, results, parent: int) -> None:
    """A worker's loop: draw each task's figure and send back its bytes."""
    from .figures import draw_figure

    threading.Thread(target=_watch_parent, args=(parent,), daemon=True).start()
    results.put(("ready", os.getpid(), None, None))
    while True:
        task = tasks.get()
        if task is None:
            results.close()
            results.join_thread()  # every result reaches the pipe before this process ends
            return
        seq, key, inputs, fmt = task
        try:
            results.put((seq, key, draw_figure(key, inputs, fmt), None))
        except Exception as exc:  # noqa: BLE001 - reported; the parent draws this figure itself
            results.put((seq, key, None, f"{type(exc).__name__}: {exc}"))


def _first_worker(tasks, results, n: int, fmt: str) -> None:
    """The first worker: warm up, fork the others, then serve like them."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    try:  # background work: the audit in the parent keeps the CPU it needs
        os.nice(WORKER_NICENESS)
    except (AttributeError, OSError):
        pass
    _warm_up(fmt)
    me = os.getpid()
    children = []
    for _ in range(n - 1):
        pid = os.fork()
        if pid == 0:  # a warm copy
            try:
                _serve(tasks, results, me)
            finally:
                os._exit(0)
        children.append(pid)
    _serve(tasks, results, os.getppid())
    for pid in children:
        try:
            os.waitpid(pid, 0)
        except ChildProcessError:
            pass


class FigureWorkers:
    """A small set of figure-drawing processes (see the module notes).

    Parameters
    ----------
    fmt : {"svg", "png"}
        The figure file format.
    workers : int, optional
        Number of processes (default: ``min(2, os.cpu_count())``); fewer than 1
        means the figures are drawn in the calling process.

    Use as a context manager: leaving the block normally lets the workers
    finish; leaving it by an exception kills them.
    """

    def __init__(self, fmt: str = "svg", workers: int | None = None):
        n = min(MAX_WORKERS, os.cpu_count() or 1) if workers is None else int(workers)
        self.fmt = fmt
        self._n = n
        self._first = None
        self._pids: set[int] = set()
        self._seq = 0
        self._sent: dict[str, tuple[int, dict]] = {}  # key -> (sequence number, inputs)
        self._done: dict[int, tuple] = {}
        if n < 1 or (os.cpu_count() or 1) < 2 or "fork" not in multiprocessing.get_all_start_methods():
            return
        ctx = multiprocessing.get_context("fork")
        try:
            self._tasks = ctx.Queue()
            self._results = ctx.Queue()
            first = ctx.Process(target=_first_worker, args=(self._tasks, self._results, n, fmt), daemon=True,
                                name="twoway-audit-figures")
            first.start()
        except (OSError, RuntimeError):
            return
        self._first = first
        self._pids.add(first.pid)

    @property
    def parallel(self) -> bool:
        """True when figures are drawn by worker processes."""
        return self._first is not None

    # ------------------------------------------------------------------ tasks

    def _send(self, key: str, inputs: dict) -> None:
        self._seq += 1
        self._sent[key] = (self._seq, inputs)
        self._tasks.put((self._seq, key, inputs, self.fmt))

    def early(self, figure_data: dict) -> None:
        """Start every figure whose inputs ``figure_data`` (possibly partial) already holds."""
        if self._first is None:
            return
        from .figures import FIGURE_STEMS, clean_figure_data, figure_inputs

        fd = clean_figure_data(figure_data)
        try:
            for key in sorted(FIGURE_STEMS, key=_cost_rank):
                inputs = None if key in self._sent else figure_inputs(key, fd)
                if inputs is not None:
                    self._send(key, inputs)
        except BaseException:
            self.kill()
            raise

    def collect(self, keys, clean_data: dict, fmt: str) -> dict:
        """{key: file bytes or None} of the figures ``keys`` (data from ``clean_figure_data``);
        figures not yet started are started now, figures a worker could not draw are
        drawn here."""
        from .figures import draw_figure, figure_inputs

        keys = list(keys)
        if self._first is None or fmt != self.fmt:
            return {k: draw_figure(k, clean_data, fmt) for k in keys}
        try:
            for key in sorted(keys, key=_cost_rank):
                inputs = figure_inputs(key, clean_data)
                if key not in self._sent or self._sent[key][1] != inputs:
                    self._send(key, inputs)  # not started, or started from other data
            got = self._wait({self._sent[k][0] for k in keys})
        except BaseException:
            self.kill()
            raise
        out = {}
        for k in keys:
            res = got.get(self._sent[k][0])
            # a figure no worker delivered (a worker died, or drawing failed there) is drawn here,
            # where any error surfaces as it would without workers
            out[k] = res[0] if res is not None and res[1] is None else draw_figure(k, clean_data, fmt)
        self._sent = {}
        return out

    def _wait(self, wanted: set[int]) -> dict:
        """Results of the wanted tasks: {seq: (bytes, error)}; stops early when a worker is gone."""
        import queue

        got = {}
        while not wanted <= got.keys():
            try:
                seq, key, blob, err = self._results.get(timeout=_POLL)
            except queue.Empty:
                if not self._alive():
                    self.kill()
                    break
                continue
            if seq == "ready":
                self._pids.add(key)
            else:
                got[seq] = (blob, err)
        return got

    def _alive(self) -> bool:
        if self._first is None or not self._first.is_alive():
            return False
        for pid in self._pids:
            try:
                os.kill(pid, 0)
            except ProcessLookupError:
                return False
            except PermissionError:
                pass
        return True

    # ------------------------------------------------------------------ ending

    def kill(self) -> None:
        """Stop the workers now."""
        first, self._first = self._first, None
        if first is None:
            return
        import queue

        try:  # the pids of workers that announced themselves since the last look
            while True:
                seq, key, _, _ = self._results.get_nowait()
                if seq == "ready":
                    self._pids.add(key)
        except (queue.Empty, OSError, ValueError, EOFError):
            pass
        for pid in self._pids:
            try:
                os.kill(pid, signal.SIGKILL)
            except (ProcessLookupError, PermissionError):
                pass
        first.join(5)
        self._close_queues()

    def close(self) -> None:
        """Tell the workers to finish; they exit on their own (the parent does not wait:
        nothing they do now can touch a file)."""
        first, self._first = self._first, None
        if first is None:
            return
        try:
            for _ in range(self._n):
                self._tasks.put(None)
        except (OSError, ValueError):
            self._first = first
            self.kill()
        self._close_queues()

    def _close_queues(self) -> None:
        for q in (getattr(self, "_tasks", None), getattr(self, "_results", None)):
            if q is not None:
                try:
                    q.close()
                    q.cancel_join_thread()
                except (OSError, ValueError):
                    pass

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            self.close()
        else:
            self.kill()
        return False
