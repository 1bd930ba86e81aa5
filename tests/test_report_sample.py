"""The zone maps draw a sample of a large zone's customers; rare statuses are drawn whole."""

from __future__ import annotations

import numpy as np

from geopress import report


def test_small_zones_are_drawn_whole():
    status = np.array(["ok", "high", "low"] * 10, dtype=object)
    assert report.map_sample(status).tolist() == list(range(30))


def test_large_zones_keep_every_rare_customer_and_about_map_points_in_all():
    n_ok, n_high = 5 * report.MAP_POINTS, 50
    status = np.array(["ok"] * n_ok + ["high"] * n_high, dtype=object)
    np.random.default_rng(0).shuffle(status)
    drawn = report.map_sample(status)
    assert np.array_equal(np.sort(np.flatnonzero(status == "high")), drawn[status[drawn] == "high"])
    # every 6th of the 100,050 customers (ceil(100,050 / 20,000) = 6) plus the rare ones
    assert len(drawn) <= report.MAP_POINTS + n_high
    assert np.all(np.diff(drawn) > 0)  # in input order, no repeats
