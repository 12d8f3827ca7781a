"""Execution engines of `denude batch`: where the per-tile function runs.

* ``InlineEngine``: in the calling process, one tile after another (tests, debugging).
* ``LocalPoolEngine``: a local process pool (``concurrent.futures.ProcessPoolExecutor`` with the
  'forkserver' start method where available, else 'spawn'); no server.
* ``DaskEngine``: an existing Dask distributed cluster (``distributed.Client(address)``),
  ``client.submit`` of the same per-tile function.

Every engine runs the same function on the same picklable task, so outputs do not depend on
the engine. Interface: ``submit(fn, task) -> handle``, ``wait_any(handles) -> done handles``,
``outcome(handle) -> (ok, result or exception)``; engines are context managers.
"""

from __future__ import annotations

import concurrent.futures as cf
import multiprocessing
import os
import sys

from denude.errors import EngineError  # noqa: F401  (defined in errors.py; re-exported here)


def available_cores() -> int:
    """Cores this process may run on (``os.sched_getaffinity``; ``os.cpu_count`` elsewhere)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def check_workers(workers) -> int:
    """Worker processes: an integer from 1 to 1024; None = cores available."""
    if workers is None:
        return available_cores()
    if isinstance(workers, bool) or not isinstance(workers, int) or not (0 <= workers <= 1024):
        raise EngineError(f"workers {workers!r} must be an integer from 1 to 1024 (0 = in this process); e.g. --workers {available_cores()}")
    return workers


def limit_threads(threads: int = 1) -> int | None:
    """Keep one task from using more than ``threads`` cores (numba kernel threads); returns
    the previous setting (for ``limit_threads(previous)``), or None without numba."""
    try:
        import numba

        previous = numba.get_num_threads()
        numba.set_num_threads(max(1, min(threads, numba.config.NUMBA_NUM_THREADS)))
        return previous
    except Exception:  # pragma: no cover - numba missing
        return None


def _init_worker() -> None:
    limit_threads(1)


class _Call:
    """A call run by ``InlineEngine.wait_any`` (lazily, so results are recorded one by one)."""

    def __init__(self, fn, task):
        self.fn, self.task = fn, task
        self.finished = False
        self.value = self.error = None

    def run(self):
        try:
            self.value = self.fn(self.task)
        except Exception as exc:  # reported per tile by the driver
            self.error = exc
        self.finished = True


class InlineEngine:
    """Runs the tasks in the calling process, one at a time, in submission order."""

    name = "inline"
    dashboard_link = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False

    def describe(self) -> str:
        return "in this process (1 worker)"

    def submit(self, fn, task):
        return _Call(fn, task)

    def wait_any(self, handles):
        call = next(iter(handles))
        if not call.finished:
            call.run()
        return [call]

    def outcome(self, handle):
        return (handle.error is None, handle.value if handle.error is None else handle.error)


def _context():
    methods = multiprocessing.get_all_start_methods()
    if "forkserver" in methods and sys.platform.startswith("linux"):
        ctx = multiprocessing.get_context("forkserver")
        try:  # children fork from a server that has the batch modules imported: fast start
            ctx.set_forkserver_preload(["denude.execution.batch"])
        except Exception:  # pragma: no cover
            pass
        return ctx
    return multiprocessing.get_context("spawn")


class LocalPoolEngine:
    """A local process pool of ``workers`` processes (no server)."""

    name = "local"
    dashboard_link = None

    def __init__(self, workers: int):
        self.workers = check_workers(workers)
        if self.workers < 1:
            raise EngineError("a local process pool needs at least 1 worker; give --workers 1 or more")
        self.pool = None

    def __enter__(self):
        self._start()
        return self

    def _start(self):
        self.pool = cf.ProcessPoolExecutor(max_workers=self.workers, mp_context=_context(), initializer=_init_worker)

    def __exit__(self, *exc):
        if self.pool is not None:
            self.pool.shutdown(wait=True, cancel_futures=True)
        return False

    def describe(self) -> str:
        return f"local process pool, {self.workers} worker{'s' if self.workers != 1 else ''}"

    def submit(self, fn, task):
        try:
            return self.pool.submit(fn, task)
        except cf.process.BrokenProcessPool:
            self.pool.shutdown(wait=False, cancel_futures=True)
            self._start()
            return self.pool.submit(fn, task)

    def wait_any(self, handles):
        done, _ = cf.wait(list(handles), return_when=cf.FIRST_COMPLETED)
        return list(done)

    def outcome(self, handle):
        try:
            return True, handle.result()
        except cf.process.BrokenProcessPool:
            return False, EngineError("a worker process died (out of memory or killed); the tile will be retried if --retries allows")
        except Exception as exc:
            return False, exc


class DaskEngine:
    """Tasks submitted to an existing Dask distributed scheduler at ``address``."""

    name = "dask"

    def __init__(self, address, connect_timeout_s: float = 10.0):
        self.address = address
        self.connect_timeout_s = connect_timeout_s
        self.client = None
        self.dashboard_link = None
        self._finished = None      # distributed.as_completed over every submitted future

    def __enter__(self):
        try:
            from distributed import Client
        except ImportError:  # pragma: no cover - distributed is a dependency
            raise EngineError("--scheduler needs the 'distributed' package; pip install distributed") from None
        if hasattr(self.address, "scheduler_address"):  # a LocalCluster or similar object
            target = self.address
            self.address = target.scheduler_address
        else:
            target = str(self.address)
        try:
            self.client = Client(target, timeout=self.connect_timeout_s, set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise EngineError(
                f"cannot connect to the Dask scheduler {self.address} ({' '.join(str(exc).split())[:160]}); "
                "start one with `dask scheduler` or check the address (tcp://HOST:PORT)"
            ) from None
        try:
            self.dashboard_link = self.client.dashboard_link
        except Exception:  # pragma: no cover - no dashboard
            self.dashboard_link = None
        return self

    def __exit__(self, *exc):
        if self.client is not None:
            self.client.close()
        return False

    def describe(self) -> str:
        try:
            n = len(self.client.scheduler_info().get("workers", {}))
        except Exception:  # pragma: no cover
            n = "?"
        return f"Dask cluster at {self.address}, {n} worker(s)"

    def submit(self, fn, task):
        from distributed import as_completed

        future = self.client.submit(fn, task, pure=False)
        if self._finished is None:
            self._finished = as_completed([future], loop=self.client.loop)
        else:
            self._finished.add(future)
        return future

    def wait_any(self, handles):
        wanted = set(handles)
        while True:
            done = [f for f in self._finished.next_batch(block=True) if f in wanted]
            if done:
                return done

    def outcome(self, handle):
        try:
            return True, handle.result()
        except Exception as exc:
            return False, exc
        finally:
            handle.release()


def make_engine(workers=None, scheduler=None):
    """The engine for a run: Dask when ``scheduler`` is given, inline for ``workers == 0``,
    else a local process pool (default: one worker per available core)."""
    if scheduler is not None and scheduler != "":
        return DaskEngine(scheduler)
    n = check_workers(workers)
    return InlineEngine() if n == 0 else LocalPoolEngine(n)
