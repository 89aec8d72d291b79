"""ingest: output_crs = "auto" is the UTM zone of the survey centroid, whatever the input CRS.

References: the UTM zone numbering (zone = floor((lon + 180) / 6) + 1; EPSG:326zz north,
327zz south, EPSG registry) and pyproj's own transformation of the same points.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyproj
import pytest

from potfield.config import parse_config
from potfield.stages.ingest import georeference

LON = np.array([138.50, 138.52, 138.54])
LAT = np.array([-34.90, -34.91, -34.92])


def _table(crs: str) -> pd.DataFrame:
    east, north = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True).transform(LON, LAT)
    return pd.DataFrame({"easting": east, "northing": north, "source_file": "x.csv", "source_row": [2, 3, 4]})


@pytest.mark.parametrize("input_crs", ["EPSG:3857", "EPSG:32753", "EPSG:28354"])
def test_auto_is_utm_of_the_centroid_for_projected_input(input_crs):
    config = parse_config({"survey": {"kind": "magnetic", "crs": input_crs}})
    table, out = georeference(_table(input_crs), config)
    zone = int(np.floor((LON.mean() + 180) / 6)) + 1  # 54
    assert out.to_epsg() == 32700 + zone
    want = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:32754", always_xy=True).transform(LON, LAT)
    np.testing.assert_allclose(table["easting"], want[0], atol=1e-3)
    np.testing.assert_allclose(table["northing"], want[1], atol=1e-3)
    np.testing.assert_allclose(table["longitude"], LON, atol=1e-9)


def test_input_keeps_the_input_crs():
    config = parse_config({"survey": {"kind": "magnetic", "crs": "EPSG:3857", "output_crs": "input"}})
    source = _table("EPSG:3857")
    table, out = georeference(source.copy(), config)
    assert out.to_epsg() == 3857
    np.testing.assert_array_equal(table["easting"], source["easting"])
