"""geopress.io.vector.read_layer / read_customers: the frame, and the file's WKB kept only where it is the output's."""

from __future__ import annotations

import struct
from unittest import mock

import numpy as np
import pandas as pd
import pyarrow as pa
import pyogrio
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st

from conftest import customer_records, write_layer
from geopress.config import CustomersConfig
from geopress.errors import InputError
from geopress.io import vector as vector_io


def test_read_layer_gives_the_frame_pyogrio_reads(tmp_path):
    # reference: pyogrio.read_dataframe(use_arrow=True), the reader this one replaces
    path = write_layer(tmp_path / "c.gpkg", "parcels", {
        "account": ["A1", "A2", "A3"], "owner": ["Ann", None, "Cy, Jr."], "floors": [1, 2, 3], "area": [1.5, np.nan, 3.0],
    }, [shapely.Point(1, 2), None, shapely.box(0, 0, 1, 1)])
    got, wkb = vector_io.read_layer(path, "parcels", ["account", "owner", "floors", "area"])
    expected = pyogrio.read_dataframe(path, layer="parcels", columns=["account", "owner", "floors", "area"], use_arrow=True)
    pd.testing.assert_frame_equal(got, expected)
    assert got.crs == expected.crs
    assert wkb.to_pylist() == [shapely.to_wkb(g) if g is not None else None for g in expected.geometry]


@pytest.mark.parametrize("one_chunk_bytes", [None, 40])
def test_text_and_wkb_read_in_batches_come_in_one_chunk(tmp_path, monkeypatch, one_chunk_bytes):
    # pandas takes rows of an Arrow column of many chunks by joining them all first; read in batches of 3 rows,
    # the customers' text and WKB still come in one chunk each, the same values as pyogrio reads. With a chunk's
    # limit below the column's bytes, text is made large_string first (still one chunk) and the WKB stays in batches.
    n = 10
    records = {"account": [f"A{i}" for i in range(n)], "owner": [None if i == 4 else f"Owner {i}" for i in range(n)],
               "floors": list(range(n))}
    path = write_layer(tmp_path / "c.gpkg", "parcels", records, [shapely.Point(i, 2 * i) for i in range(n)])
    monkeypatch.setattr(vector_io, "READ_BATCH_ROWS", 3)
    if one_chunk_bytes is not None:
        monkeypatch.setattr(vector_io, "ONE_CHUNK_BYTES", one_chunk_bytes)
    cust = vector_io.read_customers(CustomersConfig(path=path, layer="parcels", id_field="account",
                                                    mail_fields=("owner",)))
    expected = pyogrio.read_dataframe(path, layer="parcels", use_arrow=True)
    for column in ("account", "owner"):
        assert cust.frame[column].array._pa_array.num_chunks == 1
        pd.testing.assert_series_equal(cust.frame[column], expected[column])
    assert cust.wkb.num_chunks == (1 if one_chunk_bytes is None else 4)
    assert cust.wkb.to_pylist() == [shapely.to_wkb(g) for g in expected.geometry]


def test_a_layer_without_geometry_is_an_input_error(tmp_path):
    path = tmp_path / "c.gpkg"
    pyogrio.write_dataframe(pd.DataFrame({"account": ["A1"]}), path, layer="table", driver="GPKG")
    with pytest.raises(InputError, match="layer 'table' has no geometry"):
        vector_io.read_layer(path, "table", ["account"])


POINT = shapely.Point(10, 20)


@pytest.mark.filterwarnings("ignore::geopress.errors.GeometryWarning")  # the missing ones are reported
@pytest.mark.parametrize("other, passed_through", [
    (shapely.Point(30, 40), True),
    (None, True),  # a missing geometry stays missing
    (shapely.Point(), False),  # an empty point becomes missing
    (shapely.box(0, 0, 2, 2), False),  # a parcel becomes a point on its surface
    (shapely.MultiPoint([(1, 1), (2, 2)]), False),
    (shapely.Point(30, 40, 5), False),  # the output layers are 2D
])
def test_the_customers_wkb_is_their_2d_points_the_files_own_when_they_are(tmp_path, other, passed_through):
    path = write_layer(tmp_path / "c.gpkg", "parcels", customer_records([0, 0], [0, 0]), [POINT, other])
    cust = vector_io.read_customers(CustomersConfig(path=path, layer="parcels", id_field="account"))
    if other is None or other.is_empty:
        point = None
    else:
        point = other if other.geom_type == "Point" else shapely.point_on_surface(other)
        point = shapely.to_wkb(shapely.Point(point.x, point.y))
    # shapely's own encoding of the 2D points is the reference
    assert cust.wkb.to_pylist() == [shapely.to_wkb(POINT), point]
    file_wkb = pyogrio.read_arrow(path, layer="parcels")[1]["geom"].to_pylist()
    assert (cust.wkb.to_pylist() == file_wkb) == passed_through


def test_a_point_with_an_m_value_is_not_passed_through(tmp_path):
    # ISO WKB of POINT M (1 2 3): type 2001 (OGC Simple Features, ISO 19125; from memory, and the bytes
    # shapely.to_wkb(flavor="iso") writes for it), written by GDAL as it is
    point_m = struct.pack("<BIddd", 1, 2001, 1.0, 2.0, 3.0)
    table = pa.table({"account": ["A1", "A2"], "geom": [shapely.to_wkb(POINT), point_m]})
    path = tmp_path / "c.gpkg"
    pyogrio.write_arrow(table, path, layer="parcels", driver="GPKG", geometry_name="geom", geometry_type="Unknown",
                        crs="EPSG:32631")
    cust = vector_io.read_customers(CustomersConfig(path=path, layer="parcels", id_field="account"))
    assert cust.wkb.to_pylist() == [shapely.to_wkb(POINT), shapely.to_wkb(shapely.Point(1, 2))]


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(st.floats(-1e7, 1e7), st.floats(-1e7, 1e7)) | st.just((np.nan, np.nan)), max_size=20))
def test_points_wkb_is_what_shapely_encodes(xy):
    # shapely's to_wkb (GEOS's writer) is the reference for a 2D point's bytes; null where there is no point
    x = np.array([p[0] for p in xy], dtype=float)
    y = np.array([p[1] for p in xy], dtype=float)
    expected = [None if np.isnan(a) else shapely.to_wkb(shapely.Point(a, b)) for a, b in zip(x, y)]
    assert vector_io.points_wkb(x, y).to_pylist() == expected


@settings(max_examples=150, deadline=None)
@given(st.one_of(
    st.lists(st.text(alphabet="ab0 \u00e9", max_size=3) | st.none(), max_size=12).map(
        lambda v: pd.Series(v, dtype=pd.StringDtype(na_value=np.nan))),  # text as read_layer gives it
    st.lists(st.text(alphabet="ab0", max_size=2), max_size=12).map(lambda v: pd.Series(v, dtype=object)),
    st.lists(st.integers(-3, 3), max_size=12).map(lambda v: pd.Series(v, dtype=np.int64)),
    st.lists(st.sampled_from([0.0, -0.0, 1.5, np.nan]), max_size=12).map(lambda v: pd.Series(v, dtype=float)),
))
def test_has_duplicates_agrees_with_pandas_duplicated(values):
    # pandas' own duplicated (a hash table) is the reference, missing values counting as one value
    assert vector_io.has_duplicates(values) == bool(values.duplicated().any())


@pytest.mark.filterwarnings("ignore::geopress.errors.GeometryWarning")  # the missing one is reported
def test_customers_decoded_a_chunk_at_a_time_are_the_same(tmp_path, monkeypatch):
    geoms = [POINT, shapely.box(0, 0, 2, 2), None, shapely.Point(), shapely.Point(30, 40, 5), shapely.Point(7, 8),
             shapely.MultiPolygon([shapely.box(5, 5, 6, 6)])]
    path = write_layer(tmp_path / "c.gpkg", "parcels", customer_records([0] * 7, [0] * 7), geoms)
    cfg = CustomersConfig(path=path, layer="parcels", id_field="account")
    whole = vector_io.read_customers(cfg)
    monkeypatch.setattr(vector_io, "GEOMETRY_CHUNK", 2)
    chunked = vector_io.read_customers(cfg)
    np.testing.assert_array_equal(chunked.x, whole.x)
    np.testing.assert_array_equal(chunked.y, whole.y)
    assert chunked.wkb.to_pylist() == whole.wkb.to_pylist()
    assert (chunked.from_polygons, chunked.no_geometry) == (whole.from_polygons, whole.no_geometry) == (2, 2)
    on_surface = shapely.point_on_surface(geoms[1])
    assert (whole.x[1], whole.y[1]) == (on_surface.x, on_surface.y)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.floats(-1e7, 1e7), st.floats(-1e7, 1e7)) | st.just(None) | st.just("empty"),
                min_size=1, max_size=30), st.integers(1, 5))
def test_plain_points_read_from_the_bytes_are_shapelys(items, chunk):
    # shapely's reading of the same WKB (GEOS's reader) is the reference: a null is no point, and so is an empty
    # point, which WKB gives as NaN, NaN
    geoms = [None if g is None else shapely.Point() if g == "empty" else shapely.Point(*g) for g in items]
    wkb = pa.chunked_array([pa.array(shapely.to_wkb(np.array(geoms, dtype=object)), type=pa.binary())])
    ids = pd.Series([f"C{i}" for i in range(len(geoms))])
    assert vector_io._plain_points(wkb) is not None  # read from the bytes
    with mock.patch.object(vector_io, "GEOMETRY_CHUNK", chunk):
        fast = vector_io._locate(wkb, ids, "c.gpkg", "parcels")
        with mock.patch.object(vector_io, "_plain_points", return_value=None):
            slow = vector_io._locate(wkb, ids, "c.gpkg", "parcels")
    np.testing.assert_array_equal(fast.x, slow.x)
    np.testing.assert_array_equal(fast.y, slow.y)
    np.testing.assert_array_equal(fast.has, slow.has)
    assert fast.unchanged == slow.unchanged == ("empty" not in items)
    assert fast.has.tolist() == [isinstance(g, tuple) for g in items]


def test_other_wkb_is_left_to_shapely():
    # big-endian (byte order 0) and a 3D point: not read from the bytes
    big_endian = struct.pack(">BIdd", 0, 1, 1.0, 2.0)
    assert vector_io._plain_points(pa.array([big_endian, None])) is None
    assert vector_io._plain_points(pa.array([shapely.to_wkb(shapely.Point(1, 2, 3))])) is None
    assert vector_io._plain_points(pa.array([shapely.to_wkb(shapely.box(0, 0, 1, 1))])) is None
