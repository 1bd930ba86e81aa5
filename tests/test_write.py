"""geopress.io.write: point layers written to GDAL as Arrow, and views of them."""

from __future__ import annotations

import sqlite3

import numpy as np
import pandas as pd
import pyarrow as pa
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
        # as a run gives its statuses and reasons: written as text
        "reason": pd.Categorical([None if i % 7 == 0 else f"because {i % 4}" for i in range(n)]),
    }, geometry=gpd.GeoSeries(geoms, crs="EPSG:32631"))


def _view(frame: gpd.GeoDataFrame, values: tuple[str, ...]) -> write_io.View:
    """The view of ``frame``'s rows with a ``status`` in ``values``, its extent from their points."""
    points = frame.geometry.to_numpy()
    return write_io.view_of("customers", frame, "status", values, shapely.get_x(points), shapely.get_y(points))


def _encoded(frame: gpd.GeoDataFrame) -> write_io.Encoded:
    """``frame`` as its attributes and its geometries encoded by shapely."""
    return write_io.Encoded(pd.DataFrame(frame.drop(columns=frame.geometry.name)),
                            pa.array(shapely.to_wkb(frame.geometry.to_numpy()), type=pa.binary()), frame.crs)


def test_views_read_as_the_filtered_frames(tmp_path, frame):
    # a value with a quote must not break the view's SQL; a field named like the fid GDAL gives
    # a view elsewhere must keep its name
    frame.loc[3, "status"] = "it's"
    frame.insert(4, "ogc_fid", np.arange(len(frame)) * 10)
    status = frame["status"].to_numpy(dtype=object)
    layers = {"customers": frame, "high": _view(frame, ("high",)),
              "quoted": _view(frame, ("it's",)),
              "none": _view(frame, ("nothing",))}
    out = tmp_path / "out.gpkg"
    write_io._write_layers(out, layers)
    fids = pyogrio.read_dataframe(out, layer="customers", fid_as_index=True).index.to_numpy()
    for name, sel in (("customers", np.ones(len(frame), bool)), ("high", status == "high"),
                      ("quoted", status == "it's"), ("none", np.zeros(len(frame), bool))):
        got = pyogrio.read_dataframe(out, layer=name, fid_as_index=True)
        # values compared; read back without Arrow the text columns are object, not "str"
        want = frame[sel].reset_index(drop=True).astype({"reason": "str"})  # a categorical reads back as its text
        pd.testing.assert_frame_equal(got.reset_index(drop=True), want, check_dtype=False)
        np.testing.assert_array_equal(got.index.to_numpy(), fids[sel])  # a view's fids are the customers'
        info = pyogrio.read_info(out, layer=name)
        assert info["geometry_type"] == "Point"  # an empty layer too
        assert info["crs"] == "EPSG:32631"
        assert list(info["fields"]) == ["account", "zone", "psi_max", "status", "ogc_fid", "reason"]
        assert list(info["dtypes"]) == ["object", "object", "float64", "object", "int64", "object"]
    with sqlite3.connect(out) as db:
        extent = dict((r[0], r[1:]) for r in db.execute("SELECT table_name, min_x, min_y, max_x, max_y FROM gpkg_contents"))
    high = frame.geometry[status == "high"]
    np.testing.assert_array_equal(extent["high"], high[high.notna()].total_bounds)
    assert extent["none"] == (None, None, None, None)


def test_a_view_is_filtered_by_its_base_layers_spatial_index(tmp_path, frame):
    out = tmp_path / "out.gpkg"
    write_io._write_layers(out, {"customers": frame, "high": _view(frame, ("high",))})
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
                        ({"customers": write_io.Encoded(pd.DataFrame(read.drop(columns="geometry")), wkb, read.crs)},
                         tmp_path / "passed-through.gpkg")):
        write_io._write_layers(out, {**layers, "high": _view(frame, ("high",))})
    for name in ("customers", "high"):
        here = pyogrio.read_dataframe(tmp_path / "encoded-here.gpkg", layer=name)
        through = pyogrio.read_dataframe(tmp_path / "passed-through.gpkg", layer=name)
        pd.testing.assert_frame_equal(through, here)
        assert pyogrio.read_info(tmp_path / "passed-through.gpkg", layer=name)["geometry_type"] == "Point"
    assert shapely.equals(through.geometry.to_numpy(), frame.geometry[frame["status"] == "high"].to_numpy()).all()


def test_a_view_of_several_values_and_its_extent(tmp_path, frame):
    out = tmp_path / "out.gpkg"
    write_io.write_geopackage(out, {"customers": frame,
                                    "flagged": _view(frame, ("high", "low"))})
    got = pyogrio.read_dataframe(out, layer="flagged")
    assert sorted(got["account"]) == sorted(frame.loc[frame["status"].isin(["high", "low"]), "account"])


def test_a_layer_from_an_arrow_file_is_the_frame(tmp_path, frame):
    # the writer process gets the customers as an Arrow file it maps: the same layer as the frame gives
    table = write_io.arrow_file(tmp_path / "customers.arrow", _encoded(frame))
    direct, mapped = tmp_path / "direct.gpkg", tmp_path / "mapped.gpkg"
    view = _view(frame, ("high",))
    write_io.write_geopackage(direct, {"customers": frame, "high": view})
    write_io.write_geopackage(mapped, {"customers": table, "high": view})
    for name in ("customers", "high"):
        a = pyogrio.read_dataframe(direct, layer=name, fid_as_index=True)
        b = pyogrio.read_dataframe(mapped, layer=name, fid_as_index=True)
        pd.testing.assert_frame_equal(a, b)
    # a view selecting nothing is an empty point layer of the same fields
    none = _view(frame, ("nothing",))
    write_io.write_geopackage(tmp_path / "none.gpkg", {"customers": table, "none": none})
    info = pyogrio.read_info(tmp_path / "none.gpkg", layer="none")
    assert info["features"] == 0 and info["geometry_type"] == "Point"
    assert list(info["fields"]) == list(pyogrio.read_info(direct, layer="customers")["fields"])


def test_sqlite_and_gdal_failures_are_output_errors(tmp_path, frame, monkeypatch):
    from geopress.errors import OutputError

    def full(*args):
        raise sqlite3.OperationalError("database or disk is full")

    monkeypatch.setattr(write_io, "_create_view", full)
    with pytest.raises(OutputError, match=r"cannot write the GeoPackage \(database or disk is full\)") as info:
        write_io.write_geopackage(tmp_path / "out.gpkg", {
            "customers": frame, "high": _view(frame, ("high",))})
    assert info.value.path == str(tmp_path / "out.gpkg")
    # GDAL's own errors too: SQLite cannot create the file where its folder is missing
    with pytest.raises(OutputError, match=r"cannot write the GeoPackage \(sqlite3_open"):
        write_io.write_geopackage(tmp_path / "no-folder" / "out.gpkg", {"t": pd.DataFrame({"a": [1]})})
