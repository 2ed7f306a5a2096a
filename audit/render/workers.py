"""Worker processes that draw the report figures in parallel.

Drawing the figures is matplotlib work in one thread; on a machine with two or
more cores it runs faster spread over processes.  :class:`FigureWorkers` starts
its workers early (the CLI starts them before it reads the data), so that each
worker's matplotlib import and font set-up overlap the audit; the figures that
need only the fitted model start while the audit's checks and methods run
(:meth:`FigureWorkers.early`), the rest when the audit is done
(:meth:`FigureWorkers.collect`).

* Workers are forked (POSIX ``fork`` start method), before the parent starts any
  thread.  Where ``fork`` is not available, or on a single core, or when the
  workers cannot start, the figures are drawn in the calling process: the files
  are the same bytes either way.
* A worker ignores Ctrl-C (the parent handles it for the process group) and
  exits on its own when its parent is gone.
* Workers return the files' bytes; only the parent writes files (atomically),
  so an interrupted run never has a worker writing into a folder that is being
  cleaned up.  If the parent is interrupted while it waits, the workers are
  killed and joined before the exception leaves.
* Only our own figure data (numbers and already-sanitised strings) cross the
  process boundary; nothing a user supplies is ever unpickled.
"""

from __future__ import annotations

import multiprocessing
import os
import threading

__all__ = ["FigureWorkers"]

#: the most workers worth starting: seven figures of unequal cost balance well over two
MAX_WORKERS = 2
# drawing order that balances two workers: the most expensive figures first
_COST_ORDER = ("methods_p", "cell_means", "spread", "boxcox", "residual_qq", "loo", "sd_n")


def _cost_rank(key: str) -> int:
    return _COST_ORDER.index(key) if key in _COST_ORDER else len(_COST_ORDER)


def _watch_parent(parent: int) -> None:
    import time

    while os.getppid() == parent:
        time.sleep(0.5)
    os._exit(0)


def _start_worker(parent: int) -> None:
    """Worker initialiser: signals, a parent watch, and a warm-up drawing."""
    import io
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    threading.Thread(target=_watch_parent, args=(parent,), daemon=True).start()
    # import matplotlib and draw a small figure with text in both formats: the font files,
    # the text layout caches and both back ends are ready before the first real task
    import matplotlib
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from .figures import _RC

    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(2, 2), dpi=50)
        FigureCanvasAgg(fig)
        ax = fig.add_subplot()
        ax.plot([1, 2], [1, 10], marker="o", label="p-value 0.05")
        ax.set_yscale("log")
        ax.set_title("warm-up 0123456789")
        ax.legend()
        for fmt in ("svg", "png"):
            fig.savefig(io.BytesIO(), format=fmt)


def _ping() -> int:
    return os.getpid()


def _draw(key: str, inputs: dict, fmt: str):
    from .figures import draw_figure

    return draw_figure(key, inputs, fmt)


class FigureWorkers:
    """A small pool of figure-drawing processes (see the module notes).

    Parameters
    ----------
    fmt : {"svg", "png"}
        The figure file format.
    workers : int, optional
        Number of processes (default: ``min(2, os.cpu_count())``); fewer than 2
        means the figures are drawn in the calling process.

    :meth:`early` takes figure data as soon as parts of it exist (the audit
    hands over the plots that need only the fitted model before it runs the
    checks and methods) and starts those figures; :meth:`collect` starts the
    rest and returns every figure's bytes.  Use as a context manager: leaving
    the block normally lets the workers finish; leaving it by an exception
    kills them.
    """

    def __init__(self, fmt: str = "svg", workers: int | None = None):
        n = min(MAX_WORKERS, os.cpu_count() or 1) if workers is None else int(workers)
        self.fmt = fmt
        self._pool = None
        self._procs = []
        self._futures = {}
        if n < 2 or "fork" not in multiprocessing.get_all_start_methods():
            return
        from concurrent.futures import ProcessPoolExecutor

        try:
            pool = ProcessPoolExecutor(n, mp_context=multiprocessing.get_context("fork"),
                                       initializer=_start_worker, initargs=(os.getpid(),))
            pool.submit(_ping)  # with fork, every worker starts on the first task
        except (OSError, RuntimeError):
            return
        self._pool = pool
        self._procs = list(getattr(pool, "_processes", {}).values())

    @property
    def parallel(self) -> bool:
        """True when figures are drawn by worker processes."""
        return self._pool is not None

    def early(self, figure_data: dict) -> None:
        """Start every figure whose inputs ``figure_data`` (possibly partial) already holds."""
        if self._pool is None:
            return
        from .figures import FIGURE_STEMS, clean_figure_data, figure_inputs

        fd = clean_figure_data(figure_data)
        for key in sorted(FIGURE_STEMS, key=_cost_rank):
            if key not in self._futures and fd.get("qq" if key == "residual_qq" else key) is not None:
                inputs = figure_inputs(key, fd)
                if inputs is not None:
                    self._submit(key, inputs)

    def _submit(self, key, inputs):
        try:
            self._futures[key] = (self._pool.submit(_draw, key, inputs, self.fmt), inputs)
        except BaseException:
            self.kill()
            raise

    def collect(self, keys, clean_data: dict, fmt: str) -> dict:
        """{key: file bytes or None} of the figures ``keys`` (data from ``clean_figure_data``)."""
        from .figures import draw_figure, figure_inputs

        def here():
            return {k: draw_figure(k, clean_data, fmt) for k in keys}

        if self._pool is None or fmt != self.fmt:
            return here()
        from concurrent.futures.process import BrokenProcessPool

        try:
            for key in sorted(keys, key=_cost_rank):
                inputs = figure_inputs(key, clean_data)
                started = self._futures.get(key)
                if started is not None and started[1] != inputs:
                    started = None  # the early data differ from the final: draw again
                if started is None:
                    self._submit(key, inputs)
            return {k: self._futures[k][0].result() for k in keys}
        except BrokenProcessPool:
            # a worker died (killed from outside, out of memory): draw here instead
            self.kill()
            return here()
        except BaseException:
            self.kill()
            raise
        finally:
            self._futures = {}
    def kill(self) -> None:
        """Stop the workers now and wait until they are gone."""
        pool, self._pool = self._pool, None
        if pool is None:
            return
        if hasattr(pool, "kill_workers"):  # Python 3.14+
            try:
                pool.kill_workers()
            except Exception:  # noqa: BLE001 - fall through to the process handles
                pass
        for p in self._procs:
            try:
                p.kill()
            except (OSError, ValueError, AttributeError):
                pass
        for p in self._procs:
            try:
                p.join(5)
            except (OSError, ValueError, AssertionError, AttributeError):
                pass
        try:
            pool.shutdown(wait=False, cancel_futures=True)
        except Exception:  # noqa: BLE001 - the workers are already gone
            pass

    def close(self) -> None:
        """Let the workers finish and exit."""
        pool, self._pool = self._pool, None
        if pool is not None:
            pool.shutdown(wait=True)

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            self.close()
        else:
            self.kill()
        return False
