"""Read zone, planning-unit and point layers; check CRS, ids and geometry; write result layers.

Every user-caused problem raises ``ZoneError`` (or ``OutputError``) with one line naming the
file, the value and the fix.
"""

from __future__ import annotations

import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import shapely

from denude.errors import GeometryRepairWarning, OutputError, ZoneError

#: Name of the id column when the user gives no id field (values: the layer's feature ids).
DEFAULT_ID_FIELD = "zone_id"


@dataclass
class PolygonLayer:
    """Polygons read from a vector file: ``frame`` (repaired geometry, the file's own CRS) and
    ``geometry`` (the same polygons in the target CRS, a shapely array)."""

    path: Path
    layer: str
    id_field: str
    frame: object              # geopandas.GeoDataFrame, original CRS, repaired geometry
    geometry: np.ndarray       # shapely geometries in the target CRS
    repaired: int = 0          # geometries made valid
    reprojected_from: str | None = None

    @property
    def ids(self):
        return self.frame[self.id_field].to_numpy()

    def __len__(self):
        return len(self.frame)


@dataclass
class PointLayer:
    """Points read from a vector file (``frame`` in the file's CRS, ``geometry`` in the target CRS)."""

    path: Path
    layer: str
    frame: object
    geometry: np.ndarray
    reprojected_from: str | None = None
    extra: dict = field(default_factory=dict)

    def __len__(self):
        return len(self.frame)


def _layers(path: Path, what: str) -> list[str]:
    import pyogrio

    if not path.exists():
        raise ZoneError(f"{path}: {what} file not found; give the path of a GeoPackage or other vector file")
    if path.is_dir() and path.suffix.lower() not in (".gdb",):
        raise ZoneError(f"{path}: is a folder; give the path of a GeoPackage, Shapefile or GeoJSON {what} file")
    if path.is_file() and path.stat().st_size == 0:
        raise ZoneError(f"{path}: the {what} file is empty (0 bytes); give a GeoPackage, Shapefile or GeoJSON with {what} features")
    try:
        with warnings.catch_warnings():      # GDAL's notes on a broken file: the error says enough
            warnings.simplefilter("ignore", RuntimeWarning)
            return [str(name) for name in pyogrio.list_layers(path)[:, 0]]
    except Exception as exc:  # pyogrio raises DataSourceError and friends
        reason = " ".join(str(exc).split())[:160]
        raise ZoneError(f"{path}: not a readable vector file ({reason}); give a GeoPackage, Shapefile or GeoJSON") from None


def _read_frame(path, layer, what):
    """Open one layer as a GeoDataFrame with the feature ids as index."""
    import geopandas

    path = Path(path)
    names = _layers(path, what)
    if layer is None:
        if len(names) > 1:
            raise ZoneError(f"{path}: has {len(names)} layers ({', '.join(names)}); choose one with the layer option")
        if not names:
            raise ZoneError(f"{path}: has no layers; give a file with one {what} layer")
        layer = names[0]
    elif layer not in names:
        raise ZoneError(f"{path}: no layer {layer!r}; choose one of {', '.join(names)}")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            frame = geopandas.read_file(path, layer=layer, engine="pyogrio", fid_as_index=True)
    except Exception as exc:
        reason = " ".join(str(exc).split())[:160]
        raise ZoneError(f"{path}: layer {layer!r} cannot be read ({reason}); check the file opens in a GIS, or export it again") from None
    if not isinstance(frame, geopandas.GeoDataFrame):
        raise ZoneError(f"{path}: layer {layer!r} has no geometry column (a plain table?); give a layer of {what} features")
    if len(frame) == 0:
        raise ZoneError(f"{path}: layer {layer!r} is empty; give a layer with at least one {what} feature")
    if frame.crs is None:
        raise ZoneError(f"{path}: layer {layer!r} has no CRS; assign one (e.g. ogr2ogr -a_srs EPSG:XXXX) and retry")
    return frame, layer


def _to_target(frame, target_crs, path, layer):
    """Geometries of ``frame`` in ``target_crs`` (shapely array) and the source CRS if reprojected."""
    if target_crs is None or frame.crs == target_crs:
        return np.asarray(frame.geometry.values, dtype=object), None
    try:
        moved = frame.geometry.to_crs(target_crs)
    except Exception as exc:
        raise ZoneError(f"{path}: layer {layer!r} cannot be reprojected to the raster CRS ({' '.join(str(exc).split())})") from None
    return np.asarray(moved.values, dtype=object), frame.crs.to_string()


def _polygonal(geom):
    """The polygonal part of a (repaired) geometry, as a Polygon/MultiPolygon (maybe empty)."""
    if geom is None or geom.is_empty:
        return shapely.MultiPolygon()
    if geom.geom_type in ("Polygon", "MultiPolygon"):
        return geom
    parts = [p for p in shapely.get_parts(geom) if p.geom_type in ("Polygon", "MultiPolygon")]
    if not parts:
        return shapely.MultiPolygon()
    return shapely.union_all(parts)


def read_polygons(path, layer=None, id_field=None, target_crs=None, what="zone") -> PolygonLayer:
    """Read a polygon layer: one row per feature, unique non-null ids from ``id_field`` (or the
    feature ids as ``zone_id``), invalid geometries repaired with ``shapely.make_valid`` and
    counted, geometries reprojected to ``target_crs`` (a pyproj/rasterio CRS)."""
    path = Path(path)
    frame, layer = _read_frame(path, layer, what)
    if id_field is None:
        id_field = DEFAULT_ID_FIELD
        if id_field in frame.columns:
            raise ZoneError(f"{path}: layer {layer!r} already has a column {id_field!r}; name it as the id field")
        frame = frame.copy()
        frame.insert(0, id_field, frame.index.to_numpy())
    elif id_field not in frame.columns and id_field == frame.index.name:   # e.g. the GeoPackage "fid"
        frame = frame.copy()
        frame.insert(0, id_field, frame.index.to_numpy())
    elif id_field not in frame.columns or id_field == frame.geometry.name:
        fields = [c for c in frame.columns if c != frame.geometry.name]
        raise ZoneError(
            f"{path}: layer {layer!r} has no field {id_field!r}; choose one of {', '.join(map(str, fields)) or '(no fields)'}"
        )
    ids = frame[id_field]
    if ids.isna().any():
        raise ZoneError(f"{path}: field {id_field!r} is empty in {int(ids.isna().sum())} feature(s); give every {what} an id")
    dup = ids[ids.duplicated()]
    if len(dup):
        raise ZoneError(
            f"{path}: field {id_field!r} has duplicate id {dup.iloc[0]!r} ({len(dup)} duplicate(s)); give each {what} a unique id"
        )
    geoms = np.asarray(frame.geometry.values, dtype=object)
    types = set(shapely.get_type_id(geoms[~shapely.is_missing(geoms)]).tolist())
    if types - {3, 6, 7}:  # Polygon, MultiPolygon, GeometryCollection (kept only if polygonal)
        kinds = sorted({g.geom_type for g in geoms if g is not None})
        raise ZoneError(f"{path}: layer {layer!r} holds {', '.join(kinds)} geometries; {what}s must be polygons")
    invalid = ~shapely.is_valid(geoms) & ~shapely.is_missing(geoms)
    repaired = int(invalid.sum())
    fixed = geoms.copy()
    if repaired:
        fixed[invalid] = shapely.make_valid(geoms[invalid])
        first = frame[id_field].to_numpy()[np.flatnonzero(invalid)[0]]
        first = first.item() if hasattr(first, "item") else first
        reason = shapely.is_valid_reason(geoms[np.flatnonzero(invalid)[0]])
        warnings.warn(GeometryRepairWarning(
            f"{path}: layer {layer!r}: {repaired} invalid {what} polygon(s) repaired with shapely.make_valid "
            f"(first: {id_field} {first!r}, {reason}); check them if the areas matter"
        ))
    fixed = np.array([_polygonal(g) for g in fixed], dtype=object)
    frame = frame.set_geometry(list(fixed), crs=frame.crs)
    target, source = _to_target(frame, target_crs, path, layer)
    return PolygonLayer(path, layer, id_field, frame, target, repaired, source)


def read_points(path, layer=None, target_crs=None, what="sinkhole") -> PointLayer:
    """Read a point layer and reproject it to ``target_crs``; the layer must have a CRS."""
    path = Path(path)
    frame, layer = _read_frame(path, layer, what)
    geoms = np.asarray(frame.geometry.values, dtype=object)
    present = ~shapely.is_missing(geoms)
    kinds = set(shapely.get_type_id(geoms[present]).tolist())
    if kinds - {0}:
        names = sorted({g.geom_type for g in geoms[present]})
        raise ZoneError(f"{path}: layer {layer!r} holds {', '.join(names)} geometries; {what}s must be single points")
    target, source = _to_target(frame, target_crs, path, layer)
    return PointLayer(path, layer, frame, target, source)


def check_output_path(out, inputs=()) -> Path:
    """Validate the output GeoPackage path: .gpkg, folder exists, not one of the inputs."""
    out = Path(out)
    if out.suffix.lower() != ".gpkg":
        raise OutputError(f"{out}: the output must be a GeoPackage; give a name ending in .gpkg")
    if not out.parent.exists():
        raise OutputError(f"{out}: folder {out.parent} does not exist; create it or choose another output path")
    for item in inputs:
        if item is not None and Path(item).exists() and out.exists() and os.path.samefile(out, item):
            raise OutputError(f"{out}: the output is also an input; choose another output path")
    return out


def write_layers(path, layers: dict) -> None:
    """Write GeoDataFrames as layers of one new GeoPackage at ``path`` (must not exist)."""
    import pyogrio

    path = Path(path)
    for name, frame in layers.items():
        try:
            pyogrio.write_dataframe(frame, path, layer=name, driver="GPKG", append=False)
        except Exception as exc:
            raise OutputError(f"{path}: cannot write layer {name!r} ({' '.join(str(exc).split())})") from None


def vector_files(path: Path) -> list[Path]:
    """A vector file and its sidecars (shapefile parts)."""
    if path.suffix.lower() == ".shp":
        return sorted(p for p in path.parent.glob(path.stem + ".*") if p.is_file())
    return [path]


#: Prefix given to a user's attribute whose name clashes with a summary column.
CLASH_PREFIX = "user_"


def user_attributes(frame, skip=(), taken=()) -> dict:
    """The attribute columns of a user's layer (not its geometry nor the ``skip`` columns),
    as name -> array; a name in ``taken`` (the summary's own columns) gets ``CLASH_PREFIX``
    (again, until free)."""
    out = {}
    used = set(taken) | set(skip)
    for column in frame.columns:
        if column == frame.geometry.name or column in skip:
            continue
        name = str(column)
        while name in used or name in out:
            name = CLASH_PREFIX + name
        out[name] = frame[column].to_numpy()
    return out
