"""QC maps and profiles (matplotlib, Agg backend, PNG).

Conventions: matplotlib's perceptually uniform colour maps only (never a rainbow, never a colour
table from another program). :func:`colour_scale` chooses per grid:

- absolute fields (total-field anomaly, Bouguer and free-air anomaly, gravity, regional and
  continued fields, reduction to the pole) and anything that does not straddle zero: ``viridis``
  on a histogram-equalised scale (each colour covers the same share of cells) with a hillshade
  from the north-west (:class:`matplotlib.colors.LightSource`), so a Bouguer map from -33 to
  -26 mGal uses the whole colour range;
- signed quantities that straddle zero (derivatives, residuals, tilt): ``RdBu_r`` centred on zero;
- magnitudes (gradients, analytic signal, distances): ``cividis``, linear.

Every map names the quantity and its unit, the survey, the CRS, the contour interval, and has a
scale bar and a grid-north arrow.
"""

from __future__ import annotations

import io
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.colors import BoundaryNorm, LightSource, Normalize, TwoSlopeNorm  # noqa: E402

from ..io.atomic import write_bytes  # noqa: E402

SEQUENTIAL = "cividis"
ABSOLUTE = "viridis"
DIVERGING = "RdBu_r"
CATEGORICAL = "tab20"
FIGSIZE = (7.5, 6.0)
#: Most readings drawn on a scatter map: a map is about 600 x 600 pixels, so more points only
#: overdraw; every k-th reading is kept, and readings are stored in line order, so each line is
#: thinned evenly along its track.
MAX_POINTS = 50_000

#: Grid names whose values are signed anomalies (diverging colour map centred on zero).
SIGNED_HINTS = (
    "anomaly",
    "residual",
    "regional",
    "rtp",
    "dz",
    "dx",
    "dy",
    "upward",
    "external",
    "internal",
    "disturbance",
    "bouguer",
    "free_air",
    "level",
    "corrugation",
)
UNSIGNED_HINTS = (
    "thg",
    "tga",
    "analytic",
    "gradient_amplitude",
    "distance",
    "height",
    "total_horizontal_gradient",
)
#: Absolute fields: histogram-equalised sequential scale with hillshade (see the module notes).
ABSOLUTE_HINTS = (
    "total_field",
    "bouguer",
    "free_air",
    "gravity",
    "regional",
    "upward",
    "reduced_to_pole",
    "rtp",
    "igrf",
)
#: Signed quantities shown on a diverging scale when they straddle zero.
DERIVATIVE_HINTS = (
    "derivative",
    "residual",
    "tilt",
    "dz",
    "dx",
    "dy",
    "external",
    "internal",
    "level",
    "corrugation",
    "difference",
    "deviation",
)


def save(fig, path: Path, dpi: int = 110) -> Path:
    """Write a figure atomically as PNG, cropped to its content, and close it.

    The crop is matplotlib's own tight box plus ``savefig.pad_inches``, as ``bbox_inches="tight"``
    gives, but measured once here: ``"tight"`` first runs a whole draw pass (ticks, text layout)
    only to learn the box (and to run a layout engine), which doubled the cost of every figure.
    ``Figure.get_tightbbox`` applies the axes locators and aspect ratios itself, and a layout
    engine is run once here, so that pass is not needed.
    """
    buffer = io.BytesIO()
    fig.set_dpi(dpi)
    renderer = fig.canvas.get_renderer()
    engine = fig.get_layout_engine()
    if engine is not None:  # constrained layout: place the axes once, then keep them
        engine.execute(fig)
        fig.set_layout_engine("none")
    box = fig.get_tightbbox(renderer).padded(matplotlib.rcParams["savefig.pad_inches"])
    fig.savefig(buffer, format="png", dpi=dpi, bbox_inches=box)
    plt.close(fig)
    return write_bytes(path, buffer.getvalue())


def thinning_step(count: int, limit: int = MAX_POINTS) -> int:
    """The k of "every k-th reading" that keeps at most ``limit`` of ``count`` readings."""
    return max(-(-int(count) // int(limit)), 1)


def _nice_length(span: float) -> float:
    """A round scale-bar length near a fifth of ``span``."""
    target = max(span / 5.0, 1e-9)
    power = 10 ** np.floor(np.log10(target))
    for step in (1, 2, 5, 10):
        if step * power >= target:
            return float(step * power)
    return float(10 * power)


def add_scale_bar(ax) -> None:
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    length = _nice_length(x1 - x0)
    bx, by = x0 + 0.05 * (x1 - x0), y0 + 0.05 * (y1 - y0)
    ax.plot([bx, bx + length], [by, by], color="black", lw=3, solid_capstyle="butt", zorder=10)
    ax.plot([bx, bx + length / 2], [by, by], color="white", lw=1.2, solid_capstyle="butt", zorder=11)
    label = f"{length / 1000:g} km" if length >= 1000 else f"{length:g} m"
    ax.text(
        bx + length / 2,
        by + 0.015 * (y1 - y0),
        label,
        ha="center",
        va="bottom",
        fontsize=8,
        zorder=11,
        bbox={"facecolor": "white", "alpha": 0.7, "edgecolor": "none", "pad": 1},
    )


def add_north_arrow(ax) -> None:
    """Arrow to grid north (+northing), top right."""
    ax.annotate(
        "",
        xy=(0.94, 0.93),
        xytext=(0.94, 0.81),
        xycoords="axes fraction",
        arrowprops={"arrowstyle": "-|>", "color": "black", "lw": 1.5},
        zorder=12,
    )
    ax.text(
        0.94,
        0.945,
        "N",
        transform=ax.transAxes,
        ha="center",
        va="bottom",
        fontsize=10,
        fontweight="bold",
        zorder=12,
    )


def map_axes(ax, crs_name: str, title: str, survey: str | None = None) -> None:
    """Axes of a map: equal aspect, easting/northing with the CRS, title, scale bar, north arrow
    and, when given, the survey name under the map."""
    if survey:
        ax.text(0.0, -0.16, survey, transform=ax.transAxes, fontsize=7, va="top")
    ax.set_aspect("equal", adjustable="box")
    ax.set_xlabel(f"Easting (m)   [{crs_name}]", fontsize=8)
    ax.set_ylabel("Northing (m)", fontsize=8)
    ax.set_title(title, fontsize=10)
    ax.tick_params(labelsize=7)
    ax.ticklabel_format(style="plain", useOffset=False)
    for label in ax.get_xticklabels():
        label.set_rotation(30)
    add_scale_bar(ax)
    add_north_arrow(ax)


def is_signed(name: str) -> bool:
    lower = name.lower()
    if any(h in lower for h in UNSIGNED_HINTS):
        return False
    return any(h in lower for h in SIGNED_HINTS)


def straddles_zero(values: np.ndarray) -> bool:
    """True when zero lies well inside the data (between the 5th and 95th percentiles)."""
    finite = np.asarray(values, float)
    finite = finite[np.isfinite(finite)]
    if finite.size == 0:
        return False
    lo, hi = np.percentile(finite, [5, 95])
    return bool(lo < 0.0 < hi)


def colour_scale(name: str, values: np.ndarray) -> str:
    """ "equalised" (absolute field), "diverging" (signed, straddling zero) or "linear" (magnitude).

    A main magnetic ``anomaly`` grid is an absolute field here: it is the levelled total-field
    anomaly, read like a total-field map (common practice).
    """
    lower = name.lower()
    if any(h in lower for h in UNSIGNED_HINTS):
        return "linear"
    derivative = any(h in lower for h in DERIVATIVE_HINTS)
    absolute = any(h in lower for h in ABSOLUTE_HINTS) or lower in ("anomaly", "anomaly_levelled")
    if derivative and not ("regional" in lower and "residual" not in lower):
        return "diverging" if straddles_zero(values) else "equalised"
    if absolute:
        return "equalised"
    return "diverging" if straddles_zero(values) else "equalised"


def equalised_norm(values: np.ndarray, levels: int = 64):
    """Histogram-equalised norm: colour boundaries at equal-count quantiles of the data."""
    finite = np.asarray(values, float)
    finite = finite[np.isfinite(finite)]
    if finite.size < 2 or np.ptp(finite) == 0:
        centre = float(finite[0]) if finite.size else 0.0
        return Normalize(centre - 1.0, centre + 1.0)
    bounds = np.unique(np.quantile(finite, np.linspace(0.0, 1.0, levels + 1)))
    if bounds.size < 3:
        return Normalize(float(bounds[0]), float(bounds[-1]))
    return BoundaryNorm(bounds, ncolors=256)


def nice_interval(values: np.ndarray, target: int = 12) -> float:
    """A round contour interval giving about ``target`` contours over the 2-98 % range."""
    finite = np.asarray(values, float)
    finite = finite[np.isfinite(finite)]
    if finite.size == 0:
        return 1.0
    lo, hi = np.percentile(finite, [2, 98])
    span = max(hi - lo, 1e-12)
    raw = span / target
    power = 10 ** np.floor(np.log10(raw))
    for step in (1, 2, 2.5, 5, 10):
        if step * power >= raw:
            return float(step * power)
    return float(10 * power)


def quantity_title(name: str, long_name: str | None = None) -> str:
    """The quantity in words, first letter capital (e.g. "Bouguer anomaly")."""
    text = (long_name or name.replace("_", " ")).strip()
    return text[:1].upper() + text[1:]


def _limits(values: np.ndarray, signed: bool) -> tuple[float, float]:
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return -1.0, 1.0
    if signed:
        half = float(np.percentile(np.abs(finite), 99)) or 1.0
        return -half, half
    lo, hi = np.percentile(finite, [1, 99])
    return float(lo), float(hi if hi > lo else lo + 1)


def _norm_for(scale: str, values: np.ndarray):
    if scale == "equalised":
        return ABSOLUTE, equalised_norm(values)
    if scale == "diverging":
        lo, hi = _limits(values, True)
        return DIVERGING, TwoSlopeNorm(vcenter=0.0, vmin=lo, vmax=hi)
    lo, hi = _limits(values, False)
    return SEQUENTIAL, Normalize(lo, hi)


def draw_grid(
    ax, fig, grid, *, scale: str | None = None, hillshade: bool | None = None, contours: bool = True
) -> dict:
    """Draw one grid on ``ax`` (colour, optional hillshade and contours); returns what was used."""
    name = str(grid.name or "grid")
    units = grid.attrs.get("units", "")
    values = np.asarray(grid.transpose("northing", "easting").values, dtype=float)
    east, north = grid["easting"].values, grid["northing"].values
    scale = scale or colour_scale(name, values)
    cmap_name, norm = _norm_for(scale, values)
    cmap = plt.get_cmap(cmap_name)
    valid = np.isfinite(values)
    shade = scale == "equalised" if hillshade is None else hillshade
    de = float(np.median(np.diff(east))) if east.size > 1 else 1.0
    dn = float(np.median(np.diff(north))) if north.size > 1 else 1.0
    extent = (east[0] - de / 2, east[-1] + de / 2, north[0] - dn / 2, north[-1] + dn / 2)
    filled = np.where(valid, values, np.nanmedian(values) if valid.any() else 0.0)
    if shade and valid.sum() > 4:
        gy, gx = np.gradient(filled, dn, de)
        slope = float(np.nanstd(np.hypot(gx, gy))) or 1.0
        light = LightSource(azdeg=315, altdeg=45)
        rgb = light.shade(
            filled, cmap=cmap, norm=norm, blend_mode="soft", vert_exag=1.0 / slope, dx=1.0, dy=1.0
        )
    else:
        rgb = cmap(norm(filled))
    rgb = np.array(rgb, dtype=float)
    rgb[..., 3] = np.where(valid, 1.0, 0.0)
    # 8-bit RGBA (what the PNG holds): matplotlib resamples and blends it without a float copy
    rgba = (np.clip(rgb, 0.0, 1.0) * 255.0 + 0.5).astype(np.uint8)
    ax.imshow(rgba, origin="lower", extent=extent, interpolation="nearest", aspect="equal")
    mappable = plt.cm.ScalarMappable(norm=norm, cmap=cmap)
    bar = fig.colorbar(mappable, ax=ax, shrink=0.8)
    bar.set_label(units or "value")
    if scale == "equalised":
        finite = values[valid]
        if finite.size:
            ticks = np.quantile(finite, [0.0, 0.1, 0.3, 0.5, 0.7, 0.9, 1.0])
            bar.set_ticks(ticks)
            bar.set_ticklabels([f"{t:.4g}" for t in ticks])
        if isinstance(norm, BoundaryNorm):
            # a short mark at each colour boundary (equal-count quantile), drawn as one line of
            # tick markers: matplotlib's own minor ticks would be 65 tick objects per map
            bar.minorticks_off()
            bar.ax.plot(
                np.ones(norm.boundaries.size),
                norm.boundaries,
                linestyle="none",
                marker=matplotlib.markers.TICKRIGHT,
                markersize=2.0,
                markeredgewidth=0.6,
                color="black",
                transform=bar.ax.get_yaxis_transform(),
                clip_on=False,
            )
    interval = None
    if contours and valid.sum() > 16:
        interval = nice_interval(values)
        lo, hi = np.nanmin(values), np.nanmax(values)
        levels = np.arange(np.floor(lo / interval) * interval, hi + interval, interval)
        if 2 <= levels.size <= 200:
            ax.contour(
                east,
                north,
                np.ma.masked_invalid(values),
                levels=levels,
                colors="black",
                linewidths=0.35,
                alpha=0.6,
            )
        else:
            interval = None
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    return {
        "scale": scale,
        "cmap": cmap_name,
        "hillshade": bool(shade),
        "contour_interval": interval,
        "units": units,
    }


def plot_grid(
    grid, path: Path, crs_name: str, title: str | None = None, dpi: int = 110, survey: str | None = None
) -> Path:
    """Map of one grid: quantity and unit in the title, survey name, CRS, contour interval,
    scale bar and north arrow. The colour scale follows :func:`colour_scale`."""
    name = str(grid.name or "grid")
    fig, ax = plt.subplots(figsize=FIGSIZE)
    used = draw_grid(ax, fig, grid)
    quantity = title or quantity_title(name, grid.attrs.get("long_name"))
    units = used["units"]
    heading = f"{quantity} ({units})" if units and f"({units})" not in quantity else quantity
    map_axes(ax, crs_name, heading)
    lines = []
    if survey:
        lines.append(survey)
    if used["contour_interval"]:
        lines.append(f"contour interval {used['contour_interval']:g} {units}".strip())
    scale_text = {
        "equalised": "histogram-equalised colour, hillshade from NW",
        "diverging": "colour centred on zero",
        "linear": "linear colour",
    }[used["scale"]]
    lines.append(scale_text)
    ax.text(0.0, -0.16, "   |   ".join(lines), transform=ax.transAxes, fontsize=7, va="top")
    return save(fig, path, dpi)


def plot_points(
    table: pd.DataFrame,
    column: str,
    path: Path,
    crs_name: str,
    title: str,
    units: str,
    dpi: int = 110,
    survey: str | None = None,
) -> Path:
    """Readings coloured by a value column (e.g. the anomaly before gridding)."""
    values = table[column].to_numpy(dtype=float)
    step = thinning_step(len(table))
    sub = table.iloc[::step]
    vals = values[::step]
    cmap, norm = _norm_for(colour_scale(column, vals), vals)
    fig, ax = plt.subplots(figsize=FIGSIZE)
    many = len(sub) > 2000
    sc = ax.scatter(
        sub["easting"],
        sub["northing"],
        c=vals,
        cmap=cmap,
        norm=norm,
        s=2 if many else 18,
        linewidths=0 if many else 0.3,
        edgecolors="black",
    )
    bar = fig.colorbar(sc, ax=ax, shrink=0.8)
    bar.set_label(units)
    map_axes(ax, crs_name, title, survey)
    return save(fig, path, dpi)


def plot_tracks(
    table: pd.DataFrame,
    path: Path,
    crs_name: str,
    dpi: int = 110,
    title: str | None = None,
    survey: str | None = None,
) -> Path:
    """Survey tracks (or stations) coloured by line, flagged readings marked."""
    fig, ax = plt.subplots(figsize=FIGSIZE)
    codes, names = pd.factorize(table["line"])
    step = thinning_step(len(table))
    cmap = plt.get_cmap(CATEGORICAL)
    tie = (table["line_type"] == "tie").to_numpy()
    many = len(table) > 2000
    marker = {"s": 0.5 if many else 12, "linewidths": 0}
    ax.scatter(
        table["easting"].to_numpy()[::step],
        table["northing"].to_numpy()[::step],
        c=cmap(codes[::step] % 20),
        **marker,
    )
    if tie.any():
        ax.scatter(
            table["easting"].to_numpy()[tie][::step],
            table["northing"].to_numpy()[tie][::step],
            c="black",
            s=marker["s"],
            linewidths=0,
            label="tie lines",
        )
    flags = [c for c in table.columns if c.startswith("flag_")]
    if flags:
        flagged = table[flags].to_numpy(dtype=bool).any(axis=1)
        if flagged.any():
            ax.scatter(
                table["easting"][flagged],
                table["northing"][flagged],
                marker="x",
                c="red",
                s=14,
                linewidths=0.8,
                label=f"flagged ({int(flagged.sum())})",
            )
    if "station" in table and (not many or table["station"].nunique() <= 60):
        stations = table.groupby("station")[["easting", "northing"]].first()
        if many:  # a station network: the readings repeat at a few points
            ax.scatter(
                stations["easting"],
                stations["northing"],
                marker="^",
                s=40,
                c="black",
                zorder=5,
                label="stations",
            )
        for name, row in stations.iloc[:: max(len(stations) // 60, 1)].iterrows():
            ax.annotate(
                str(name),
                (row.easting, row.northing),
                fontsize=5 if not many else 8,
                alpha=0.8,
                xytext=(3, 3),
                textcoords="offset points",
            )
    if ax.get_legend_handles_labels()[0]:
        network = "station" in table and many and table["station"].nunique() <= 60
        legend = ax.legend(loc="best", fontsize=7, markerscale=1 if network else 4)
        for handle in legend.legend_handles:  # readable markers, whatever the plotted size
            if hasattr(handle, "set_sizes"):
                handle.set_sizes([20])
    map_axes(ax, crs_name, title or f"Survey tracks coloured by line ({len(names)} lines)", survey)
    return save(fig, path, dpi)


def plot_coverage(
    table: pd.DataFrame,
    path: Path,
    crs_name: str,
    line_spacing: float | None,
    dpi: int = 110,
    survey: str | None = None,
    spacing_label: str = "nominal line spacing",
) -> Path:
    """Distance from every point of the area to the nearest reading, and line offsets."""
    from scipy.spatial import cKDTree

    e, n = table["easting"].to_numpy(), table["northing"].to_numpy()
    step = max(len(e) // 300_000, 1)
    tree = cKDTree(np.c_[e[::step], n[::step]])
    ge = np.linspace(e.min(), e.max(), 200)
    gn = np.linspace(n.min(), n.max(), 200)
    E, N = np.meshgrid(ge, gn)
    dist, _ = tree.query(np.c_[E.ravel(), N.ravel()])
    fig, ax = plt.subplots(figsize=FIGSIZE)
    mesh = ax.pcolormesh(ge, gn, dist.reshape(E.shape), cmap=SEQUENTIAL, shading="auto")
    fig.colorbar(mesh, ax=ax, shrink=0.8).set_label("distance to nearest reading (m)")
    title = "Data coverage"
    if line_spacing:
        title += f" ({spacing_label} {line_spacing:.0f} m)"
    map_axes(ax, crs_name, title, survey)
    return save(fig, path, dpi)


def plot_height_deviation(
    table: pd.DataFrame, path: Path, crs_name: str, tolerance: float | None, dpi: int = 110
) -> Path:
    """Height minus the smoothed flying surface (a 2 km block median of the heights), i.e. how
    far the sensor strayed from a smooth drape; the planned surface itself is not an input."""
    e, n, h = (table[c].to_numpy(dtype=float) for c in ("easting", "northing", "height"))
    block = max((e.max() - e.min()) / 20.0, 1.0)
    ie = np.floor((e - e.min()) / block).astype(int)
    inn = np.floor((n - n.min()) / block).astype(int)
    key = ie * 100_000 + inn
    surface = pd.Series(h).groupby(key).transform("median").to_numpy()
    deviation = h - surface
    frame = pd.DataFrame({"easting": e, "northing": n, "height_deviation": deviation})
    title = "Height deviation from the smoothed flying surface"
    if tolerance:
        title += f" (tolerance ±{tolerance:g} m)"
    return plot_points(frame, "height_deviation", path, crs_name, title, "m", dpi)


def plot_noise_profiles(
    table: pd.DataFrame,
    path: Path,
    column: str = "fourth_difference",
    max_lines: int = 12,
    tolerance: float | None = None,
    dpi: int = 110,
) -> Path:
    """Fourth-difference profiles of up to ``max_lines`` lines, offset for legibility."""
    codes, lines = pd.factorize(table["line"])  # lines in order of appearance, as pd.unique
    chosen = np.linspace(0, len(lines) - 1, min(max_lines, len(lines))).astype(int)
    fig, ax = plt.subplots(figsize=(8.5, 6.5))
    d = table[column].to_numpy(dtype=float)
    distance = table["distance"].to_numpy()
    scale = float(np.nanpercentile(np.abs(d), 99)) or 1.0
    for k, code in enumerate(chosen):
        name = lines[code]
        sel = codes == code
        dist = distance[sel] / 1000.0
        ax.plot(dist, d[sel] / scale + 2 * k, lw=0.5, color="black")
        ax.text(dist.max() if dist.size else 0, 2 * k, f" {name}", fontsize=6, va="center")
    ax.set_xlabel("distance along line (km)")
    ax.set_ylabel(f"fourth difference, each line offset (1 unit = {scale:.3g} nT)")
    title = "Noise: fourth difference along lines"
    if tolerance:
        title += f" (tolerance {tolerance:g} nT on |d4/16|)"
    ax.set_title(title, fontsize=10)
    return save(fig, path, dpi)


def plot_timeseries(
    time,
    series: dict[str, np.ndarray],
    path: Path,
    title: str,
    ylabel: str,
    band: tuple[np.ndarray, np.ndarray] | None = None,
    dpi: int = 110,
) -> Path:
    fig, ax = plt.subplots(figsize=(9, 4.5))
    time = pd.to_datetime(time)
    for label, values in series.items():
        ax.plot(time, values, lw=0.8, label=label)
    if band is not None:
        ax.fill_between(time, band[0], band[1], color="grey", alpha=0.3, lw=0, label="tolerance band")
    ax.set_xlabel("time (UTC)")
    ax.set_ylabel(ylabel)
    ax.set_title(title, fontsize=10)
    ax.legend(fontsize=7)
    fig.autofmt_xdate()
    return save(fig, path, dpi)


def plot_histograms(
    series: dict[str, np.ndarray], path: Path, title: str, xlabel: str, dpi: int = 110
) -> Path:
    fig, ax = plt.subplots(figsize=(7.5, 4.5))
    finite = [np.asarray(v, float)[np.isfinite(v)] for v in series.values()]
    allv = np.concatenate(finite) if finite else np.zeros(1)
    lim = float(np.percentile(np.abs(allv), 99.5)) if allv.size else 1.0
    bins = np.linspace(-lim, lim, 61) if lim > 0 else 30
    for (label, _), values in zip(series.items(), finite):
        rms = float(np.sqrt(np.mean(values**2))) if values.size else np.nan
        ax.hist(values, bins=bins, alpha=0.6, label=f"{label} (RMS {rms:.3g})")
    ax.set_xlabel(xlabel)
    ax.set_ylabel("count")
    ax.set_title(title, fontsize=10)
    ax.legend(fontsize=8)
    return save(fig, path, dpi)


def plot_bars(
    labels, values, path: Path, title: str, ylabel: str, tolerance: float | None = None, dpi: int = 110
) -> Path:
    fig, ax = plt.subplots(figsize=(8, 4.5))
    x = np.arange(len(values))
    ax.bar(x, values, color=plt.get_cmap(SEQUENTIAL)(0.35))
    if tolerance is not None:
        ax.axhline(tolerance, color="red", lw=1, ls="--", label=f"tolerance {tolerance:g}")
        ax.axhline(-tolerance, color="red", lw=1, ls="--")
        ax.legend(fontsize=8)
    ax.set_xticks(x)
    ax.set_xticklabels([str(v) for v in labels], rotation=60, fontsize=6)
    ax.set_ylabel(ylabel)
    ax.set_title(title, fontsize=10)
    return save(fig, path, dpi)


def plot_panels(
    grids: list, path: Path, crs_name: str, title: str, dpi: int = 110, survey: str | None = None
) -> Path:
    """Side-by-side maps (e.g. field = regional + residual), each on its own colour scale
    (:func:`colour_scale`), y labels only on the first panel so labels never collide."""
    fig, axes = plt.subplots(
        1, len(grids), figsize=(6.2 * len(grids), 5.6), squeeze=False, constrained_layout=True
    )
    for k, (ax, grid) in enumerate(zip(axes[0], grids)):
        used = draw_grid(ax, fig, grid)
        name = quantity_title(str(grid.name), grid.attrs.get("long_name"))
        interval = used["contour_interval"]
        sub = f"\ncontour interval {interval:g} {used['units']}" if interval else ""
        map_axes(ax, crs_name, f"{name} ({used['units']}){sub}")
        if k:
            ax.set_ylabel("")
    fig.suptitle(title + (f" - {survey}" if survey else ""), fontsize=11)
    return save(fig, path, dpi)


def plot_base_record(base: pd.DataFrame, path: Path, tolerance: float | None = None, dpi: int = 110) -> Path:
    """Base-station record as its variation about the median (nT) against UTC time, one panel
    per base, with the min-max envelope of each interval and a tolerance band about the 60 s
    running median."""
    names = pd.unique(base["base"]) if "base" in base else ["base"]
    fig, axes = plt.subplots(len(names), 1, figsize=(9, 3.2 * len(names)), squeeze=False, sharex=True)
    for ax, name in zip(axes[:, 0], names):
        part = base[base["base"] == name] if "base" in base else base
        time = pd.to_datetime(part["time"], utc=True).dt.tz_convert(None)
        value = part["total_field"].to_numpy(float)
        datum = float(np.nanmedian(value)) if np.isfinite(value).any() else 0.0
        ax.plot(time, value - datum, lw=0.6, color="black", label=f"{name} (median {datum:,.1f} nT)")
        if {"total_field_min", "total_field_max"} <= set(part.columns):
            ax.fill_between(
                time,
                part["total_field_min"] - datum,
                part["total_field_max"] - datum,
                color="grey",
                alpha=0.4,
                lw=0,
                label="min-max in interval",
            )
        if tolerance:
            smooth = pd.Series(value - datum).rolling(61, center=True, min_periods=1).median()
            ax.fill_between(
                time,
                smooth - tolerance,
                smooth + tolerance,
                color="tab:blue",
                alpha=0.15,
                lw=0,
                label=f"±{tolerance:g} nT about the 60 s median",
            )
        ax.set_ylabel("base field minus median (nT)")
        ax.legend(fontsize=7, loc="upper right")
    axes[-1, 0].set_xlabel("time (UTC)")
    axes[0, 0].set_title("Base-station record (diurnal variation)", fontsize=10)
    fig.autofmt_xdate()
    return save(fig, path, dpi)


def plot_line_profiles(
    table: pd.DataFrame,
    column: str,
    path: Path,
    units: str,
    max_lines: int = 10,
    title: str | None = None,
    dpi: int = 110,
) -> Path:
    """Stacked profiles of ``column`` along up to ``max_lines`` traverse lines, one panel each,
    sharing the distance axis (distance along line, km)."""
    lines = (
        pd.unique(table.loc[table["line_type"] != "tie", "line"])
        if "line_type" in table
        else pd.unique(table["line"])
    )
    if len(lines) == 0:
        lines = pd.unique(table["line"])
    pick = lines[np.linspace(0, len(lines) - 1, min(max_lines, len(lines))).astype(int)]
    fig, axes = plt.subplots(len(pick), 1, figsize=(9, 1.25 * len(pick) + 1.2), sharex=True, squeeze=False)
    flags = [c for c in table.columns if c.startswith("flag_")]
    values = table[column].to_numpy(float).copy()
    if flags:  # flagged readings are left out of the profile (they are marked on the track map)
        values[table[flags].to_numpy(dtype=bool).any(axis=1)] = np.nan
    codes, names = pd.factorize(table["line"])
    distance = table["distance"].to_numpy() / 1000.0
    for ax, name in zip(axes[:, 0], pick):
        sel = codes == names.get_loc(name)
        ax.plot(distance[sel], values[sel], lw=0.7, color="black")
        ax.set_ylabel(f"{name}\n({units})", fontsize=7, rotation=0, ha="right", va="center")
        ax.tick_params(labelsize=7)
        ax.grid(alpha=0.3)
    axes[-1, 0].set_xlabel("distance along line (km)")
    axes[0, 0].set_title(title or f"{quantity_title(column)} along lines", fontsize=10)
    return save(fig, path, dpi)


def plot_station_series(
    table: pd.DataFrame, columns: list[str], path: Path, units: str = "nT", dpi: int = 110
) -> Path:
    """Per-station time series (one panel per station, one line per component)."""
    stations = list(pd.unique(table["station"]))
    fig, axes = plt.subplots(
        len(stations), 1, figsize=(9, 1.6 * len(stations) + 1.0), sharex=True, squeeze=False
    )
    colours = plt.get_cmap("tab10")
    for ax, name in zip(axes[:, 0], stations):
        part = table[table["station"] == name]
        time = pd.to_datetime(part["time"])
        for k, column in enumerate(columns):
            ax.plot(
                time, part[column].to_numpy(float), lw=0.6, color=colours(k), label=column.replace("_", " ")
            )
        ax.set_ylabel(f"{name}\n({units})", fontsize=7, rotation=0, ha="right", va="center")
        ax.tick_params(labelsize=7)
    axes[0, 0].legend(fontsize=7, ncol=len(columns), loc="upper right")
    axes[0, 0].set_title("Disturbance at each station (observed minus IGRF-14)", fontsize=10)
    axes[-1, 0].set_xlabel("time (UTC)")
    fig.autofmt_xdate()
    return save(fig, path, dpi)


def plot_station_map(
    stations: pd.DataFrame, path: Path, value: str | None = None, units: str = "nT", dpi: int = 110
) -> Path:
    """Stations on a geographic longitude/latitude map (plate carree, whole globe), named and
    optionally coloured by a value (e.g. the RMS residual)."""
    fig, ax = plt.subplots(figsize=(9, 5))
    kwargs = {"s": 60, "marker": "^", "edgecolors": "black", "linewidths": 0.6, "zorder": 3}
    if value and value in stations:
        sc = ax.scatter(
            stations["longitude"], stations["latitude"], c=stations[value], cmap=SEQUENTIAL, **kwargs
        )
        fig.colorbar(sc, ax=ax, shrink=0.8).set_label(f"{value.replace('_', ' ')} ({units})")
    else:
        ax.scatter(stations["longitude"], stations["latitude"], color="tab:red", **kwargs)
    for _, row in stations.iterrows():  # a few stations, not readings
        ax.annotate(
            str(row["station"]),
            (row["longitude"], row["latitude"]),
            fontsize=8,
            xytext=(4, 4),
            textcoords="offset points",
        )
    ax.set_xlim(-180, 180)
    ax.set_ylim(-90, 90)
    ax.set_xticks(np.arange(-180, 181, 60))
    ax.set_yticks(np.arange(-90, 91, 30))
    ax.grid(alpha=0.4)
    ax.set_aspect("equal")
    ax.set_xlabel("longitude (degrees east, WGS84)")
    ax.set_ylabel("latitude (degrees north)")
    ax.set_title("Observatory stations", fontsize=10)
    return save(fig, path, dpi)


def plot_coefficients(coef: pd.DataFrame, path: Path, window: int = 15, dpi: int = 110) -> Path:
    """Gauss coefficients against time: a centred running median over ``window`` samples on the
    raw values (light), gaps longer than twice the median step shaded and the lines broken."""
    time = pd.to_datetime(coef["time"], utc=True).dt.tz_convert(None)
    columns = [c for c in coef.columns if c != "time" and pd.api.types.is_numeric_dtype(coef[c])][:8]
    step = time.diff().median()
    gap = (time.diff() > 2 * step).to_numpy() if len(time) > 2 else np.zeros(len(time), bool)
    internal = [c for c in columns if c[:1] in "gh"]
    external = [c for c in columns if c[:1] in "qs"]
    groups = [(g, t) for g, t in ((internal, "internal"), (external, "external")) if g] or [(columns, "")]
    fig, axes = plt.subplots(len(groups), 1, figsize=(9, 3.2 * len(groups)), sharex=True, squeeze=False)
    colours = plt.get_cmap("tab10")
    for ax, (names, label) in zip(axes[:, 0], groups):
        for k, name in enumerate(names):
            values = coef[name].to_numpy(float).copy()
            values[gap] = np.nan  # break the line at gaps
            smooth = (
                pd.Series(coef[name].to_numpy(float))
                .rolling(window, center=True, min_periods=1)
                .median()
                .to_numpy()
                .copy()
            )
            smooth[gap] = np.nan
            ax.plot(time, values, lw=0.4, alpha=0.35, color=colours(k))
            ax.plot(time, smooth, lw=1.2, color=colours(k), label=name)
        for index in np.flatnonzero(gap):
            ax.axvspan(time.iloc[index - 1], time.iloc[index], color="red", alpha=0.15, lw=0)
        ax.set_ylabel(f"{label} coefficients (nT)".strip())
        ax.legend(fontsize=7, ncol=4, loc="upper right")
        ax.grid(alpha=0.3)
    title = f"Gauss coefficients ({window}-sample running median over the raw values"
    title += f"; {int(gap.sum())} gaps shaded)" if gap.any() else "; no gaps)"
    axes[0, 0].set_title(title, fontsize=10)
    axes[-1, 0].set_xlabel("time (UTC)")
    fig.autofmt_xdate()
    return save(fig, path, dpi)


def plot_grid_residual(
    table: pd.DataFrame,
    path: Path,
    crs_name: str,
    units: str,
    tolerance: float | None = None,
    dpi: int = 110,
    survey: str | None = None,
) -> Path:
    """One figure of the grid residual (reading minus gridding model): map and histogram."""
    values = table["grid_residual"].to_numpy(dtype=float)
    ok = np.isfinite(values)
    step = thinning_step(int(ok.sum()))
    e = table["easting"].to_numpy()[ok][::step]
    n = table["northing"].to_numpy()[ok][::step]
    v = values[ok][::step]
    fig, (ax, hx) = plt.subplots(
        1, 2, figsize=(12, 5.2), gridspec_kw={"width_ratios": [1.35, 1]}, constrained_layout=True
    )
    lo, hi = _limits(v, True)
    many = v.size > 2000
    sc = ax.scatter(
        e,
        n,
        c=v,
        cmap=DIVERGING,
        norm=TwoSlopeNorm(0.0, lo, hi),
        s=2 if many else 18,
        linewidths=0 if many else 0.3,
        edgecolors="black",
    )
    fig.colorbar(sc, ax=ax, shrink=0.8).set_label(f"grid residual ({units})")
    map_axes(ax, crs_name, f"Grid residual at the readings ({units})", survey)
    rms = float(np.sqrt(np.mean(v**2))) if v.size else float("nan")
    lim = float(np.percentile(np.abs(v), 99.5)) if v.size else 1.0
    hx.hist(v, bins=np.linspace(-lim, lim, 61) if lim > 0 else 30, color="grey")
    if tolerance:
        for x in (-tolerance, tolerance):
            hx.axvline(x, color="red", ls="--", lw=1)
    hx.set_xlabel(f"reading minus model ({units})")
    hx.set_ylabel("readings")
    text = f"RMS {rms:.3g} {units}" + (f" (tolerance {tolerance:g} {units})" if tolerance else "")
    hx.set_title(text, fontsize=10)
    return save(fig, path, dpi)
