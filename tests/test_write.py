"""geopress.io.write: point layers written to GDAL as Arrow, and views of them."""

from __future__ import annotations

import sqlite3
import threading
import time
from unittest.mock import patch

import numpy as np
import pandas as pd
import pyarrow as pa
import geopandas as gpd
import pyogrio
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
import shapely

from geopress.errors import OutputError
from geopress.io import vector as vector_io
from geopress.io import write as write_io
from geopress.tables import neutralise_frame


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


def _send_in_thread(pipe, table, **kwargs):
    """Send ``table`` through ``pipe`` from a thread, as a run does; returns the thread and its result holder."""
    sent = []
    stop = kwargs.pop("stop", threading.Event())
    thread = threading.Thread(target=lambda: sent.append(write_io.send_arrow(
        pipe, table, reader_alive=lambda: True, stop=stop, timeout_s=30)))
    thread.start()
    return thread, sent


def test_a_layer_sent_through_a_pipe_is_the_frame(tmp_path, frame):
    # the writer process gets the customers through a named pipe: the same layer as the frame gives
    pipe, table = write_io.arrow_pipe(tmp_path / "customers.arrows", _encoded(frame))
    direct, piped = tmp_path / "direct.gpkg", tmp_path / "piped.gpkg"
    view = _view(frame, ("high",))
    write_io.write_geopackage(direct, {"customers": frame, "high": view})
    write_io.make_pipe(pipe)
    thread, sent = _send_in_thread(pipe, table)
    write_io.write_geopackage(piped, {"customers": pipe, "high": view})
    thread.join(30)
    assert sent == [True]
    for name in ("customers", "high"):
        a = pyogrio.read_dataframe(direct, layer=name, fid_as_index=True)
        b = pyogrio.read_dataframe(piped, layer=name, fid_as_index=True)
        pd.testing.assert_frame_equal(a, b)
    # a view selecting nothing is an empty point layer of the same fields
    none = _view(frame, ("nothing",))
    thread, sent = _send_in_thread(pipe, table)
    write_io.write_geopackage(tmp_path / "none.gpkg", {"customers": pipe, "none": none})
    thread.join(30)
    info = pyogrio.read_info(tmp_path / "none.gpkg", layer="none")
    assert info["features"] == 0 and info["geometry_type"] == "Point"
    assert list(info["fields"]) == list(pyogrio.read_info(direct, layer="customers")["fields"])


def test_a_table_made_in_two_goes_has_the_columns_in_the_frames_order(tmp_path, frame):
    # the run makes the customers' table before their target areas are in, then adds those columns where the frame
    # has them; a column with no value at all is text, as in a table made at once
    frame = frame.assign(empty=pd.array([None] * len(frame), dtype=object))
    whole = _encoded(frame)
    early = write_io.point_table(write_io.Encoded(whole.frame[["account", "psi_max", "reason"]], whole.wkb, whole.crs))
    _, at_once = write_io.arrow_pipe(tmp_path / "a.arrows", whole)
    pipe, in_two = write_io.arrow_pipe(tmp_path / "b.arrows", whole, made=early)
    assert in_two.column_names == [*frame.columns.drop("geometry"), "geometry"]
    assert in_two.equals(at_once)
    assert in_two.schema.field("empty").type == pa.large_string()
    assert pipe.rows == len(frame) and pipe.geometry == "geometry" and pipe.crs == "EPSG:32631"


def test_a_stream_cut_short_is_an_output_error_not_a_shorter_layer(tmp_path, frame, monkeypatch):
    # the sender stops after the first batch and ends the stream cleanly: the writer counts the rows
    monkeypatch.setattr(write_io, "ARROW_BATCH_ROWS", 2)
    pipe, table = write_io.arrow_pipe(tmp_path / "customers.arrows", _encoded(frame))
    write_io.make_pipe(pipe)
    stop = threading.Event()
    real = pa.ipc.RecordBatchStreamWriter.write_batch

    def one_then_stop(self, batch):
        real(self, batch)
        stop.set()

    monkeypatch.setattr(pa.ipc.RecordBatchStreamWriter, "write_batch", one_then_stop)
    thread, sent = _send_in_thread(pipe, table, stop=stop)
    with pytest.raises(OutputError, match=rf"reached the writer incomplete \(2 of {len(frame)} rows\)"):
        write_io.write_geopackage(tmp_path / "cut.gpkg", {"customers": pipe})
    thread.join(30)
    assert sent == [False]


def test_a_sender_gives_up_on_a_writer_that_never_opens_the_pipe(tmp_path, frame):
    pipe, table = write_io.arrow_pipe(tmp_path / "customers.arrows", _encoded(frame))
    write_io.make_pipe(pipe)
    t0 = time.monotonic()
    assert not write_io.send_arrow(pipe, table, reader_alive=lambda: False, stop=threading.Event(), timeout_s=30)
    assert not write_io.send_arrow(pipe, table, reader_alive=lambda: True, stop=threading.Event(), timeout_s=0.2)
    assert time.monotonic() - t0 < 10


def test_a_sender_whose_writer_goes_away_stops_without_an_error(tmp_path, frame, monkeypatch):
    monkeypatch.setattr(write_io, "ARROW_BATCH_ROWS", 100)
    big = pd.concat([frame] * 20000, ignore_index=True)  # more than the pipe holds
    pipe, table = write_io.arrow_pipe(tmp_path / "customers.arrows", _encoded(big))
    write_io.make_pipe(pipe)
    thread, sent = _send_in_thread(pipe, table)
    with open(pipe.path, "rb") as reader:  # reads a little, then goes away
        reader.read(1000)
    thread.join(30)
    assert sent == [False]


@pytest.mark.parametrize("before", [None, "NORMAL"])
def test_a_geopackage_is_written_without_syncs_and_the_setting_restored(tmp_path, frame, monkeypatch, before):
    # SQLite's syncs made the first commit after the customers wait for the whole file to reach the disk; the
    # option is global to the process, so whatever it was is put back
    pyogrio.set_gdal_config_options({write_io.SYNC_OPTION: before})
    seen = []
    real = pyogrio.write_dataframe

    def write(*args, **kwargs):
        seen.append(pyogrio.get_gdal_config_option(write_io.SYNC_OPTION))
        return real(*args, **kwargs)

    monkeypatch.setattr(pyogrio, "write_dataframe", write)
    try:
        write_io.write_geopackage(tmp_path / "out.gpkg", {"customers": frame, "high": _view(frame, ("high",)),
                                                           "table": pd.DataFrame({"a": [1]})})
        assert seen and set(seen) == {False}  # pyogrio reads "OFF" back as False
        assert pyogrio.get_gdal_config_option(write_io.SYNC_OPTION) == before
    finally:
        pyogrio.set_gdal_config_options({write_io.SYNC_OPTION: None})
    # the run's own SQLite connections (views, layer styles) do the same
    con = write_io._connect(tmp_path / "out.gpkg")
    try:
        assert con.execute("PRAGMA synchronous").fetchone()[0] == 0  # 0 is OFF (SQLite's PRAGMA docs, from memory)
    finally:
        con.close()


def test_sqlite_and_gdal_failures_are_output_errors(tmp_path, frame, monkeypatch):
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


# cells that test the CSV's quoting: commas, quotes, newlines, spaces, a formula's apostrophe, non-ASCII, empty
list_text = st.one_of(st.none(), st.text(alphabet=st.sampled_from(list('ab ,"\n\'é€=;')), max_size=6),
                      st.text(max_size=4).filter(lambda s: "\r" not in s))
# floats as the lists hold them: rounded to 0.1 or 0.01, whole, -0.0, NaN
list_float = st.one_of(st.integers(-20_000, 20_000).map(lambda i: i / 10),
                       st.integers(-2_000_000, 2_000_000).map(lambda i: i / 100), st.just(-0.0), st.just(float("nan")))
# and anything else: carriage returns, infinities, the tiny and the huge that print with an exponent
any_text = st.one_of(list_text, st.text(alphabet=st.sampled_from(list("a\r\n,")), max_size=4))
any_float = st.one_of(list_float, st.floats(allow_infinity=True), st.sampled_from([1e-5, 1e8, 1e10, 1e16, 1e300]))
count = st.one_of(st.none(), st.integers(-2**40, 2**40))


def list_frame(rows, categorical):
    text, number, n, other = zip(*rows)
    return pd.DataFrame({"owner": pd.array(text, dtype="str"), "worst_psi": np.array(number, dtype=np.float64),
                         "customer_count": pd.array(n, dtype="Int64"),
                         "zones": pd.Categorical(other) if categorical else pd.array(other, dtype="str"),
                         "plain": np.arange(len(rows))})


def assert_pandas_bytes(path, df):
    # pandas' to_csv (the csv module, QUOTE_MINIMAL) of the whole frame, a general-purpose reference: the same
    # bytes, whether the rows are made all at once or two at a time (a value pandas must write in a later slice
    # than the first), and with a mailing list's formula guard (its text is never categorical) applied a slice at
    # a time or to the whole frame
    want = path.with_name("want.csv")
    df.to_csv(want, index=False, encoding="utf-8-sig", lineterminator="\n")
    listed = not any(isinstance(t, pd.CategoricalDtype) for t in df.dtypes)
    guarded = path.with_name("guarded.csv")
    if listed:
        neutralise_frame(df).to_csv(guarded, index=False, encoding="utf-8-sig", lineterminator="\n")
    for rows in (write_io.CSV_CHUNK_ROWS, 2):
        with patch.object(write_io, "CSV_CHUNK_ROWS", rows):
            write_io.write_csv(path, df)
            assert path.read_bytes() == want.read_bytes()
            if listed:
                write_io.write_list_csv(path, df)
                assert path.read_bytes() == guarded.read_bytes()


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(list_text, list_float, count, list_text), min_size=1, max_size=30), st.booleans())
def test_a_lists_csv_is_made_by_arrow_byte_for_byte_as_pandas(tmp_path_factory, rows, categorical):
    df = list_frame(rows, categorical)
    assert write_io._csv_rows(df) is not None  # the fast path takes it
    assert_pandas_bytes(tmp_path_factory.mktemp("csv") / "list.csv", df)


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(any_text, any_float, count, any_text), min_size=1, max_size=10), st.booleans())
def test_any_csv_is_byte_for_byte_pandas(tmp_path_factory, rows, categorical):
    # values the fast path leaves to pandas, among others it takes
    assert_pandas_bytes(tmp_path_factory.mktemp("csv") / "list.csv", list_frame(rows, categorical))


@pytest.mark.parametrize("df", [pd.DataFrame(columns=["owner", "accounts", "worst_psi"]),
                                pd.DataFrame({"owner": pd.array(["x", "=y"], dtype="str")})],
                         ids=["no-rows", "one-column"])
def test_a_list_with_no_rows_or_one_column_is_pandas_bytes(tmp_path, df):
    # frames the Arrow path leaves to pandas (an empty list is written every run): the same bytes as pandas'
    # to_csv, a general-purpose reference
    assert_pandas_bytes(tmp_path / "list.csv", df)


def test_csv_fast_path_covers_the_mailing_lists_columns():
    # the path that makes a mailing list's CSV with Arrow takes its columns (the test above: the same bytes)
    df = pd.DataFrame({"owner": pd.array(["A, B", 'say "hi"', None], dtype="str"), "worst_psi": [80.0, 81.3, np.nan],
                       "customer_count": [1, 2, 3], "confidence": pd.Categorical(["firm", None, "unrated"])})
    body = write_io._csv_rows(df)
    assert body is not None
    assert bytes(body).decode() == 'A, B",80.0,1,firm\n'.replace('A, B"', '"A, B"') + '"say ""hi""",81.3,2,\n,,3,unrated\n'
