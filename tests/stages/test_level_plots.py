"""The crossover histogram figure (potfield.qc.level_plots) from a level-stage table."""

from __future__ import annotations

import numpy as np
import pandas as pd

from potfield.qc.level_plots import crossover_series, plot_crossover_histograms


def test_histogram_figure_is_a_png_and_uses_the_used_crossovers(tmp_path):
    rng = np.random.default_rng(0)
    cx = pd.DataFrame(
        {
            "difference": rng.normal(0, 5, 50),
            "difference_levelled": rng.normal(0, 0.5, 50),
            "used": np.r_[np.ones(45, bool), np.zeros(5, bool)],
        }
    )
    series = crossover_series(cx)
    assert series["before"].size == 45 and series["after"].size == 45
    path = plot_crossover_histograms(cx, tmp_path / "maps" / "level_crossovers.png")
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
    cx["gradient_up"] = 0.1
    cx["height_effect"] = 1.0
    cx["difference_height_corrected"] = cx["difference"] - 1.0
    cx["difference_levelled_height_corrected"] = cx["difference_levelled"] - 1.0
    np.testing.assert_allclose(crossover_series(cx)["after"], cx["difference_levelled"][:45] - 1.0)
