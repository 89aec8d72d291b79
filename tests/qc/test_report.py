"""The report page: sections present in order, number formatting, tolerance coverage."""

from __future__ import annotations

import math

from potfield.config import parse_config
from potfield.qc.report import fmt, metric_unit, render_html


def _manifest():
    return {
        "potfield_version": "0",
        "config_hash": "abc",
        "packages": {"numpy": "2"},
        "inputs": {"raw/a.csv": "00"},
        "spec": {
            "gravity_repeat_mgal": [0.03, "common practice"],
            "crossover_rms_mGal": [0.03, "common practice"],
            "drape_tolerance_m": [15.0, "common practice (drape within +-15 m)"],
        },
        # manifest keys sorted: the page must still follow the pipeline order
        "stages": {
            "drift": {"status": "done", "metrics": {"drift_rate_mgal_per_h": 0.0345, "stations": 258}},
            "ingest": {
                "status": "done",
                "metrics": {
                    "readings": 57030,
                    "crs": "UTM 55S",
                    "traverse_lines": 23,
                    "tie_lines": 0,
                    "time_start": "2025-03-03 21:40:00",
                },
            },
        },
    }


def test_sections_in_order_and_gravity_words():
    config = parse_config({"survey": {"kind": "gravity", "name": "Test survey"}})
    checks = [
        {
            "stage": "drift",
            "check": "repeat range",
            "value": 0.018,
            "tolerance": 0.03,
            "sense": "<=",
            "unit": "mGal",
            "result": "pass",
            "source": "common practice",
        }
    ]
    page = render_html(config, _manifest(), {}, checks, {}, "[survey]\nkind = 'gravity'\n", [])
    order = [
        page.index(f"id='{a}'")
        for a in (
            "contents",
            "summary",
            "deliverables",
            "failed-checks",
            "tolerances",
            "stage-ingest",
            "stage-drift",
            "provenance",
            "cautions",
        )
    ]
    assert order == sorted(order)
    assert "stations" in page and "traverse" not in page and "tie lines" not in page
    assert "loops in readings" in page
    assert "qualified geophysicist" in page and "licensed" in page
    assert "kind = &#x27;gravity&#x27;" in page  # the survey.toml used, embedded
    assert "checked: repeat range (pass)" in page
    # a check is matched to a tolerance by value and name, not by a shared "common practice" source
    assert page.count("checked: repeat range") == 1
    assert "not checked: shown on the height-deviation map" in page
    assert (
        "57,030" in page
        and "e+0" not in page
        and "NaN" not in page
        and "{" not in page.split("<body>")[1].split("<script>")[0]
    )


def test_residual_summary_in_the_deliverables():
    import numpy as np
    import pandas as pd

    config = parse_config({"survey": {"kind": "gravity"}})
    table = pd.DataFrame({"grid_residual": [0.03, -0.04, np.nan], "tide": [0.1, 0.1, 0.1]})
    page = render_html(config, _manifest(), {}, [], {}, None, [], table)
    deliverables = page[page.index("id='deliverables'") : page.index("id='failed-checks'")]
    assert "Residuals and corrections at the readings" in deliverables
    assert "<td>grid_residual</td>" in deliverables and "<td>mGal</td>" in deliverables
    assert "0.0354" in deliverables  # RMS of 0.03 and -0.04 = sqrt(0.00125)


def test_number_formatting_has_meaningful_digits():
    assert fmt(57030.4) == "57,030.4"
    assert fmt(0.0345124898) == "0.0345"
    assert fmt(math.nan) == "-" and fmt(None) == "-"
    assert fmt(True) == "yes"
    assert fmt({"flag_spike": 3}) == "flag spike: 3"
    assert metric_unit("drift_rate_mgal_per_h", "gravity") == ("drift rate", "mGal/h")
    assert metric_unit("grid_residual_rms", "magnetic") == ("grid residual rms", "nT")
