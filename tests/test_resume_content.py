"""Resume that cannot be fooled: input content (SHA-256), not file size and time, decides
which tiles of a batch are computed again."""

from __future__ import annotations

import json
import os
import zipfile

import numpy as np
import rasterio
from rasterio.transform import from_origin

from denude.execution import run_batch
from denude.execution.manifest import archive_of, content_stamp
from denude.io.jobfile import build_settings


def _tif(path, data, origin=(400000.0, 5200000.0)):
    data = np.asarray(data)
    with rasterio.open(path, "w", driver="GTiff", width=data.shape[1], height=data.shape[0], count=1,
                       dtype=data.dtype, crs="EPSG:32632", transform=from_origin(origin[0], origin[1], 100, 100),
                       tiled=True, blockxsize=16, blockysize=16) as ds:
        ds.write(data, 1)
    return path


def _rewrite_same_size_and_time(path, new_data):
    """Write new cell values into ``path`` (uncompressed: same size) and put its times back."""
    st = os.stat(path)
    with rasterio.open(path, "r+") as ds:
        ds.write(new_data, 1)
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert os.stat(path).st_size == st.st_size and os.stat(path).st_mtime_ns == st.st_mtime_ns


def _region(folder, rows=32, cols=64):
    folder.mkdir()
    yy, xx = np.mgrid[0:rows, 0:cols]
    lith = _tif(folder / "lith.tif", ((xx // 5 + yy // 7) % 6).astype(np.int16))
    tiles = folder / "runoff_tiles"
    tiles.mkdir()
    runoff = (300.0 + 2.0 * xx).astype(np.float32)
    west = _tif(tiles / "a_west.tif", runoff[:, :32])
    east = _tif(tiles / "b_east.tif", runoff[:, 32:], origin=(400000.0 + 3200.0, 5200000.0))
    return {"lithology": str(lith), "runoff": str(tiles), "pco2": "0.01", "temperature": "10"}, west, east


def test_rewritten_mosaic_tile_with_same_size_and_time_recomputes_exactly_its_tiles(tmp_path):
    flags, west, east = _region(tmp_path / "in")
    settings = build_settings({**flags, "out": str(tmp_path / "out"), "block_size": 16})
    first = run_batch(settings, tile_size=16, workers=0)
    assert first.ok and first.tiles_total == 8 and first.tiles_run == 8

    again = run_batch(settings, tile_size=16, workers=0)
    assert again.tiles_run == 0 and again.tiles_skipped == 8

    with rasterio.open(east) as ds:
        values = ds.read(1)
    _rewrite_same_size_and_time(east, values + 100.0)
    notes = []
    third = run_batch(settings, tile_size=16, workers=0, log=notes.append)
    # the east runoff file covers cells 32-63 (tile columns 2 and 3); a tile counts as reading
    # it when the tile widened by the warp margin (4 cells) touches it, so column 1 (cells
    # 16-31, edge at 32) counts too and column 0 (cells 0-15) does not: 2 rows x 3 columns
    assert third.ok and third.tiles_run == 6 and third.tiles_skipped == 2
    assert "6 of 8 tiles recomputed: their inputs changed since the last run (content checksums)" in notes
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())["tiles"]
    assert all(rec["state"] == "done" for rec in manifest.values())
    with rasterio.open(tmp_path / "out" / "denudation_mm_per_kyr.vrt") as ds:
        rate = ds.read(1)
    assert np.isfinite(rate).all()


def test_rewritten_single_file_recomputes_every_tile(tmp_path):
    flags, _, _ = _region(tmp_path / "in")
    settings = build_settings({**flags, "out": str(tmp_path / "out"), "block_size": 16})
    assert run_batch(settings, tile_size=16, workers=0).tiles_run == 8
    lith = flags["lithology"]
    with rasterio.open(lith) as ds:
        codes = ds.read(1)
    _rewrite_same_size_and_time(lith, np.where(codes == 1, 2, codes).astype(np.int16))
    notes = []
    summary = run_batch(settings, tile_size=16, workers=0, log=notes.append)
    assert summary.tiles_run == 8 and summary.tiles_skipped == 0
    assert notes == ["8 of 8 tiles recomputed: their inputs changed since the last run (content checksums)"]


def test_content_stamps_of_local_archive_and_remote_paths(tmp_path):
    member = _tif(tmp_path / "r.tif", np.full((16, 16), 400.0, np.float32))
    archive = tmp_path / "fields.zip"
    with zipfile.ZipFile(archive, "w") as zf:
        zf.write(member, "r.tif")
    for path in (f"/vsizip/{archive}/r.tif", f"/vsizip/{{{archive}}}/r.tif"):
        assert archive_of(path) == (str(archive), "r.tif")
    before = content_stamp(f"/vsizip/{archive}/r.tif")
    assert before[1] == "archive-sha256" and len(before[2][0]) == 64
    st = os.stat(archive)
    data = bytearray(archive.read_bytes())
    data[-30] ^= 0xFF                                   # one byte of the archive changes
    archive.write_bytes(bytes(data))
    os.utime(archive, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert content_stamp(f"/vsizip/{archive}/r.tif") != before
    assert content_stamp(str(member))[1] == "sha256"
    assert content_stamp(str(tmp_path / "gone.tif")) == [str(tmp_path / "gone.tif"), None, None]
