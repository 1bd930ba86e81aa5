"""The zone maps draw a sample of a large zone's customers (rare statuses whole); the histograms count them all."""

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


def test_status_codes_select_the_same_customers_as_status_names():
    # the report passes integer codes (pd.factorize of the status column); the selection must not depend on it
    rng = np.random.default_rng(1)
    names = np.array(["ok", "high", "low", "above_hgl", "low_upper_floors"], dtype=object)
    # two common statuses, one just at MAP_RARE (drawn whole), one just above it, one very rare
    per = [3 * report.MAP_POINTS, report.MAP_POINTS, report.MAP_RARE, report.MAP_RARE + 1, 7]
    codes = rng.permutation(np.repeat(np.arange(len(names)), per))
    drawn = report.map_sample(codes)
    assert np.array_equal(drawn, report.map_sample(names[codes]))
    for code in (2, 4):  # the statuses with at most MAP_RARE customers are drawn whole
        assert np.array_equal(drawn[codes[drawn] == code], np.flatnonzero(codes == code))
    assert (codes[drawn] == 3).sum() < report.MAP_RARE + 1  # one more than MAP_RARE is sampled like the common ones


def test_bin_counts_are_numpy_histogram_counts_also_on_the_edges():
    rng = np.random.default_rng(2)
    values = np.concatenate([rng.normal(60.0, 15.0, 50_000), [35.0, 80.0]])
    edges = np.histogram_bin_edges(values, bins=40)
    values = np.concatenate([values, edges, edges])  # values exactly on every edge, the outer two included
    assert np.array_equal(report.bin_counts(values, edges), np.histogram(values, bins=edges)[0])
