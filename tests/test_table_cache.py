"""The file cache of the load tables (denude.io.table_cache): a cached table is the built
one bit for bit, and a bad, foreign or unwritable cache only costs a rebuild."""

import json
import os
import subprocess
import sys

import numpy as np
import pytest

from denude.core import lookup
from denude.io import table_cache

# the same cells in every process: one per built-in rock, mixed temperatures and PCO2
_SCRIPT = """
import json, sys, numpy as np
from denude.io.table_cache import prime_tables
how = prime_tables(sys.argv[1])
from denude.core.kernel import compute_block
from denude.core.lookup import stacked_tables
from denude.core.rocks import RockTable
r = RockTable.builtin().lookup()
c = np.repeat(np.asarray(r.codes, np.int32), 3)
t = np.tile([2.0, 11.5, 37.25], len(r.codes))
p = np.tile([3e-4, 0.012, 0.08], len(r.codes))
out = compute_block(c, 480.0 + 0 * t, p, t, r, sys.argv[1], warn=False)
stack, grid = stacked_tables(sys.argv[1])
import hashlib
print(json.dumps([how, hashlib.sha256(stack.tobytes()).hexdigest(), list(grid),
                  out.denudation_mm_per_kyr.astype(float).tolist()]))
"""


def _run(cache: str, chemistry: str = "white"):
    env = {**os.environ, "DENUDE_CACHE_DIR": cache}
    proc = subprocess.run([sys.executable, "-c", _SCRIPT, chemistry], capture_output=True, text=True, env=env,
                          check=True)
    return json.loads(proc.stdout.strip().splitlines()[-1])


@pytest.mark.parametrize("chemistry", ["white", "speciated"])
def test_a_cached_table_is_the_built_one_bit_for_bit(tmp_path, chemistry):
    cache = str(tmp_path / "cache")
    first, second, uncached = _run(cache, chemistry), _run(cache, chemistry), _run("off", chemistry)
    assert (first[0], second[0], uncached[0]) == ("built", "file", "built (cache off)")
    assert first[1:] == second[1:] == uncached[1:]
    assert any(v > 0 for v in first[3])
    assert len(list((tmp_path / "cache").glob("load_tables_*.npy"))) == 1
    assert not list((tmp_path / "cache").glob(".*"))          # no temporary file left


def test_a_damaged_or_foreign_cache_file_is_rebuilt(tmp_path, monkeypatch):
    monkeypatch.setenv("DENUDE_CACHE_DIR", str(tmp_path))
    path = table_cache.table_path("white")
    path.write_bytes(b"not a table")
    assert table_cache._read(path) is None
    good = tmp_path / "good.npy"
    np.save(good, np.zeros((4, 181, 401), np.float32))
    for damaged in (good.read_bytes()[:200], b"\x93NUMPY" + b"\0" * 64):   # a truncated array, header-like garbage
        path.write_bytes(damaged)
        assert table_cache._read(path) is None
    path.write_bytes(good.read_bytes()[:200])
    assert _run(str(tmp_path))[0] == "built"          # and the run goes on (no traceback)
    stack, grid = lookup._build_stacked_tables("white")
    np.save(path, stack[:, :10])          # another shape
    assert table_cache._read(path) is not None
    with pytest.raises(ValueError, match="shape"):
        lookup.seed_stacked_tables("white", table_cache._read(path))
    # a fresh process takes neither: it rebuilds, and replaces the file with a good one
    result = _run(str(tmp_path))
    assert result[0] == "built" and result[1:] == _run("off")[1:]
    assert _run(str(tmp_path))[0] == "file"


def test_the_key_follows_chemistry_version_and_core_sources(monkeypatch):
    white, speciated = table_cache.table_key("white"), table_cache.table_key("speciated")
    assert white != speciated and len(white) == 64
    monkeypatch.setattr(table_cache, "_core_sources_sha256", lambda: "0" * 64)
    assert table_cache.table_key("white") != white
    monkeypatch.undo()
    monkeypatch.setattr("denude.__version__", "0.0.0-other")
    assert table_cache.table_key("white") != white


def test_an_unwritable_cache_or_the_cache_off_costs_only_a_build(tmp_path, monkeypatch):
    blocker = tmp_path / "file"
    blocker.write_text("a file where the cache folder should be")
    monkeypatch.setenv("DENUDE_CACHE_DIR", str(blocker / "sub"))
    assert table_cache.cache_dir() == blocker / "sub"
    result = _run(str(blocker / "sub"))
    assert result[0] == "built" and result[1:] == _run("off")[1:]
    monkeypatch.setenv("DENUDE_CACHE_DIR", "off")
    assert table_cache.cache_dir() is None and table_cache.table_path("white") is None
    monkeypatch.delenv("DENUDE_CACHE_DIR")
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    assert table_cache.cache_dir() == tmp_path / "xdg" / "denude"
