"""Execution engines of `denude batch` and `denude uncertainty --tile-size`: where the per-tile function runs.

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
import contextlib
import multiprocessing
import os
import socket
import sys
import threading
import time
from urllib.parse import urlsplit

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


@contextlib.contextmanager
def threads_limited(threads: int = 1):
    """``limit_threads(threads)`` for the body of a with-statement, then the previous setting."""
    previous = limit_threads(threads)
    try:
        yield
    finally:
        if previous is not None:
            limit_threads(previous)


#: Linux prctl option: the signal a process gets when its parent dies (linux/prctl.h).
PR_SET_PDEATHSIG = 1
#: Seconds between the worker's checks that the batch driver is still alive.
WATCHDOG_INTERVAL_S = 1.0


def exit_with_parent(driver_pid: int | None = None, interval_s: float = WATCHDOG_INTERVAL_S) -> None:
    """Make this (worker) process end when the process that started the batch ends.

    Two guards: on Linux ``prctl(PR_SET_PDEATHSIG, SIGKILL)`` (the kernel kills this process
    when its parent exits; with the 'forkserver' start method the parent is the fork server,
    which itself exits when the driver's end of its pipe closes), and a daemon thread that
    checks every ``interval_s`` seconds that ``driver_pid`` still exists and otherwise ends
    this process with ``os._exit`` (any platform, and whatever process is the parent)."""
    if sys.platform.startswith("linux"):
        try:
            import ctypes
            import signal

            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)
        except Exception:  # pragma: no cover - no libc prctl: the watchdog still runs
            pass
    if driver_pid is None:
        return

    def watch():
        while True:
            time.sleep(interval_s)
            if not _process_alive(driver_pid) or os.getppid() == 1:
                os._exit(1)

    threading.Thread(target=watch, name="denude-driver-watchdog", daemon=True).start()


def _process_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # pragma: no cover - exists, owned by someone else
        return True
    return True


def _init_worker(driver_pid: int | None = None) -> None:
    limit_threads(1)
    exit_with_parent(driver_pid)


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
        self.pool = cf.ProcessPoolExecutor(max_workers=self.workers, mp_context=_context(), initializer=_init_worker,
                                           initargs=(os.getpid(),))

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
            return False, EngineError("a worker process died (out of memory or killed); give it more memory (fewer --workers "
                                      "or a smaller --tile-size); a batch retries the tile if --retries allows")
        except Exception as exc:
            return False, exc


#: Seconds allowed for the TCP connection to a scheduler, for its greeting, and for the Dask
#: client's own connection after the probe (at most about 12 s in all, inside the 15 s promised).
PROBE_CONNECT_S = 4.0
PROBE_GREETING_S = 3.0
CLIENT_CONNECT_S = 5.0
#: Address schemes a scheduler address may use.
SCHEDULER_SCHEMES = ("tcp", "tls")
#: Largest first message a Dask scheduler plausibly sends (its handshake), bytes.
MAX_GREETING_BYTES = 2**24


def parse_scheduler_address(address: str) -> tuple[str, str, int]:
    """(scheme, host, port) of a scheduler address ``tcp://HOST:PORT`` (``HOST:PORT`` means
    tcp); anything else is a one-line EngineError naming the address."""
    text = str(address).strip()
    fix = "give tcp://HOST:PORT, e.g. tcp://127.0.0.1:8786 (the port `dask scheduler` prints)"
    if not text or any(ch.isspace() for ch in text):
        raise EngineError(f"--scheduler {address!r} is not a scheduler address; {fix}")
    if "://" not in text:
        text = "tcp://" + text
    try:
        parts = urlsplit(text)
        port = parts.port
    except ValueError:
        raise EngineError(f"--scheduler {address!r} has no valid port (1-65535); {fix}") from None
    if parts.scheme not in SCHEDULER_SCHEMES:
        raise EngineError(f"--scheduler {address!r}: protocol {parts.scheme!r} is not one of {', '.join(SCHEDULER_SCHEMES)}; {fix}")
    if not parts.hostname:
        raise EngineError(f"--scheduler {address!r} names no host; {fix}")
    if port is None or not 0 < port < 65536:
        raise EngineError(f"--scheduler {address!r} names no port; {fix}")
    if parts.path not in ("", "/") or parts.query or parts.fragment:
        raise EngineError(f"--scheduler {address!r} has a path or query after the port; {fix}")
    return parts.scheme, parts.hostname, port


def probe_scheduler(address, connect_s: float = PROBE_CONNECT_S, greeting_s: float = PROBE_GREETING_S) -> None:
    """Check, before anything is written, that ``address`` is a Dask scheduler: the address
    parses, the host resolves, the port accepts a TCP connection within ``connect_s`` seconds,
    and (tcp://) the peer sends a Dask greeting within ``greeting_s`` seconds (a Dask scheduler
    writes its handshake first). An HTTP server (e.g. the dashboard port), a port that accepts
    and never answers, a refused or unreachable port: a one-line EngineError naming the address.
    A cluster object (``.scheduler_address``) is probed at that address."""
    if hasattr(address, "scheduler_address"):
        address = address.scheduler_address
    scheme, host, port = parse_scheduler_address(address)
    where = f"Dask scheduler {address}"
    start = "start one with `dask scheduler` or check the address (tcp://HOST:PORT, default port 8786)"
    try:
        sock = socket.create_connection((host, port), timeout=connect_s)
    except socket.gaierror:
        raise EngineError(f"cannot reach the {where}: host {host!r} is not known; check the host name") from None
    except ConnectionRefusedError:
        raise EngineError(f"cannot reach the {where}: connection refused (nothing listens on port {port}); {start}") from None
    except (socket.timeout, TimeoutError):
        raise EngineError(f"cannot reach the {where}: no answer within {connect_s:g} s (host down or a firewall); {start}") from None
    except OSError as exc:
        raise EngineError(f"cannot reach the {where}: {exc.strerror or exc}; {start}") from None
    with sock:
        if scheme != "tcp":   # TLS: the client speaks first; the Dask client checks the rest
            return
        sock.settimeout(greeting_s)
        try:
            head = sock.recv(8)
        except (socket.timeout, TimeoutError):
            head = None
        except OSError as exc:
            raise EngineError(f"the {where} dropped the connection ({exc.strerror or exc}); {start}") from None
        if head is None:
            raise EngineError(f"{address} accepts connections but is not a Dask scheduler ({_silent_peer(sock)}); {start}")
        if head == b"":
            raise EngineError(f"{address} closed the connection without a Dask greeting; it is not a Dask scheduler; {start}")
        if head.startswith(b"HTTP/") or head[:1] == b"<":
            raise EngineError(f"{address} is a web server (answers HTTP), not the Dask scheduler port; {start}")
        size = int.from_bytes(head.ljust(8, b"\0"), "little")
        if len(head) == 8 and not 0 < size <= MAX_GREETING_BYTES:
            raise EngineError(f"{address} answers, but not with a Dask greeting; it is not a Dask scheduler; {start}")


def _silent_peer(sock) -> str:
    """What a peer that sends nothing is: an HTTP server if it answers a request for '/'."""
    try:
        sock.settimeout(1.0)
        sock.sendall(b"GET / HTTP/1.0\r\n\r\n")
        reply = sock.recv(5)
    except OSError:
        reply = b""
    if reply.startswith(b"HTTP"):
        return "it answers HTTP: the dashboard port? the scheduler port is usually 8786"
    return f"no greeting within {PROBE_GREETING_S:g} s"



class DaskEngine:
    """Tasks submitted to an existing Dask distributed scheduler at ``address``."""

    name = "dask"

    def __init__(self, address, connect_timeout_s: float = CLIENT_CONNECT_S):
        self.address = address
        self.connect_timeout_s = connect_timeout_s
        self.client = None
        self.dashboard_link = None
        self._finished = None      # distributed.as_completed over every submitted future
        self._open: set = set()    # submitted futures not yet released

    def __enter__(self):
        try:
            from distributed import Client
        except ImportError:  # pragma: no cover - distributed is a dependency
            raise EngineError("--scheduler needs the 'distributed' package; pip install distributed") from None
        if hasattr(self.address, "scheduler_address"):  # a LocalCluster or similar object
            target = self.address
            self.address = target.scheduler_address
        else:
            target = str(self.address).strip()
            probe_scheduler(target)
        try:
            self.client = Client(target, timeout=self.connect_timeout_s, set_as_default=False)
        except Exception as exc:  # OSError, TimeoutError, ValueError, CommClosedError, ...
            raise EngineError(
                f"cannot connect to the Dask scheduler {self.address} ({' '.join(str(exc).split())[:160]}); "
                "start one with `dask scheduler` or check the address (tcp://HOST:PORT)"
            ) from None
        try:
            self.dashboard_link = self.client.dashboard_link
        except Exception:  # pragma: no cover - no dashboard
            self.dashboard_link = None
        return self

    def __exit__(self, exc_type, *exc):
        if self.client is not None:
            if exc_type is not None and self._open:   # a failed run: no task of it should start late
                try:
                    self.client.cancel(list(self._open), force=True)
                except Exception:  # pragma: no cover - the cluster went away
                    pass
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
        self._open.add(future)
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
            self._open.discard(handle)
            handle.release()


def check_scheduler(scheduler) -> None:
    """Fail fast (before the batch writes anything) when ``scheduler`` is given and is not a
    reachable Dask scheduler; see ``probe_scheduler``. None or "" (no scheduler): nothing."""
    if scheduler is None or scheduler == "":
        return
    probe_scheduler(scheduler)


def make_engine(workers=None, scheduler=None):
    """The engine for a run: Dask when ``scheduler`` is given, inline for ``workers == 0``,
    else a local process pool (default: one worker per available core)."""
    if scheduler is not None and scheduler != "":
        return DaskEngine(scheduler)
    n = check_workers(workers)
    return InlineEngine() if n == 0 else LocalPoolEngine(n)
