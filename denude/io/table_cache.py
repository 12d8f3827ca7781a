"""A file cache of the kernel's stacked load tables (``denude.core.lookup.stacked_tables``).

Building the tables solves the equilibria on 181 x 401 nodes per mineral (about 0.1 s of
Python, on the critical path of every run's start, in every batch worker process). The cache
keeps them as ``.npy`` files (one float32 array; its grid is this code's, so part of the key)
keyed on the SHA-256 of the chemistry mode, the package and numpy versions, the machine
architecture and the source of every module of ``denude.core`` (any change to the numerics
makes a new key, so a stale table is never read) and seeds the core's in-process table with
them.

Where: ``$DENUDE_CACHE_DIR``, else ``$XDG_CACHE_HOME/denude``, else ``~/.cache/denude``;
``DENUDE_CACHE_DIR=off`` disables it. Files are written under a temporary name and renamed,
so concurrent runs never read half a file; any failure to read or write falls back to
building the tables in memory (a cache can only save time, never change a number: tested
bit for bit against a fresh build).
"""

from __future__ import annotations

import functools
import hashlib
import os
import platform
import tempfile
from pathlib import Path

import numpy as np

import denude
from denude.core import lookup

#: Environment variable naming the cache folder ("off": no file cache).
CACHE_ENV = "DENUDE_CACHE_DIR"
#: Format of the cached file; bumped when its layout changes.
_FORMAT = 1


def cache_dir() -> Path | None:
    """The cache folder, or None when the cache is off."""
    given = os.environ.get(CACHE_ENV)
    if given is not None:
        return None if given.strip().lower() in ("", "off", "0", "none") else Path(given)
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "denude"


@functools.lru_cache(maxsize=None)
def _core_sources_sha256() -> str:
    core = Path(lookup.__file__).parent
    digest = hashlib.sha256()
    for path in sorted(core.glob("*.py")):
        digest.update(path.name.encode())
        digest.update(path.read_bytes())
    return digest.hexdigest()


def table_key(chemistry: str) -> str:
    """SHA-256 (hex) naming the cached tables of ``chemistry`` for this code."""
    digest = hashlib.sha256()
    for part in (str(_FORMAT), denude.__version__, np.__version__, platform.machine(), chemistry,
                 _core_sources_sha256()):
        digest.update(part.encode() + b"\0")
    return digest.hexdigest()


def table_path(chemistry: str) -> Path | None:
    folder = cache_dir()
    return None if folder is None else folder / f"load_tables_{chemistry}_{table_key(chemistry)[:24]}.npy"


def prime_tables(chemistry: str) -> str:
    """Make ``lookup.stacked_tables(chemistry)`` ready in this process: from the file cache
    when it holds this code's tables, else built and stored for the next run. Returns how:
    'memory' (already built here), 'file', 'built' or 'built (cache off)'."""
    if lookup.has_stacked_tables(chemistry):
        return "memory"
    path = table_path(chemistry)
    if path is not None:
        cached = _read(path)
        if cached is not None:
            try:
                lookup.seed_stacked_tables(chemistry, cached)
                return "file"
            except ValueError:
                pass        # another layout (a damaged file): built again and replaced below
    stack, _ = lookup.stacked_tables(chemistry)
    if path is None:
        return "built (cache off)"
    _write(path, stack)
    return "built"


def _read(path: Path) -> np.ndarray | None:
    """The stacked tables of a cache file, or None for a missing or damaged one."""
    try:
        stack = np.ascontiguousarray(np.load(path, allow_pickle=False))
    except Exception:     # any damage (truncated, foreign file): built again and replaced
        return None
    if stack.dtype != np.float32 or stack.ndim != 3 or not np.all(np.isfinite(stack)):
        return None
    return stack


def _write(path: Path, stack: np.ndarray) -> None:
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=".tmp", dir=path.parent)
        try:
            with os.fdopen(fd, "wb") as f:
                np.save(f, stack, allow_pickle=False)
            os.replace(tmp, path)
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise
    except OSError:
        pass   # a read-only or full disk: the tables stay in memory for this run
