"""geopress.io.write: point layers and their subsets streamed to GDAL as Arrow batches."""

from __future__ import annotations

import numpy as np
import pandas as pd
import geopandas as gpd
import pyogrio
import pytest
import shapely

from geopress.io import vector as vector_io
from geopress.io import write as write_io


@pytest.fixture
def frame() -> gpd.GeoDataFrame:
    n = 23
    rng = np.random.default_rng(5)
    geoms = list(shapely.points(rng.uniform(0, 1000, n), rng.uniform(0, 1000, n)))
    geoms[4] = None  # a customer without geometry
    return gpd.GeoDataFrame({
        "account": pd.array([f"A{i:03d}" for i in range(n)], dtype="str"),
        "zone": pd.array([None if i % 5 == 0 else f"Z{i % 3}" for i in range(n)], dtype="str"),
        "psi_max": rng.uniform(20, 120, n),
        "status": pd.array(rng.choice(["ok", "high", "low"], n), dtype="str"),
    }, geometry=gpd.GeoSeries(geoms, crs="EPSG:32631"))


def test_subsets_are_written_as_the_filtered_frames(tmp_path, frame, monkeypatch):
    # batches of 7 rows: several batches, some of which select nothing
    monkeypatch.setattr(write_io, "BATCH_ROWS", 7)
    status = frame["status"].to_numpy(dtype=object)
    layers = {"customers": frame, "high": write_io.Subset("customers", status == "high"),
              "none": write_io.Subset("customers", np.zeros(len(frame), dtype=bool))}
    out = tmp_path / "out.gpkg"
    write_io._write_layers(out, layers)
    for name, expected in (("customers", frame), ("high", frame[status == "high"]), ("none", frame.iloc[:0])):
        got = pyogrio.read_dataframe(out, layer=name)
        # values compared; read back without Arrow the text columns are object, not "str"
        pd.testing.assert_frame_equal(got, expected.reset_index(drop=True), check_dtype=False)
        info = pyogrio.read_info(out, layer=name)
        assert info["geometry_type"] == "Point"  # an empty layer too
        assert info["crs"] == "EPSG:32631"
        assert list(info["fields"]) == ["account", "zone", "psi_max", "status"]
        assert list(info["dtypes"]) == ["object", "object", "float64", "object"]


def test_a_layer_with_the_files_wkb_is_written_as_its_frame(tmp_path, frame):
    # geometries passed through as the file's WKB give the same layer as encoding the frame's
    source = tmp_path / "in.gpkg"
    write_io._write_layers(source, {"customers": frame})
    read, wkb = vector_io.read_layer(source, "customers", list(frame.columns.drop("geometry")))
    status = read["status"].to_numpy(dtype=object)
    for layers, out in (({"customers": read}, tmp_path / "encoded-here.gpkg"),
                        ({"customers": write_io.Encoded(read, wkb)}, tmp_path / "passed-through.gpkg")):
        write_io._write_layers(out, {**layers, "high": write_io.Subset("customers", status == "high")})
    for name in ("customers", "high"):
        here = pyogrio.read_dataframe(tmp_path / "encoded-here.gpkg", layer=name)
        through = pyogrio.read_dataframe(tmp_path / "passed-through.gpkg", layer=name)
        pd.testing.assert_frame_equal(through, here)
        assert pyogrio.read_info(tmp_path / "passed-through.gpkg", layer=name)["geometry_type"] == "Point"
    assert shapely.equals(through.geometry.to_numpy(), frame.geometry[frame["status"] == "high"].to_numpy()).all()
