"""The cluster's bad days: schedulers that are not there or not Dask, a worker that dies in
the middle of a batch, and a driver killed with its local workers running.

Servers started here listen on 127.0.0.1 only. No test asserts on wall-clock time; the
subprocess timeouts only keep a hang from stalling the suite.
"""

from __future__ import annotations

import http.server
import json
import os
import signal
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin
from typer.testing import CliRunner

from denude.cli.main import app
from denude.execution import engines
from denude.execution.engines import EngineError, parse_scheduler_address, probe_scheduler

CLI = [sys.executable, "-c", "from denude.cli.main import main; main()"]


def _tif(path, data, nodata=None):
    data = np.asarray(data)
    with rasterio.open(path, "w", driver="GTiff", width=data.shape[1], height=data.shape[0], count=1,
                       dtype=data.dtype, crs="EPSG:32632", transform=from_origin(400000, 5200000, 100, 100),
                       nodata=nodata, tiled=True, blockxsize=16, blockysize=16) as ds:
        ds.write(data, 1)
    return path


def job_inputs(folder: Path, rows=48, cols=64):
    folder.mkdir(parents=True, exist_ok=True)
    yy, xx = np.mgrid[0:rows, 0:cols]
    return {
        "lithology": _tif(folder / "lith.tif", ((xx // 5 + yy // 7) % 6).astype(np.int16), nodata=-1),
        "runoff": _tif(folder / "runoff.tif", (250.0 + 3.0 * xx + yy).astype(np.float32)),
        "pco2": _tif(folder / "pco2.tif", (10 ** (-2.6 + 0.01 * xx)).astype(np.float32)),
        "temperature": _tif(folder / "temp.tif", (3.0 + 0.2 * yy).astype(np.float32)),
    }


def batch_args(inputs, out, *extra):
    args = ["batch"]
    for role, path in inputs.items():
        args += [f"--{role}", str(path)]
    return args + ["--out", str(out), "--tile-size", "16", "--block-size", "16", "--quiet", *map(str, extra)]


# ------------------------------------------------------------------ fault servers (127.0.0.1)
class _Silent:
    """Accepts connections and never sends a byte."""

    def __init__(self):
        self.sock = socket.socket()
        self.sock.bind(("127.0.0.1", 0))
        self.sock.listen(8)
        self.port = self.sock.getsockname()[1]
        self.held = []
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self):
        while True:
            try:
                conn, _ = self.sock.accept()
            except OSError:
                return
            self.held.append(conn)

    def close(self):
        self.sock.close()
        for conn in self.held:
            conn.close()


class _Garbage(_Silent):
    """Accepts and answers every connection with bytes that are no Dask greeting."""

    def _run(self):
        while True:
            try:
                conn, _ = self.sock.accept()
            except OSError:
                return
            conn.sendall(b"\xff" * 64)
            self.held.append(conn)


class _QuietHandler(http.server.BaseHTTPRequestHandler):
    def do_GET(self):
        self.send_response(200)
        self.end_headers()
        self.wfile.write(b"<html>status</html>")

    def log_message(self, *args):
        pass


class _Http:
    """A tiny HTTP server (like the dashboard port)."""

    def __init__(self):
        self.server = http.server.HTTPServer(("127.0.0.1", 0), _QuietHandler)
        self.port = self.server.server_address[1]
        threading.Thread(target=self.server.serve_forever, daemon=True).start()

    def close(self):
        self.server.shutdown()
        self.server.server_close()


def _refused_port():
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    port = sock.getsockname()[1]
    sock.close()                     # nothing listens there now
    return port


@pytest.fixture
def fault_server(request):
    kind = request.param
    if kind == "refused":
        yield kind, f"tcp://127.0.0.1:{_refused_port()}"
        return
    server = {"silent": _Silent, "garbage": _Garbage, "http": _Http}[kind]()
    try:
        yield kind, f"tcp://127.0.0.1:{server.port}"
    finally:
        server.close()


EXPECTED = {
    "refused": "connection refused",
    "silent": "no greeting",
    "garbage": "not a Dask scheduler",
    "http": "answers HTTP",
}


@pytest.mark.parametrize("fault_server", list(EXPECTED), indirect=True)
def test_bad_scheduler_fails_with_one_line_and_leaves_nothing(fault_server, tmp_path):
    kind, address = fault_server
    inputs = job_inputs(tmp_path / "in")
    out = tmp_path / "out"
    result = CliRunner().invoke(app, batch_args(inputs, out, "--scheduler", address))
    assert result.exit_code == 1, result.output
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("denude: error:"), result.stderr
    assert address in lines[0] and EXPECTED[kind] in lines[0], lines[0]
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in"]


@pytest.mark.parametrize("address,words", [
    ("", "not a scheduler address"),
    ("tcp://", "names no host"),
    ("tcp://127.0.0.1", "names no port"),
    ("tcp://127.0.0.1:port", "no valid port"),
    ("udp://127.0.0.1:8786", "protocol 'udp'"),
    ("tcp://127.0.0.1:8786/status", "path or query"),
    ("two words", "not a scheduler address"),
])
def test_malformed_scheduler_addresses(address, words):
    with pytest.raises(EngineError, match=words):
        parse_scheduler_address(address)


def test_unknown_host_is_named():
    with pytest.raises(EngineError, match="'no-such-host.invalid' is not known"):
        probe_scheduler("tcp://no-such-host.invalid:8786")


# -------------------------------------------------------------- a worker dies mid-batch (Dask)
@pytest.mark.slow
def test_dask_worker_killed_mid_batch_costs_a_retry_not_the_batch(tmp_path):
    from distributed import Client, LocalCluster

    from denude.execution import run_batch
    from denude.io.jobfile import build_settings

    inputs = job_inputs(tmp_path / "in")
    flags = {k: str(v) for k, v in inputs.items()}

    def settings(out):
        return build_settings({**flags, "out": str(out), "block_size": 16})

    reference = run_batch(settings(tmp_path / "calm"), tile_size=16, workers=0)
    assert reference.ok

    killed = {}
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address="127.0.0.1:0") as cluster, Client(cluster) as client:
        pids = sorted(client.run(os.getpid).values())

        def progress(done, total):
            if done == 1 and not killed:
                os.kill(pids[0], signal.SIGKILL)       # one worker process dies mid-batch
                killed.update(done=done, total=total)

        stormy = run_batch(settings(tmp_path / "stormy"), tile_size=16, scheduler=cluster, progress=progress)
    assert killed and killed["done"] < killed["total"] == 12
    assert stormy.ok and stormy.tiles_run == 12, stormy.tiles_failed
    calm = json.loads((tmp_path / "calm" / "manifest.json").read_text())["tiles"]
    hit = json.loads((tmp_path / "stormy" / "manifest.json").read_text())["tiles"]
    assert sorted(calm) == sorted(hit)
    for tile_id, record in calm.items():                 # byte-identical tiles (SHA-256 of every file)
        assert hit[tile_id]["state"] == "done"
        assert hit[tile_id]["outputs"] == record["outputs"], tile_id


# ---------------------------------------------------------- killing the driver leaves no orphans
def _descendants(pid):
    import psutil

    try:
        return psutil.Process(pid).children(recursive=True)
    except psutil.NoSuchProcess:
        return []


@pytest.mark.slow
def test_killed_driver_leaves_no_worker_processes(tmp_path):
    import psutil

    inputs = job_inputs(tmp_path / "in", rows=256, cols=256)          # 256 tiles: long enough to kill
    out = tmp_path / "out"
    driver = subprocess.Popen(CLI + batch_args(inputs, out, "--workers", "2"), stdout=subprocess.DEVNULL,
                              stderr=subprocess.DEVNULL, env=os.environ.copy())
    workers = []
    try:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and driver.poll() is None:
            tiles = out / "tiles"
            done = [p for p in tiles.iterdir() if not p.name.startswith(".")] if tiles.is_dir() else []
            workers = _descendants(driver.pid)
            if done and len(workers) >= 2:
                break
            time.sleep(0.1)
        assert driver.poll() is None, "the batch finished before it could be killed"
        assert len(workers) >= 2
        driver.send_signal(signal.SIGKILL)
        driver.wait(timeout=30)
        gone, alive = psutil.wait_procs(workers, timeout=60)
        assert alive == [], [p.cmdline() for p in alive]
    finally:
        if driver.poll() is None:
            driver.kill()
        for proc in workers:
            try:
                proc.kill()
            except psutil.NoSuchProcess:
                pass


def test_exit_with_parent_watchdog_ends_an_orphaned_worker(tmp_path):
    """The watchdog alone (no prctl): a grandchild whose watched pid ends exits by itself."""
    script = (
        "import os, sys, time\n"
        "from denude.execution import engines\n"
        "engines.exit_with_parent(int(sys.argv[1]), interval_s=0.1)\n"
        "time.sleep(120)\n"
    )
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(120)"])
    child = subprocess.Popen([sys.executable, "-c", script, str(sleeper.pid)], env=os.environ.copy())
    try:
        sleeper.kill()
        sleeper.wait(timeout=30)
        assert child.wait(timeout=60) == 1
    finally:
        for proc in (sleeper, child):
            if proc.poll() is None:
                proc.kill()
    assert engines._process_alive(os.getpid())
