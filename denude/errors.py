"""All exceptions raised by denude, under one root class.

Specific errors also inherit a builtin so that callers catching builtins still work.
The CLI turns any ``DenudeError`` into a one-line message on stderr and exit code 1.
"""


class DenudeError(Exception):
    """Root of every error a user can cause (bad input, bad settings)."""


class InputError(DenudeError, ValueError):
    """An input file or value is missing, unreadable or implausible."""


class RasterReadError(InputError):
    """The cells of an input raster cannot be read (truncated file, corrupt or missing tile)."""


class RockTableError(InputError):
    """The rock table (built-in or CSV) is invalid or lacks a code."""


class JobFileError(InputError):
    """The TOML job file has unknown keys or bad values."""


class GridError(InputError):
    """Inputs cannot be put on one target grid (no CRS, no overlap, bad resolution)."""


class OutputError(DenudeError, OSError):
    """An output cannot be written safely (exists, equals an input, not writable)."""


class ZoneError(InputError):
    """A zone, planning-unit or point layer is unusable (empty, no CRS, bad id field)."""


class TileError(DenudeError):
    """One tile of a batch failed (unreadable input, implausible values, unknown codes, write error)."""


class BatchError(OutputError):
    """The batch output folder cannot be used (another job, locked)."""


class EngineError(DenudeError):
    """An execution engine cannot start (bad worker count, unreachable scheduler)."""


class KernelInputError(InputError):
    """Arrays handed to the numeric kernel are unusable (non-integer codes, a code span too wide,
    an unknown method)."""


class DenudeWarning(UserWarning):
    """Root of the warnings the CLI shows as one-line notes."""


class OutOfRangeWarning(DenudeWarning):
    """Some cells were outside the validity range of the constants and became NaN."""


class CoverageWarning(DenudeWarning):
    """An input covers only part of the target grid (the rest becomes nodata)."""


class MosaicOverlapWarning(DenudeWarning):
    """Tiles of a mosaic input overlap; the later tile in mosaic order fills the overlap."""


class GeometryRepairWarning(DenudeWarning):
    """Invalid polygons (e.g. self-intersecting) were repaired with shapely.make_valid."""


def one_line(message: object) -> str:
    """A message (or an exception) collapsed to a single line; an exception without text
    gives its class name."""
    text = " ".join(str(message).split())
    return text or (type(message).__name__ if isinstance(message, BaseException) else "")
