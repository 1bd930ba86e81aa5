"""geopress.io.write: point layers written to GDAL as Arrow, and views of them."""

from __future__ import annotations

import sqlite3

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


def test_views_read_as_the_filtered_frames(tmp_path, frame):
    # a value with a quote must not break the view's SQL; a field named like the fid GDAL gives
    # a view elsewhere must keep its name
    frame.loc[3, "status"] = "it's"
    frame.insert(4, "ogc_fid", np.arange(len(frame)) * 10)
    status = frame["status"].to_numpy(dtype=object)
    layers = {"customers": frame, "high": write_io.View("customers", "status", "high"),
              "quoted": write_io.View("customers", "status", "it's"),
              "none": write_io.View("customers", "status", "nothing")}
    out = tmp_path / "out.gpkg"
    write_io._write_layers(out, layers)
    fids = pyogrio.read_dataframe(out, layer="customers", fid_as_index=True).index.to_numpy()
    for name, sel in (("customers", np.ones(len(frame), bool)), ("high", status == "high"),
                      ("quoted", status == "it's"), ("none", np.zeros(len(frame), bool))):
        got = pyogrio.read_dataframe(out, layer=name, fid_as_index=True)
        # values compared; read back without Arrow the text columns are object, not "str"
        pd.testing.assert_frame_equal(got.reset_index(drop=True), frame[sel].reset_index(drop=True), check_dtype=False)
        np.testing.assert_array_equal(got.index.to_numpy(), fids[sel])  # a view's fids are the customers'
        info = pyogrio.read_info(out, layer=name)
        assert info["geometry_type"] == "Point"  # an empty layer too
        assert info["crs"] == "EPSG:32631"
        assert list(info["fields"]) == ["account", "zone", "psi_max", "status", "ogc_fid"]
        assert list(info["dtypes"]) == ["object", "object", "float64", "object", "int64"]
    with sqlite3.connect(out) as db:
        extent = dict((r[0], r[1:]) for r in db.execute("SELECT table_name, min_x, min_y, max_x, max_y FROM gpkg_contents"))
    high = frame.geometry[status == "high"]
    np.testing.assert_array_equal(extent["high"], high[high.notna()].total_bounds)
    assert extent["none"] == (None, None, None, None)


def test_a_view_is_filtered_by_its_base_layers_spatial_index(tmp_path, frame):
    out = tmp_path / "out.gpkg"
    write_io._write_layers(out, {"customers": frame, "high": write_io.View("customers", "status", "high")})
    bbox = (200.0, 200.0, 800.0, 800.0)
    got = pyogrio.read_dataframe(out, layer="high", bbox=bbox)
    x, y = frame.geometry.x.to_numpy(), frame.geometry.y.to_numpy()
    inside = (frame["status"] == "high").to_numpy() & (x >= 200) & (x <= 800) & (y >= 200) & (y <= 800)
    assert 0 < inside.sum() < (frame["status"] == "high").sum()  # the box selects some of them, not all
    assert sorted(got["account"]) == sorted(frame.loc[inside, "account"])
    # GDAL says it has an index to filter the view by (the customers'), as it does for the table
    assert pyogrio.read_info(out, layer="high")["capabilities"]["fast_spatial_filter"]


def test_a_layer_with_the_files_wkb_is_written_as_its_frame(tmp_path, frame):
    # geometries passed through as the file's WKB give the same layer as encoding the frame's
    source = tmp_path / "in.gpkg"
    write_io._write_layers(source, {"customers": frame})
    read, wkb = vector_io.read_layer(source, "customers", list(frame.columns.drop("geometry")))
    for layers, out in (({"customers": read}, tmp_path / "encoded-here.gpkg"),
                        ({"customers": write_io.Encoded(read, wkb)}, tmp_path / "passed-through.gpkg")):
        write_io._write_layers(out, {**layers, "high": write_io.View("customers", "status", "high")})
    for name in ("customers", "high"):
        here = pyogrio.read_dataframe(tmp_path / "encoded-here.gpkg", layer=name)
        through = pyogrio.read_dataframe(tmp_path / "passed-through.gpkg", layer=name)
        pd.testing.assert_frame_equal(through, here)
        assert pyogrio.read_info(tmp_path / "passed-through.gpkg", layer=name)["geometry_type"] == "Point"
    assert shapely.equals(through.geometry.to_numpy(), frame.geometry[frame["status"] == "high"].to_numpy()).all()
