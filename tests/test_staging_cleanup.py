"""Staging leftovers of killed runs: the next run removes those whose owner process is gone
(and only those), and a failed write says in one line that its partial output was removed."""

from __future__ import annotations

import os
import subprocess
import sys

from typer.testing import CliRunner

from denude.cli.main import app
from denude.errors import InputError, OutputError
from denude.io.outdir import discard_staging, parse_staging_name, staging_name


def _dead_pid() -> int:
    """The PID of a process that has just exited (reaped, so nothing answers to it)."""
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def _staging_entry(parent, final_name: str, pid: int, kind: str = "partial"):
    """A staging folder named as a run with process ``pid`` on this host would name it."""
    host = parse_staging_name(staging_name(final_name, kind))["host"]
    entry = parent / f".{final_name}.{kind}-0123abcd.pid{pid}.{host}"
    entry.mkdir()
    (entry / "denudation_mm_per_kyr.tif").write_bytes(b"half a raster")
    return entry


def _map_args(inputs, out):
    p = inputs["paths"]
    return [str(a) for a in ["map", "--lithology", p["lithology"], "--runoff", p["runoff"], "--pco2", p["pco2"],
                             "--temperature", p["temperature"], "--out", out, "--block-size", 16, "--quiet"]]


def test_next_map_removes_a_dead_runs_staging_folder_and_keeps_a_live_one(map_inputs, tmp_path):
    dead = _staging_entry(tmp_path, "earlier", _dead_pid())
    dead_old = _staging_entry(tmp_path, "earlier", _dead_pid(), kind="old")
    live = _staging_entry(tmp_path, "running", os.getpid())        # this test process is alive
    result = CliRunner().invoke(app, _map_args(map_inputs, tmp_path / "out"))
    assert result.exit_code == 0, result.output
    assert not dead.exists() and not dead_old.exists()
    assert live.is_dir() and (live / "denudation_mm_per_kyr.tif").read_bytes() == b"half a raster"
    assert (tmp_path / "out" / "denudation_mm_per_kyr.tif").is_file()


def test_other_hidden_files_and_other_hosts_are_left_alone(map_inputs, tmp_path):
    pid = _dead_pid()
    other_host = tmp_path / f".earlier.partial-0123abcd.pid{pid}.elsewhere-node7"
    other_host.mkdir()
    hidden = tmp_path / ".earlier.notes"
    hidden.write_text("mine")
    assert CliRunner().invoke(app, _map_args(map_inputs, tmp_path / "out")).exit_code == 0
    assert other_host.is_dir() and hidden.read_text() == "mine"


def test_discard_staging_names_the_output_and_keeps_other_errors(tmp_path):
    final = tmp_path / "maps"
    final.mkdir()                                                  # a previous output
    staging = tmp_path / staging_name("maps")
    staging.mkdir()
    (staging / "a.tif").write_bytes(b"x")
    error = OutputError(f"a.tif: writing into {staging} failed (No space left on device); check free disk space")
    replaced = discard_staging([(staging, final)], error)
    assert not staging.exists()
    assert str(replaced) == (f"a.tif: writing into {final} failed (No space left on device); check free disk "
                             "space; the partial output was removed; the previous output (maps) is unchanged")
    other = InputError("runoff raster r.tif cannot be read")
    staging.mkdir()
    assert discard_staging([(staging, final)], other) is other and not staging.exists()
