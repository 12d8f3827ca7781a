"""Output folders and files: checks, staging under a temporary name, atomic rename, clean-up.

One idiom for every writer (`map`, `batch` tiles, merged layers, `summarize` files): write
under a hidden staging name next to the final one, then rename into place, so a reader never
sees a half-written output and a failed run leaves nothing under the final name.

Staging names record their owner, ``.<final name>.<kind>-<token>.pid<PID>.<host>``, so a later
run can tell an abandoned staging entry (its process is gone) from one still being written:
``remove_dead_staging(parent)`` removes only the former.
"""

from __future__ import annotations

import os
import re
import shutil
import socket
import uuid
from contextlib import contextmanager
from pathlib import Path

from denude.errors import OutputError

#: Kinds of staging entries: being written, or an old output moved aside while replaced.
STAGING_KINDS = ("partial", "old")

_STAGING_RE = re.compile(
    r"^\.(?P<name>.+)\.(?P<kind>partial|old)-(?P<token>[0-9a-f]{8})\.pid(?P<pid>\d+)\.(?P<host>[A-Za-z0-9-]+)(?P<suffix>\.[A-Za-z0-9]+)?$"
)


def _host() -> str:
    """This machine's name reduced to letters, digits and '-' (safe in a file name)."""
    name = socket.gethostname().split(".")[0] or "host"
    return re.sub(r"[^A-Za-z0-9-]", "-", name)


def staging_name(final_name: str, kind: str = "partial", keep_suffix: bool = False) -> str:
    """Hidden name for an entry staged (``partial``) or moved aside (``old``) next to ``final_name``.
    ``keep_suffix``: end with the final name's suffix too (for drivers that check it, e.g. GPKG)."""
    if kind not in STAGING_KINDS:
        raise ValueError(f"staging kind {kind!r} is not one of {STAGING_KINDS}")
    suffix = Path(final_name).suffix if keep_suffix else ""
    return f".{final_name}.{kind}-{uuid.uuid4().hex[:8]}.pid{os.getpid()}.{_host()}{suffix}"


def staging_path(final, kind: str = "partial", keep_suffix: bool = False) -> Path:
    """A staging path next to ``final`` (same folder, so the rename is atomic)."""
    final = Path(final)
    return final.with_name(staging_name(final.name, kind, keep_suffix))


def parse_staging_name(name: str) -> dict | None:
    """``{"name", "kind", "pid", "host"}`` of a staging entry's name, or None for other names."""
    match = _STAGING_RE.match(name)
    if match is None:
        return None
    return {"name": match["name"], "kind": match["kind"], "pid": int(match["pid"]), "host": match["host"]}


def _process_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:       # exists, owned by someone else
        return True
    return True


def remove_dead_staging(parent) -> list[Path]:
    """Remove staging entries in ``parent`` whose owner process (on this host) is gone.
    Entries of live processes, of other hosts and every other file are left alone.
    Returns the paths removed."""
    parent = Path(parent)
    removed = []
    try:
        entries = list(parent.iterdir())
    except OSError:
        return removed
    host = _host()
    for entry in entries:
        owner = parse_staging_name(entry.name)
        if owner is None or owner["host"] != host or _process_alive(owner["pid"]):
            continue
        remove_path(entry)
        removed.append(entry)
    return removed


def remove_path(path) -> None:
    """Remove a file or a folder tree; a missing one is fine."""
    path = Path(path)
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path, ignore_errors=True)
    else:
        try:
            path.unlink()
        except FileNotFoundError:
            pass


def fsync_dir(folder) -> None:
    """Flush a folder's entries (renames) to disk; ignored where unsupported."""
    try:
        fd = os.open(str(folder), os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def check_new_folder(out, overwrite: bool, what: str = "output folder") -> Path:
    """The resolved output folder ``out``, refused when it is a file, exists (without
    ``overwrite``) or its parent folder is missing."""
    if out is None:
        raise OutputError("no output folder given; give --out OUTDIR")
    out = Path(out).resolve()
    if out.exists() and not out.is_dir():
        raise OutputError(f"output {out} exists and is a file; give a folder path for --out")
    if out.exists() and not overwrite:
        raise OutputError(f"{what} {out} already exists; use --overwrite or give a new --out")
    if not out.parent.is_dir():
        raise OutputError(f"parent folder of the output {out.parent} does not exist; create it first")
    return out


def check_new_files(paths, overwrite: bool) -> None:
    """Refuse existing output files unless ``overwrite``."""
    if overwrite:
        return
    for item in paths:
        if Path(item).exists():
            raise OutputError(f"{item}: already exists; remove it, choose another output or pass --overwrite")


def make_staging_dir(final) -> Path:
    """Create and return a staging folder next to the folder ``final``."""
    final = Path(final)
    staging = staging_path(final)
    try:
        staging.mkdir(parents=True)
    except OSError as exc:
        raise OutputError(
            f"cannot create a folder next to {final} ({exc.strerror}); check the parent folder is writable"
        ) from None
    return staging


def commit_dir(staging, final, overwrite: bool = True, durable: bool = False) -> None:
    """Rename the finished folder ``staging`` to ``final``; an existing ``final`` is moved aside
    first and removed afterwards (refused unless ``overwrite``). ``durable``: fsync the parent."""
    staging, final = Path(staging), Path(final)
    old = None
    if final.exists():
        if not overwrite:
            raise OutputError(f"output folder {final} already exists; use --overwrite or give a new --out")
        old = staging_path(final, "old")
        final.rename(old)
    staging.rename(final)
    if durable:
        fsync_dir(final.parent)
    if old is not None:
        remove_path(old)


def discard_folder(final) -> None:
    """Remove the folder ``final`` by renaming it aside first (readers never see it half-deleted)."""
    final = Path(final)
    old = staging_path(final, "old")
    final.rename(old)
    remove_path(old)


def discard_staging(staged, error: BaseException) -> BaseException:
    """Remove the staging entries of a failed write, ``staged``: (staging, final) pairs, and
    return the error to raise. An ``OutputError`` (a full disk, an unwritable folder) becomes
    one line naming the final paths rather than the hidden staging names and saying the partial
    output was removed and any previous output kept; other errors are returned as they are."""
    staged = [(Path(tmp), Path(final)) for tmp, final in staged]
    for tmp, _ in staged:
        remove_path(tmp)
    if not isinstance(error, OutputError) or "partial output" in str(error):
        return error
    text = str(error)
    for tmp, final in staged:
        text = text.replace(str(tmp), str(final)).replace(tmp.name, final.name)
    kept = [final.name for _, final in staged if final.exists()]
    tail = f"; the previous output ({', '.join(kept)}) is unchanged" if kept else ""
    return OutputError(f"{text}; the partial output was removed{tail}")


def raise_discarded(staged, error: BaseException):
    """Raise what ``discard_staging`` returns (an OutputError without the staging traceback)."""
    replaced = discard_staging(staged, error)
    if replaced is error:
        raise error
    raise replaced from None


@contextmanager
def staged_dir(final, overwrite: bool = True, durable: bool = False):
    """``with staged_dir(final) as staging:`` write into ``staging``; on a clean exit it is renamed
    to ``final``; on any error it is removed and the error passes on."""
    staging = make_staging_dir(final)
    try:
        yield staging
        commit_dir(staging, final, overwrite, durable)
    except BaseException as exc:
        raise_discarded([(staging, final)], exc)


@contextmanager
def staged_files(finals):
    """``with staged_files([a, b]) as tmp:`` write each ``tmp[i]`` (staging names next to each
    final path, keeping its suffix); on a clean exit all are renamed into place, on an error
    all are removed."""
    finals = [Path(f) for f in finals]
    temps = [staging_path(f, keep_suffix=True) for f in finals]
    try:
        yield temps
        for tmp, final in zip(temps, finals):
            try:
                os.replace(tmp, final)
            except OSError as exc:
                raise OutputError(
                    f"{final}: cannot be replaced ({exc.strerror or exc}); remove it or choose another output"
                ) from None
    except BaseException as exc:
        raise_discarded(zip(temps, finals), exc)


def write_text_atomic(path, text: str) -> bool:
    """Write ``text`` to ``path`` via a staging file, fsync and rename; skip (return False)
    when the file already holds exactly this text."""
    path = Path(path)
    data = text.encode("utf-8")
    try:
        if path.is_file() and path.read_bytes() == data:
            return False
    except OSError:
        pass
    tmp = staging_path(path)
    try:
        with open(tmp, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        remove_path(tmp)
        raise OutputError(f"{path}: cannot write ({exc.strerror or exc}); check the folder is writable") from None
    fsync_dir(path.parent)
    return True


def fsync_file(path) -> None:
    """Flush one file's content to disk."""
    with open(path, "rb") as handle:
        os.fsync(handle.fileno())
