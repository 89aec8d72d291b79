"""Crossover misclosures before and after levelling (figure for the report).

Drawn from the level stage's ``out/tables/crossovers.csv`` (or the same table in memory), so it
can be rebuilt without recomputing: ``plot_crossover_histograms(read_csv(...), path)``. The
report (``qc/report.py``) may link it as ``out/maps/level_crossovers.png``.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

#: File name under out/maps/ the report uses for this figure.
FIGURE_NAME = "level_crossovers.png"


def crossover_series(crossovers: pd.DataFrame) -> dict[str, np.ndarray]:
    """The misclosures to compare, over the crossovers the levelling used.

    Returns ``{"before": ..., "after": ...}`` from the height-corrected columns when the level
    stage corrected for height differences (``difference_height_corrected``,
    ``difference_levelled_height_corrected``), else from ``difference`` and
    ``difference_levelled``; each a finite array.
    """
    used = (
        crossovers["used"].astype(bool).to_numpy()
        if "used" in crossovers
        else np.ones(len(crossovers), dtype=bool)
    )
    corrected = (
        "difference_height_corrected" in crossovers
        and "gradient_up" in crossovers
        and np.isfinite(crossovers["gradient_up"].to_numpy(float)).any()
    )
    before = "difference_height_corrected" if corrected else "difference"
    after = "difference_levelled_height_corrected" if corrected else "difference_levelled"
    out = {}
    for key, col in (("before", before), ("after", after)):
        values = crossovers[col].to_numpy(float)[used]
        out[key] = values[np.isfinite(values)]
    return out


def plot_crossover_histograms(
    crossovers: pd.DataFrame, path: Path, units: str = "nT", dpi: int = 110
) -> Path:
    """Histograms of the crossover misclosures before and after levelling, with their RMS.

    Parameters
    ----------
    crossovers : pandas.DataFrame
        The level stage's crossovers table.
    path : Path
        PNG to write (atomically).
    units : str
        Field units for the axis label.
    """
    from .maps import plt, save

    series = crossover_series(crossovers)
    both = np.concatenate([series["before"], series["after"]])
    fig, ax = plt.subplots(figsize=(7.0, 4.2))
    if both.size:
        lim = float(np.quantile(np.abs(both), 0.99)) or 1.0
        bins = np.linspace(-lim, lim, 41)
        for key, colour in (("before", "#8c8c8c"), ("after", "#2b6cb0")):
            values = series[key]
            rms = float(np.sqrt(np.mean(values**2))) if values.size else float("nan")
            ax.hist(
                np.clip(values, -lim, lim),
                bins=bins,
                alpha=0.6,
                color=colour,
                label=f"{key} levelling: RMS {rms:.3g} {units} ({values.size} crossovers)",
            )
        ax.legend(loc="upper right", fontsize=8)
    else:
        ax.text(0.5, 0.5, "no usable crossover", ha="center", va="center", transform=ax.transAxes)
    corrected = (
        "height_effect" in crossovers
        and "gradient_up" in crossovers
        and np.isfinite(crossovers["gradient_up"].to_numpy(float)).any()
    )
    ax.set_xlabel(f"misclosure line - tie ({units})" + (", height effect removed" if corrected else ""))
    ax.set_ylabel("crossovers")
    ax.set_title("Crossover misclosures before and after levelling")
    return save(fig, Path(path), dpi=dpi)
