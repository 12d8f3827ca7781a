"""A full disk: the raster writer fails for lack of space in the middle of `denude map
--overwrite`. The previous output stays intact, the run's partial files are removed, and one
line says what happened."""

from __future__ import annotations

import errno
import hashlib

import numpy as np
import pytest
import rasterio
from typer.testing import CliRunner

import denude.io.rasters as rasters_module
from denude.cli.main import app


class _FillingDisk:
    """A dataset opened for writing whose second block write finds the disk full."""

    def __init__(self, dataset):
        self._dataset = dataset
        self._writes = 0

    def write(self, *args, **kwargs):
        self._writes += 1
        if self._writes >= 2:
            raise OSError(errno.ENOSPC, "No space left on device")
        return self._dataset.write(*args, **kwargs)

    def __getattr__(self, name):
        return getattr(self._dataset, name)


def _tree(folder):
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _args(inputs, out):
    p = inputs["paths"]
    return [str(a) for a in ["map", "--lithology", p["lithology"], "--runoff", p["runoff"], "--pco2", p["pco2"],
                             "--temperature", p["temperature"], "--out", out, "--block-size", 16, "--quiet"]]


def _fill_disk(monkeypatch):
    real_open = rasters_module.rasterio.open

    def opening(path, mode="r", *args, **kwargs):
        dataset = real_open(path, mode, *args, **kwargs)
        return _FillingDisk(dataset) if mode == "w" else dataset

    monkeypatch.setattr(rasters_module.rasterio, "open", opening)


def test_full_disk_keeps_the_previous_output_and_removes_partial_files(map_inputs, tmp_path, monkeypatch):
    out = tmp_path / "out"                                        # first a normal run
    assert CliRunner().invoke(app, _args(map_inputs, out)).exit_code == 0
    before = _tree(out)
    with rasterio.open(out / "denudation_mm_per_kyr.tif") as ds:
        assert np.isfinite(ds.read(1)).any()

    _fill_disk(monkeypatch)
    result = CliRunner().invoke(app, _args(map_inputs, out) + ["--overwrite"])
    assert result.exit_code == 1, result.output
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("denude: error:"), result.stderr
    assert "No space left on device" in lines[0] and "check free disk space" in lines[0]
    assert ".tif" in lines[0]                                     # the file being written is named
    assert "the partial output was removed; the previous output (out) is unchanged" in lines[0], lines[0]
    assert _tree(out) == before                                   # the previous output is intact
    assert sorted(p.name for p in tmp_path.iterdir() if p.name.startswith(".")) == []   # no partial folder
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(["out", *[p.name for p in map_inputs["paths"].values()]])


def test_full_disk_message_says_the_partial_files_were_removed(map_inputs, tmp_path, monkeypatch):
    _fill_disk(monkeypatch)
    result = CliRunner().invoke(app, _args(map_inputs, tmp_path / "out"))
    assert result.exit_code == 1
    line = result.stderr.strip()
    assert "\n" not in line and "the partial output was removed" in line, line
    assert "previous" not in line                              # there was no previous output
    assert ".partial-" not in line                         # names the output, not the hidden staging folder
