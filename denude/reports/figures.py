"""Map figures of a `denude map` folder for the report (matplotlib, no display needed).

Every map carries a title, a legend or colour bar with units, a scale bar, a north arrow and
the CRS. Rasters are read decimated to at most ``MAX_SIDE`` cells a side (nearest for classes,
average for rates), which is plenty for a page and keeps large maps cheap.
"""

from __future__ import annotations

import io
import struct
import math
from dataclasses import dataclass

import numpy as np

#: Longest side of a raster read for a figure [cells].
MAX_SIDE = 900
#: Figure size [inches] and resolution [dots per inch] of the map PNGs.
MAP_SIZE_IN = (7.6, 5.4)
DPI = 110
#: A rate range wider than this ratio (max / 1st percentile of positive rates), one decade,
#: is drawn on a log scale.
LOG_SCALE_RATIO = 10.0


@dataclass
class Figure:
    """One PNG of the report: file stem, title, caption, bytes and pixel size."""

    name: str
    title: str
    caption: str
    png: bytes
    width: int
    height: int


def _mpl():
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    return plt


def read_decimated(path, categorical: bool):
    """(array, extent (l, r, b, t), crs, nodata) of band 1, at most MAX_SIDE cells a side;
    nodata and NaN as a masked array."""
    import rasterio
    from rasterio.enums import Resampling

    with rasterio.open(path) as ds:
        step = max(1, math.ceil(max(ds.width, ds.height) / MAX_SIDE))
        shape = (max(1, ds.height // step), max(1, ds.width // step))
        data = ds.read(1, out_shape=shape, masked=True,
                       resampling=Resampling.nearest if categorical else Resampling.average)
        b = ds.bounds
        return np.ma.masked_invalid(data) if data.dtype.kind == "f" else data, (b.left, b.right, b.bottom, b.top), ds.crs, ds.nodata


def crs_label(crs) -> str:
    """'EPSG:32633 - WGS 84 / UTM zone 33N' (or the CRS name alone)."""
    from pyproj import CRS

    c = CRS.from_user_input(crs.to_wkt() if hasattr(crs, "to_wkt") else crs)
    epsg = c.to_epsg()
    return f"EPSG:{epsg} - {c.name}" if epsg else c.name


def metres_per_unit(crs, latitude: float) -> float:
    """Ground metres per CRS unit along x (degrees: at ``latitude``, spherical; else the axis unit)."""
    from pyproj import CRS

    c = CRS.from_user_input(crs.to_wkt() if hasattr(crs, "to_wkt") else crs)
    if c.is_geographic:
        return 111_320.0 * math.cos(math.radians(latitude))   # metres per degree of longitude (from memory)
    axes = c.axis_info
    return axes[0].unit_conversion_factor if axes else 1.0


def nice_length_m(span_m: float) -> float:
    """A round scale-bar length [m] near a fifth of ``span_m``: 1, 2 or 5 times a power of ten."""
    target = max(span_m / 5.0, 1e-9)
    power = 10 ** math.floor(math.log10(target))
    for step in (5, 2, 1):
        if step * power <= target:
            return step * power
    return power


def decorate(ax, extent, crs, title: str) -> None:
    """Title, scale bar, north arrow and CRS line on a map axis."""
    left, right, bottom, top = extent
    ax.set_title(title, fontsize=12, loc="left", fontweight="bold")
    ax.set_xlim(left, right)
    ax.set_ylim(bottom, top)
    ax.set_aspect("equal")
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_xlabel("")
    ax.set_ylabel("")
    per_unit = metres_per_unit(crs, (bottom + top) / 2)
    length_m = nice_length_m((right - left) * per_unit)
    length = length_m / per_unit
    x0 = left + 0.05 * (right - left)
    y0 = bottom + 0.05 * (top - bottom)
    height = 0.012 * (top - bottom)
    ax.add_patch(_rect((x0, y0), length / 2, height, "black"))
    ax.add_patch(_rect((x0 + length / 2, y0), length / 2, height, "white"))
    label = f"{length_m / 1000:g} km" if length_m >= 1000 else f"{length_m:g} m"
    ax.text(x0 + length / 2, y0 + 2.2 * height, label, ha="center", va="bottom", fontsize=8,
            bbox=dict(facecolor="white", edgecolor="none", alpha=0.7, pad=1))
    ax.annotate("", xy=(0.94, 0.90), xytext=(0.94, 0.78), xycoords="axes fraction",
                arrowprops=dict(facecolor="black", edgecolor="white", width=3, headwidth=11, headlength=10))
    ax.text(0.94, 0.91, "N", transform=ax.transAxes, ha="center", va="bottom", fontsize=11, fontweight="bold",
            bbox=dict(facecolor="white", edgecolor="none", alpha=0.7, pad=1))
    ax.text(0.0, -0.02, f"CRS: {crs_label(crs)}", transform=ax.transAxes, fontsize=7, color="#444444", va="top")


def _rect(xy, width, height, colour):
    from matplotlib.patches import Rectangle

    return Rectangle(xy, width, height, facecolor=colour, edgecolor="black", linewidth=0.8, zorder=5)


def _png(fig, name: str, title: str, caption: str) -> Figure:
    plt = _mpl()
    buffer = io.BytesIO()
    # "tight" keeps legends placed outside the axes inside the picture; the size is then read
    # back from the PNG header (IHDR: width and height, big-endian, at bytes 16-24).
    fig.savefig(buffer, format="png", dpi=DPI, bbox_inches="tight", pad_inches=0.08)
    plt.close(fig)
    width, height = struct.unpack(">II", buffer.getvalue()[16:24])
    return Figure(name, title, caption, buffer.getvalue(), width, height)


def rate_scale(values) -> tuple[str, float, float]:
    """('log' or 'linear', low, high) for positive rates [mm/kyr]: log where the range spans
    more than LOG_SCALE_RATIO."""
    positive = np.asarray(values, dtype=np.float64)
    positive = positive[np.isfinite(positive) & (positive > 0)]
    if positive.size == 0:
        return "linear", 0.0, 1.0
    low, high = float(np.percentile(positive, 1.0)), float(positive.max())
    if high / max(low, 1e-12) > LOG_SCALE_RATIO:
        return "log", low, high
    return "linear", 0.0, high


def rate_map(path) -> Figure:
    """The denudation rate [mm/kyr] on a perceptually uniform colour map (viridis)."""
    plt = _mpl()
    from matplotlib.colors import LogNorm, Normalize

    data, extent, crs, _ = read_decimated(path, categorical=False)
    kind, low, high = rate_scale(data.compressed())
    norm = LogNorm(vmin=low, vmax=high) if kind == "log" else Normalize(vmin=low, vmax=high)
    fig, ax = plt.subplots(figsize=MAP_SIZE_IN, layout="constrained")
    zero = np.ma.masked_where(np.ma.getmaskarray(data) | (data != 0), np.ones(data.shape))
    ax.imshow(zero, extent=extent, cmap=_single("#d9d9d9"), interpolation="nearest")
    shown = np.ma.masked_where(np.ma.getmaskarray(data) | (data <= 0), data)
    image = ax.imshow(shown, extent=extent, cmap="viridis", norm=norm, interpolation="nearest")
    bar = fig.colorbar(image, ax=ax, shrink=0.8)
    bar.set_label("maximum denudation rate [mm/kyr]" + (" (log scale)" if kind == "log" else ""))
    if kind == "log":
        _log_ticks(bar, low, high)
    decorate(ax, extent, crs, "Maximum denudation rate")
    ax.text(1.0, -0.02, "grey: 0 mm/kyr (insoluble rock)", transform=ax.transAxes, fontsize=7, ha="right", va="top")
    return _png(fig, "rate_map", "Maximum denudation rate (mm/kyr)",
                "Cell-mean maximum chemical denudation rate, 1 mm/kyr = 1 m3 of rock per km2 per year. "
                + ("Log colour scale: the rates span more than a factor of ten." if kind == "log" else ""))


def _log_ticks(bar, low: float, high: float) -> None:
    """Ticks 1, 2, 5 x 10^k within [low, high] on a log colour bar, written as plain numbers."""
    ticks = [v * 10 ** e for e in range(-2, 6) for v in (1, 2, 5) if low <= v * 10 ** e <= high]
    bar.set_ticks(ticks, labels=[f"{t:g}" for t in ticks])
    bar.ax.minorticks_off()


def _single(colour):
    from matplotlib.colors import ListedColormap

    return ListedColormap([colour])


def class_legend_labels(names, breaks, unit="mm/kyr") -> list[str]:
    """'negligible (< 5 mm/kyr)', 'low (5-20 mm/kyr)', ..., 'very high (>= 150 mm/kyr)'."""
    out = []
    for k, name in enumerate(names):
        if not breaks:
            out.append(str(name))
        elif k == 0:
            out.append(f"{name} (< {breaks[0]:g} {unit})")
        elif k >= len(breaks):
            out.append(f"{name} (>= {breaks[-1]:g} {unit})")
        else:
            out.append(f"{name} ({breaks[k - 1]:g}-{breaks[k]:g} {unit})")
    return out


def hazard_map(path, names, breaks, colours, points=None) -> Figure:
    """Hazard classes with their colour table; sinkhole points on top when given (a
    GeoDataFrame in the raster CRS with a ``hazard_class`` column)."""
    plt = _mpl()
    from matplotlib.colors import BoundaryNorm, ListedColormap
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    data, extent, crs, nodata = read_decimated(path, categorical=True)
    n = len(names)
    cmap = ListedColormap([np.asarray(colours[k][:3]) / 255 for k in range(n)])
    fig, ax = plt.subplots(figsize=MAP_SIZE_IN, layout="constrained")
    ax.imshow(np.ma.masked_greater_equal(data, n), extent=extent, cmap=cmap,
              norm=BoundaryNorm(np.arange(-0.5, n + 0.5), n), interpolation="nearest")
    handles = [Patch(facecolor=np.asarray(colours[k][:3]) / 255, edgecolor="#666666", label=label)
               for k, label in enumerate(class_legend_labels(names, breaks))]
    if points is not None and len(points):
        ax.scatter(points.geometry.x, points.geometry.y, s=14, c="#00bfff", edgecolors="black", linewidths=0.6, zorder=4)
        handles.append(Line2D([], [], marker="o", linestyle="", markerfacecolor="#00bfff", markeredgecolor="black",
                              label=f"mapped sinkhole ({len(points)})"))
    ax.legend(handles=handles, title="hazard class (rate)", fontsize=8, title_fontsize=8, loc="upper left",
              bbox_to_anchor=(1.01, 1.0), frameon=False)
    decorate(ax, extent, crs, "Dissolution hazard classes")
    return _png(fig, "hazard_map", "Dissolution hazard classes",
                "Classes of the maximum denudation rate (a screening convention, not a collapse probability)"
                + ("; mapped sinkholes as points." if points is not None and len(points) else "."))


def choropleth(frame, column: str, title: str, label: str, extent, crs, name: str, caption: str,
               breaks=None, colours=None, labels=None, cmap="viridis", context=None, zoom: bool = False) -> Figure:
    """Zones coloured by ``column``: classed by ``breaks`` (with ``colours`` and legend
    ``labels``) or on a continuous colour bar. ``context``: polygons drawn as grey outlines
    underneath; ``zoom``: the map shows the zones' own extent (5 % margin), not ``extent``."""
    plt = _mpl()
    from matplotlib.patches import Patch

    fig, ax = plt.subplots(figsize=MAP_SIZE_IN, layout="constrained")
    if zoom:
        x0, y0, x1, y1 = frame.total_bounds
        pad = 0.05 * max(x1 - x0, y1 - y0)
        extent = (x0 - pad, x1 + pad, y0 - pad, y1 + pad)
    if context is not None:
        context.boundary.plot(ax=ax, color="#9a9a9a", linewidth=0.8)
    values = frame[column].to_numpy(dtype=np.float64)
    if breaks is not None:
        index = np.searchsorted(np.asarray(breaks, dtype=np.float64), values, side="right")
        frame.assign(_colour=[colours[i] for i in index]).plot(ax=ax, color=[colours[i] for i in index],
                                                              edgecolor="#333333", linewidth=0.6)
        ax.legend(handles=[Patch(facecolor=c, edgecolor="#666666", label=t) for c, t in zip(colours, labels)],
                  title=label, fontsize=8, title_fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    else:
        frame.plot(ax=ax, column=column, cmap=cmap, edgecolor="#333333", linewidth=0.6, legend=True,
                   legend_kwds={"label": label, "shrink": 0.8})
    decorate(ax, extent, crs, title)
    return _png(fig, name, title, caption)


def rock_histogram(rates_by_rock: dict, unit: str = "mm/kyr") -> Figure:
    """Histogram of the cell rates [mm/kyr] per rock type (log-spaced bins, positive rates)."""
    plt = _mpl()
    fig, ax = plt.subplots(figsize=(7.2, 3.8), layout="constrained")
    positive = [v[v > 0] for v in rates_by_rock.values() if np.any(v > 0)]
    if positive:
        low = max(min(float(v.min()) for v in positive), 1e-3)
        high = max(float(v.max()) for v in positive)
        bins = np.geomspace(low, high * 1.0001, 40) if high > low else 10
        for rock, values in rates_by_rock.items():
            values = values[values > 0]
            if values.size:
                ax.hist(values, bins=bins, histtype="step", linewidth=1.6, label=f"{rock} ({values.size} cells)")
        ax.set_xscale("log")
        ax.legend(fontsize=8, frameon=False)
    ax.set_xlabel(f"maximum denudation rate [{unit}] (log scale)")
    ax.set_ylabel("cells")
    ax.set_title("Rates per rock type", fontsize=12, loc="left", fontweight="bold")
    return _png(fig, "rock_histogram", "Rates per rock type",
                "Distribution of the cell rates on each soluble rock type (insoluble rock, 0 mm/kyr, left out).")


def band_map(p05_path, p95_path, title: str, label: str, name: str, caption: str) -> Figure:
    """Width of an uncertainty band, p95 - p05 of the same quantity, on a sequential colour map."""
    plt = _mpl()
    low, extent, crs, _ = read_decimated(p05_path, categorical=False)
    high, _, _, _ = read_decimated(p95_path, categorical=False)
    width = np.ma.masked_invalid(np.ma.filled(high.astype(np.float64) - low.astype(np.float64), np.nan))
    fig, ax = plt.subplots(figsize=MAP_SIZE_IN, layout="constrained")
    top = float(np.percentile(width.compressed(), 98.0)) if width.count() else 1.0
    image = ax.imshow(width, extent=extent, cmap="magma_r", vmin=0.0, vmax=max(top, 1e-9), interpolation="nearest")
    fig.colorbar(image, ax=ax, shrink=0.8, extend="max").set_label(label)
    decorate(ax, extent, crs, title)
    return _png(fig, name, title, caption)


def difference_map(path, title: str, label: str, name: str, caption: str) -> Figure:
    """A signed difference on a diverging colour map centred at 0 (blue: less, red: more);
    the limits are symmetric, at the 98th percentile of the absolute difference."""
    plt = _mpl()
    from matplotlib.colors import TwoSlopeNorm

    data, extent, crs, _ = read_decimated(path, categorical=False)
    values = np.abs(data.compressed().astype(np.float64))
    limit = float(np.percentile(values, 98.0)) if values.size else 1.0
    limit = limit if limit > 0 else 1.0
    fig, ax = plt.subplots(figsize=MAP_SIZE_IN, layout="constrained")
    image = ax.imshow(data, extent=extent, cmap="RdBu_r", norm=TwoSlopeNorm(0.0, -limit, limit), interpolation="nearest")
    fig.colorbar(image, ax=ax, shrink=0.8, extend="both").set_label(label)
    decorate(ax, extent, crs, title)
    return _png(fig, name, title, caption)


def value_map(path, title: str, label: str, name: str, caption: str) -> Figure:
    """A rate raster [mm/kyr] like ``rate_map`` (viridis, log scale over a wide range), other title."""
    plt = _mpl()
    from matplotlib.colors import LogNorm, Normalize

    data, extent, crs, _ = read_decimated(path, categorical=False)
    kind, low, high = rate_scale(data.compressed())
    norm = LogNorm(vmin=low, vmax=high) if kind == "log" else Normalize(vmin=low, vmax=max(high, 1e-9))
    fig, ax = plt.subplots(figsize=MAP_SIZE_IN, layout="constrained")
    shown = np.ma.masked_where(np.ma.getmaskarray(data) | (data <= 0), data)
    image = ax.imshow(shown, extent=extent, cmap="viridis", norm=norm, interpolation="nearest")
    bar = fig.colorbar(image, ax=ax, shrink=0.8)
    bar.set_label(label + (" (log scale)" if kind == "log" else ""))
    if kind == "log":
        _log_ticks(bar, low, high)
    decorate(ax, extent, crs, title)
    return _png(fig, name, title, caption)


def class_map(path, names, colours, title: str, legend_title: str, name: str, caption: str) -> Figure:
    """A class raster (codes 0..n-1, others left blank) with one legend patch per class."""
    plt = _mpl()
    from matplotlib.colors import BoundaryNorm, ListedColormap
    from matplotlib.patches import Patch

    data, extent, crs, _ = read_decimated(path, categorical=True)
    n = len(names)
    rgb = [np.asarray(colours[k][:3]) / 255 for k in range(n)]
    fig, ax = plt.subplots(figsize=MAP_SIZE_IN, layout="constrained")
    ax.imshow(np.ma.masked_greater_equal(data, n), extent=extent, cmap=ListedColormap(rgb),
              norm=BoundaryNorm(np.arange(-0.5, n + 0.5), n), interpolation="nearest")
    ax.legend(handles=[Patch(facecolor=c, edgecolor="#666666", label=t) for c, t in zip(rgb, names)],
              title=legend_title, fontsize=8, title_fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0),
              frameon=False)
    decorate(ax, extent, crs, title)
    return _png(fig, name, title, caption)


def paired_bars(labels, first, second, names: tuple[str, str], ylabel: str, title: str, name: str,
                caption: str) -> Figure:
    """Two bars per label (e.g. observed and maximum rate of each watershed); NaN bars left out."""
    plt = _mpl()
    x = np.arange(len(labels))
    fig, ax = plt.subplots(figsize=(7.2, 3.8), layout="constrained")
    ax.bar(x - 0.2, np.asarray(first, dtype=np.float64), 0.4, label=names[0], color="#2166ac")
    ax.bar(x + 0.2, np.asarray(second, dtype=np.float64), 0.4, label=names[1], color="#bdbdbd", edgecolor="#636363")
    ax.set_xticks(x, labels, rotation=45 if len(labels) > 6 else 0, ha="right" if len(labels) > 6 else "center",
                  fontsize=8)
    ax.set_ylabel(ylabel)
    ax.legend(fontsize=8, frameon=False)
    ax.set_title(title, fontsize=12, loc="left", fontweight="bold")
    return _png(fig, name, title, caption)


def density_bars(names, density, low, high, ylabel: str, title: str, name: str, caption: str) -> Figure:
    """Density per class with its interval as error bars (log axis when every lower bound is > 0)."""
    plt = _mpl()
    density, low, high = (np.asarray(v, dtype=np.float64) for v in (density, low, high))
    fig, ax = plt.subplots(figsize=(7.2, 3.8), layout="constrained")
    x = np.arange(len(names))
    ax.errorbar(x, density, yerr=[density - low, high - density], fmt="o", color="#b2182b", ecolor="#333333",
                capsize=5, markersize=7)
    if low.size and np.all(low > 0):
        ax.set_yscale("log")
    ax.set_xticks(x, list(names))
    ax.set_xlabel("hazard class")
    ax.set_ylabel(ylabel)
    ax.set_title(title, fontsize=12, loc="left", fontweight="bold")
    return _png(fig, name, title, caption)
