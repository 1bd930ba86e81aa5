"""The dask engine against the in-process path, the missing-extra error, and bulk GeoPackage layers."""

from __future__ import annotations

import sqlite3
import sys

import numpy as np
import pandas as pd
import pytest
import shapely
from click.testing import CliRunner

import geopress
from geopress import pipeline
from geopress.cli import cli
from geopress.errors import MissingExtraError
from tests.conftest import ORIGIN, customer_records, write_layer


def _many_customers(world, n=400):
    """Customers spread over the whole test DEM (and a few off it), replacing the fixture's line of 20."""
    rng = np.random.default_rng(11)
    x0, y1 = ORIGIN
    xs = x0 + rng.uniform(-50, 1050, n)
    ys = y1 - rng.uniform(0, 1000, n)
    recs = customer_records(list(xs), list(ys), floors=list(rng.choice([1, 2, 5], n).tolist()))
    world.customers_path.unlink()
    write_layer(world.customers_path, "parcels", recs, [shapely.Point(x, y) for x, y in zip(xs, ys)])


def test_dask_engine_matches_the_local_engine(world):
    distributed = pytest.importorskip("distributed")
    _many_customers(world)
    local = geopress.run(world.config_path, write=False)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None) as cluster, \
            distributed.Client(cluster, set_as_default=False) as client:
        assert len(client.nthreads()) == 2
        dist = geopress.run(world.config_path, write=False, engine="dask", scheduler=client, partitions=4)
    a, b = local.customers, dist.customers
    assert a["status"].tolist() == b["status"].tolist()
    for col in ("ground_ft", "psi_max", "psi_min", "psi_top", "hgl_low_ft"):
        # identical to the last bit: the same functions on the same points
        assert np.array_equal(a[col].to_numpy(), b[col].to_numpy(), equal_nan=True), col
    pd.testing.assert_frame_equal(a, b)
    assert local.points.wkb.equals(dist.points.wkb)
    assert dist.info["engine"] == "dask"
    assert [r["customers_sampled"] for r in dist.info["terrain"]] == [r["customers_sampled"] for r in local.info["terrain"]]
    assert set(local.counts.values()) != {0} and local.counts == dist.counts


def test_dask_engine_without_the_extra_says_what_to_install(world, monkeypatch):
    monkeypatch.setitem(sys.modules, "dask_geopandas", None)  # import fails as if not installed
    with pytest.raises(MissingExtraError, match=r"pip install 'geopress\[dask\]'"):
        geopress.run(world.config_path, write=False, engine="dask")
    res = CliRunner().invoke(cli, ["run", str(world.config_path), "--engine", "dask"], obj={})
    assert res.exit_code == 2
    assert "geopress[dask]" in res.output
    assert not world.out.exists()


def test_scheduler_without_dask_engine_is_refused(world):
    res = CliRunner().invoke(cli, ["run", str(world.config_path), "--scheduler", "tcp://127.0.0.1:1"], obj={})
    assert res.exit_code == 2
    assert "--engine dask" in res.output


def test_every_geometry_layer_has_its_spatial_index(world):
    _many_customers(world)
    geopress.run(world.config_path)
    with sqlite3.connect(world.out) as db:
        layers = db.execute("SELECT table_name, column_name FROM gpkg_geometry_columns").fetchall()
        views = {name for (name,) in db.execute("SELECT name FROM sqlite_master WHERE type = 'view'")}
        assert "customers" in [name for name, _ in layers]
        for layer, column in layers:
            if layer in views:
                # a flagged layer is a view of customers: GDAL filters it by the customers' index,
                # which holds every row it shows
                (outside,) = db.execute(f'SELECT count(*) FROM "{layer}" WHERE fid NOT IN '
                                        f'(SELECT id FROM "rtree_customers_{column}")').fetchone()
                assert outside == 0, layer
                continue
            (ext,) = db.execute("SELECT count(*) FROM gpkg_extensions WHERE table_name = ? AND "
                                "extension_name = 'gpkg_rtree_index'", (layer,)).fetchone()
            assert ext == 1, layer
            n_rtree = db.execute(f'SELECT count(*) FROM "rtree_{layer}_{column}"').fetchone()[0]
            # a row without geometry (a zone with no serviceable band, say) has nothing to index
            n_rows = db.execute(f'SELECT count(*) FROM "{layer}" WHERE "{column}" IS NOT NULL').fetchone()[0]
            assert n_rtree == n_rows, layer
        assert views, "the flagged layers with customers are views"
