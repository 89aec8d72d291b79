"""QC maps and profiles (matplotlib, Agg backend, PNG).

Conventions: perceptually uniform colour maps from matplotlib (``cividis``/``viridis`` for
magnitudes, ``coolwarm`` (Moreland 2009) centred on zero for signed anomalies); never a rainbow.
Map axes are easting/northing in the survey CRS, which is named on the figure, with a scale bar
and a grid-north arrow; every colour bar carries its unit.
"""

from __future__ import annotations

import io
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.colors import TwoSlopeNorm  # noqa: E402

from ..io.atomic import write_bytes  # noqa: E402

SEQUENTIAL = "cividis"
DIVERGING = "coolwarm"
CATEGORICAL = "tab20"
FIGSIZE = (7.5, 6.0)

#: Grid names whose values are signed anomalies (diverging colour map centred on zero).
SIGNED_HINTS = ("anomaly", "residual", "regional", "rtp", "dz", "dx", "dy", "upward", "external",
                "internal", "disturbance", "bouguer", "free_air", "level", "corrugation")
UNSIGNED_HINTS = ("thg", "tga", "analytic", "gradient_amplitude", "distance", "height")


def save(fig, path: Path, dpi: int = 110) -> Path:
    """Write a figure atomically as PNG and close it."""
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=dpi, bbox_inches="tight")
    plt.close(fig)
    return write_bytes(path, buffer.getvalue())


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
    ax.text(bx + length / 2, by + 0.015 * (y1 - y0), label, ha="center", va="bottom", fontsize=8,
            zorder=11, bbox={"facecolor": "white", "alpha": 0.7, "edgecolor": "none", "pad": 1})


def add_north_arrow(ax) -> None:
    """Arrow to grid north (+northing), top right."""
    ax.annotate("", xy=(0.94, 0.93), xytext=(0.94, 0.81), xycoords="axes fraction",
                arrowprops={"arrowstyle": "-|>", "color": "black", "lw": 1.5}, zorder=12)
    ax.text(0.94, 0.945, "N", transform=ax.transAxes, ha="center", va="bottom", fontsize=10,
            fontweight="bold", zorder=12)


def map_axes(ax, crs_name: str, title: str) -> None:
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


def _limits(values: np.ndarray, signed: bool) -> tuple[float, float]:
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return -1.0, 1.0
    if signed:
        half = float(np.percentile(np.abs(finite), 99)) or 1.0
        return -half, half
    lo, hi = np.percentile(finite, [1, 99])
    return float(lo), float(hi if hi > lo else lo + 1)


def plot_grid(grid, path: Path, crs_name: str, title: str | None = None, dpi: int = 110) -> Path:
    """Colour map of one grid (xarray, dims northing/easting) with unit, scale bar and arrow."""
    name = str(grid.name or "grid")
    units = grid.attrs.get("units", "")
    values = np.asarray(grid.values, dtype=float)
    signed = is_signed(name)
    fig, ax = plt.subplots(figsize=FIGSIZE)
    lo, hi = _limits(values, signed)
    kwargs = {"cmap": DIVERGING if signed else SEQUENTIAL, "shading": "auto"}
    if signed:
        kwargs["norm"] = TwoSlopeNorm(vcenter=0.0, vmin=lo, vmax=hi)
    else:
        kwargs.update(vmin=lo, vmax=hi)
    mesh = ax.pcolormesh(grid["easting"].values, grid["northing"].values, values, **kwargs)
    bar = fig.colorbar(mesh, ax=ax, shrink=0.8)
    bar.set_label(units or "value")
    map_axes(ax, crs_name, title or grid.attrs.get("long_name", name))
    return save(fig, path, dpi)


def plot_points(table: pd.DataFrame, column: str, path: Path, crs_name: str, title: str, units: str,
                dpi: int = 110) -> Path:
    """Readings coloured by a value column (e.g. the anomaly before gridding)."""
    values = table[column].to_numpy(dtype=float)
    step = max(len(table) // 200_000, 1)
    sub = table.iloc[::step]
    vals = values[::step]
    signed = is_signed(column)
    lo, hi = _limits(vals, signed)
    fig, ax = plt.subplots(figsize=FIGSIZE)
    kwargs = {"cmap": DIVERGING if signed else SEQUENTIAL, "s": 2, "linewidths": 0}
    if signed:
        kwargs["norm"] = TwoSlopeNorm(vcenter=0.0, vmin=lo, vmax=hi)
    else:
        kwargs.update(vmin=lo, vmax=hi)
    sc = ax.scatter(sub["easting"], sub["northing"], c=vals, **kwargs)
    bar = fig.colorbar(sc, ax=ax, shrink=0.8)
    bar.set_label(units)
    map_axes(ax, crs_name, title)
    return save(fig, path, dpi)


def plot_tracks(table: pd.DataFrame, path: Path, crs_name: str, dpi: int = 110) -> Path:
    """Survey tracks (or stations) coloured by line, flagged readings marked."""
    fig, ax = plt.subplots(figsize=FIGSIZE)
    codes, names = pd.factorize(table["line"])
    step = max(len(table) // 200_000, 1)
    cmap = plt.get_cmap(CATEGORICAL)
    tie = (table["line_type"] == "tie").to_numpy()
    many = len(table) > 2000
    marker = {"s": 0.5 if many else 12, "linewidths": 0}
    ax.scatter(table["easting"].to_numpy()[::step], table["northing"].to_numpy()[::step],
               c=cmap(codes[::step] % 20), **marker)
    if tie.any():
        ax.scatter(table["easting"].to_numpy()[tie][::step], table["northing"].to_numpy()[tie][::step],
                   c="black", s=marker["s"], linewidths=0, label="tie lines")
    flags = [c for c in table.columns if c.startswith("flag_")]
    if flags:
        flagged = table[flags].to_numpy(dtype=bool).any(axis=1)
        if flagged.any():
            ax.scatter(table["easting"][flagged], table["northing"][flagged], marker="x", c="red", s=14,
                       linewidths=0.8, label=f"flagged ({int(flagged.sum())})")
    if "station" in table and (not many or table["station"].nunique() <= 60):
        stations = table.groupby("station")[["easting", "northing"]].first()
        if many:  # a station network: the readings repeat at a few points
            ax.scatter(stations["easting"], stations["northing"], marker="^", s=40, c="black",
                       zorder=5, label="stations")
        for name, row in stations.iloc[:: max(len(stations) // 60, 1)].iterrows():
            ax.annotate(str(name), (row.easting, row.northing), fontsize=5 if not many else 8,
                        alpha=0.8, xytext=(3, 3), textcoords="offset points")
    if ax.get_legend_handles_labels()[0]:
        network = "station" in table and many and table["station"].nunique() <= 60
        ax.legend(loc="best", fontsize=7, markerscale=1 if network else 4)
    map_axes(ax, crs_name, f"Survey tracks coloured by line ({len(names)} lines)")
    return save(fig, path, dpi)


def plot_coverage(table: pd.DataFrame, path: Path, crs_name: str, line_spacing: float | None,
                  dpi: int = 110) -> Path:
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
        title += f" (nominal line spacing {line_spacing:.0f} m)"
    map_axes(ax, crs_name, title)
    return save(fig, path, dpi)


def plot_height_deviation(table: pd.DataFrame, path: Path, crs_name: str, tolerance: float | None,
                          dpi: int = 110) -> Path:
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


def plot_noise_profiles(table: pd.DataFrame, path: Path, column: str = "fourth_difference",
                        max_lines: int = 12, tolerance: float | None = None, dpi: int = 110) -> Path:
    """Fourth-difference profiles of up to ``max_lines`` lines, offset for legibility."""
    lines = pd.unique(table["line"])
    pick = lines[np.linspace(0, len(lines) - 1, min(max_lines, len(lines))).astype(int)]
    fig, ax = plt.subplots(figsize=(8.5, 6.5))
    d = table[column].to_numpy(dtype=float)
    scale = float(np.nanpercentile(np.abs(d), 99)) or 1.0
    for k, name in enumerate(pick):
        sel = (table["line"] == name).to_numpy()
        dist = table["distance"].to_numpy()[sel] / 1000.0
        ax.plot(dist, d[sel] / scale + 2 * k, lw=0.5, color="black")
        ax.text(dist.max() if dist.size else 0, 2 * k, f" {name}", fontsize=6, va="center")
    ax.set_xlabel("distance along line (km)")
    ax.set_ylabel(f"fourth difference, each line offset (1 unit = {scale:.3g} nT)")
    title = "Noise: fourth difference along lines"
    if tolerance:
        title += f" (tolerance {tolerance:g} nT on |d4/16|)"
    ax.set_title(title, fontsize=10)
    return save(fig, path, dpi)


def plot_timeseries(time, series: dict[str, np.ndarray], path: Path, title: str, ylabel: str,
                    band: tuple[np.ndarray, np.ndarray] | None = None, dpi: int = 110) -> Path:
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


def plot_histograms(series: dict[str, np.ndarray], path: Path, title: str, xlabel: str,
                    dpi: int = 110) -> Path:
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


def plot_bars(labels, values, path: Path, title: str, ylabel: str, tolerance: float | None = None,
              dpi: int = 110) -> Path:
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


def plot_panels(grids: list, path: Path, crs_name: str, title: str, dpi: int = 110) -> Path:
    """Side-by-side maps sharing one symmetric colour scale (e.g. field = regional + residual)."""
    fig, axes = plt.subplots(1, len(grids), figsize=(5.2 * len(grids), 5.0), squeeze=False)
    values = np.concatenate([np.asarray(g.values, float).ravel() for g in grids])
    lo, hi = _limits(values, True)
    for ax, grid in zip(axes[0], grids):
        mesh = ax.pcolormesh(grid["easting"].values, grid["northing"].values, grid.values,
                             cmap=DIVERGING, norm=TwoSlopeNorm(0.0, lo, hi), shading="auto")
        fig.colorbar(mesh, ax=ax, shrink=0.7).set_label(grid.attrs.get("units", ""))
        map_axes(ax, crs_name, grid.attrs.get("long_name", str(grid.name)))
    fig.suptitle(title, fontsize=11)
    return save(fig, path, dpi)
