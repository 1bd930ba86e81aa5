"""Change tracking between runs: the pure comparison, then a second run over changed customers."""

from __future__ import annotations

import json
import shutil

import geopandas as gpd
import pandas as pd
import pytest
import shapely
from hypothesis import given
from hypothesis import strategies as st

from geopress import changes, nightly
from geopress.classify import FLAGGED_LAYERS, STATUSES
from geopress.tables import mailing_lists

from conftest import customer_records
from nightly_support import assert_bad, good_run, run, snapshot


def table(prev: dict, cur: dict) -> pd.DataFrame:
    return changes.compare(pd.Series(list(prev), dtype=object), pd.Series(list(prev.values()), dtype=object),
                           pd.Series(list(cur), dtype=object), pd.Series(list(cur.values()), dtype=object))


def kinds(t: pd.DataFrame) -> dict[str, str]:
    return dict(zip(t["key"], t["change"]))


def findings(statuses) -> dict:
    """Each finding over customers that have only their status's (as a run written before the finding columns)."""
    return changes.findings_of(pd.DataFrame({"status": list(statuses)}, dtype=object))


def newly(prev: dict, cur: dict) -> dict:
    return changes.newly_in_finding(table(prev, cur), findings(cur.values()), findings(prev.values()))


def test_each_change():
    t = table({"a": "ok", "b": "high", "c": "low", "d": "high", "e": "ok", "g": "high"},
              {"a": "high", "b": "ok", "c": "above_hgl", "e": "ok", "f": "low", "g": "no_terrain"})
    assert kinds(t) == {"a": "newly_flagged", "b": "cleared", "c": "status_changed", "d": "removed",
                        "e": "unchanged", "f": "new_customer", "g": "status_changed"}


def test_first_run_finds_every_customer_new():
    t = table({}, {"a": "high", "b": "ok"})
    assert kinds(t) == {"a": "new_customer", "b": "new_customer"}
    summary = changes.summarise(t, None, newly({}, {"a": "high", "b": "ok"}))
    assert summary.newly_in_status["high"] == 1 and summary.newly_in_finding["high"] == 1


def test_ids_are_compared_as_text():
    t = changes.compare(pd.Series([1, 2]), pd.Series(["ok", "high"]), pd.Series(["1", "2"]), pd.Series(["ok", "high"]))
    assert set(t["change"]) == {"unchanged"}


def test_newly_in_status_counts_new_customers_and_changed_statuses_not_repeats():
    t = table({"a": "ok", "b": "high", "c": "low"}, {"a": "high", "b": "high", "c": "above_hgl", "n": "high"})
    rows = changes.newly_in_status(t)
    cur_keys = t.loc[t["current_row"] >= 0, "key"].to_numpy()
    assert sorted(cur_keys[rows["high"]]) == ["a", "n"]  # b was already high: not mailed again
    assert list(cur_keys[rows["above_hgl"]]) == ["c"]
    assert rows["low"].size == 0 and rows["low_upper_floors"].size == 0


def test_new_lists_reuse_the_full_lists_only_where_every_customer_is_new():
    customers = pd.DataFrame({
        "acct": ["a", "b", "c", "d"], "owner": ["O1", "O2", "O1", "O3"], "addr": ["1 Row", "2 Row", "1 Row", "3 Row"],
        "zone": ["Z1", "Z1", "Z2", "Z2"], "status": ["high", "high", "low", "ok"],
        "psi_max": [95.0, 90.0, 50.0, 60.0], "psi_min": [85.0, 80.0, 30.0, 50.0], "psi_top": [80.0, 75.0, 25.0, 45.0],
    })
    fields = dict(id_field="acct", mail_fields=["owner", "addr"])
    full = mailing_lists(customers, **fields)
    cur = customers["acct"], customers["status"]
    now = changes.findings_of(customers)
    first = changes.newly_in_finding(changes.compare(pd.Series([], dtype=object), pd.Series([], dtype=object), *cur),
                                     now, findings([]))
    # a was already high: only b is new
    later = changes.newly_in_finding(changes.compare(pd.Series(["a"]), pd.Series(["high"]), *cur), now,
                                     findings(["high"]))
    for rows in (first, later):
        got = changes.new_mailing_lists(customers, rows, **fields, full=full)
        built = changes.new_mailing_lists(customers, rows, **fields)
        assert list(got) == list(built)
        for name in built:
            pd.testing.assert_frame_equal(got[name], built[name], check_exact=True)  # a copy: no tolerance
    assert changes.new_mailing_lists(customers, later, **fields, full=full)["new_high_pressure"]["accounts"].tolist() == ["b"]


#: the storage-level findings (geopress.storage), empty when no level is checked
NO_STORAGE = {"peak_hour_short": [], "fire_short": [], "standby_short": []}


def test_new_lists_follow_findings_not_the_status():
    # a was high; now high with low upper floors too: newly on the upper-floors list only, status unchanged.
    # b had both findings already: on no new list.
    prev = pd.DataFrame({"acct": ["a", "b"], "status": ["high", "high"], "finding_high": [True, True],
                         "finding_low_upper_floors": [False, True]})
    cur = pd.DataFrame({
        "acct": ["a", "b"], "owner": ["O1", "O2"], "zone": ["Z", "Z"], "status": ["high"] * 2,
        "psi_max": [85.0, 90.0], "psi_min": [80.0, 85.0], "psi_top": [30.0, 25.0],
        "finding_above_hgl": [False] * 2, "finding_low": [False] * 2, "finding_high": [True] * 2,
        "finding_low_upper_floors": [True, True],
    })
    t = changes.compare(prev["acct"], prev["status"], cur["acct"], cur["status"])
    assert set(t["change"]) == {"unchanged"}

    def new_accounts(previous):
        rows = changes.newly_in_finding(t, changes.findings_of(cur), changes.findings_of(previous))
        return rows, {f: cur["acct"].to_numpy()[r].tolist() for f, r in rows.items()}

    rows, got = new_accounts(prev)
    # (the storage findings' columns are absent from cur: no level was checked, so nobody is on their lists)
    assert got == {"above_hgl": [], "low": [], "high": [], "low_upper_floors": ["a"], **NO_STORAGE}
    lists = changes.new_mailing_lists(cur, rows, id_field="acct", mail_fields=["owner"])
    assert lists["new_upper_floors"]["accounts"].tolist() == ["a"] and lists["new_high_pressure"].empty
    # a run written before the finding columns had only its status's finding: both are new to upper floors
    rows, got = new_accounts(prev[["acct", "status"]])
    assert got == {"above_hgl": [], "low": [], "high": [], "low_upper_floors": ["a", "b"], **NO_STORAGE}
    lists = changes.new_mailing_lists(cur, rows, id_field="acct", mail_fields=["owner"])
    assert lists["new_upper_floors"]["accounts"].tolist() == ["b", "a"]  # most severe (lowest psi_top) first


status = st.sampled_from(STATUSES)
run_statuses = st.dictionaries(st.text("abcdef", min_size=1, max_size=3), status, max_size=12)


@st.composite
def two_runs(draw):
    """Two runs: the same customers in the same order (as on most nights) or in another order, or any two."""
    prev = draw(run_statuses)
    how = draw(st.sampled_from(["same", "reordered", "any"]))
    if how == "any":
        return prev, draw(run_statuses)
    keys = list(prev) if how == "same" else draw(st.permutations(list(prev)))
    return prev, {key: draw(status) for key in keys}


@given(two_runs())
def test_every_customer_of_either_run_gets_exactly_one_change(runs):
    prev, cur = runs
    t = table(prev, cur)
    # one row per customer: the current ones in order, then the removed ones in their previous order
    assert list(t["key"]) == [*cur, *(key for key in prev if key not in cur)]
    assert set(t["change"]) <= set(changes.CHANGES)
    for row in t.itertuples():
        assert (list(cur)[row.current_row] if row.current_row >= 0 else None) == (row.key if row.key in cur else None)
        assert (list(prev)[row.previous_row] if row.previous_row >= 0 else None) == (row.key if row.key in prev else None)
        assert (None if pd.isna(row.previous_status) else row.previous_status) == prev.get(row.key)
        assert (None if pd.isna(row.status) else row.status) == cur.get(row.key)
    for key, change in kinds(t).items():
        before, now = prev.get(key), cur.get(key)
        expected = ("new_customer" if before is None else "removed" if now is None else "unchanged" if before == now
                    else "newly_flagged" if before not in FLAGGED_LAYERS and now in FLAGGED_LAYERS
                    else "cleared" if before in FLAGGED_LAYERS and now == "ok" else "status_changed")
        assert change == expected, (key, before, now)
    assert sum(changes.counts(t).values()) == len(t)


# ---------------------------------------------------------------------------- through the command line


def rewrite(world, accounts: list[str], xs: list[float], ys: list[float]) -> None:
    import geopandas as gpd

    recs = customer_records(xs, ys)
    recs["account"] = accounts
    recs["owner"] = [f"Owner of {a}" for a in accounts]
    recs["mail_address"] = [f"{a} Test Row" for a in accounts]
    world.customers_path.unlink()
    gpd.GeoDataFrame(recs, geometry=[shapely.Point(x, y) for x, y in zip(xs, ys)], crs="EPSG:32631").to_file(
        world.customers_path, layer="parcels", driver="GPKG")


def csv_accounts(world, name: str) -> list[str]:
    return pd.read_csv(world.out.parent / "mailing" / f"{name}.csv", dtype=str)["accounts"].tolist()


@pytest.fixture
def changed(world):
    """Two runs: the world, then the same customers with five changes; returns the expected changes."""
    good_run(world)
    first = world.read()
    x = shapely.get_x(first.geometry.to_numpy())
    y = shapely.get_y(first.geometry.to_numpy())
    acc = first["account"].tolist()
    by = {s: [i for i, v in enumerate(first["status"]) if v == s] for s in STATUSES}
    assert by["ok"] and by["high"] and by["low"] and by["above_hgl"]  # the world has each of them
    xs, ys, accounts = list(x), list(y), list(acc)
    ok1, ok2 = by["ok"][0], by["ok"][1]
    high, low = by["high"][0], by["low"][0]
    xs[ok1] = x[high]  # an ok customer moved to where customers are high: newly flagged
    xs[high] = x[ok2]  # a high customer moved to where customers are ok: cleared
    xs[low] = x[by["above_hgl"][0]]  # low to above_hgl: changed
    removed = by["ok"][2]
    keep = [i for i in range(len(accounts)) if i != removed]
    xs, ys, accounts = [xs[i] for i in keep], [ys[i] for i in keep], [accounts[i] for i in keep]
    xs.append(x[low]); ys.append(y[low]); accounts.append("N0001")  # a new customer where customers are low
    rewrite(world, accounts, xs, ys)
    expected = {acc[ok1]: ("ok", "high", "newly_flagged"), acc[high]: ("high", "ok", "cleared"),
                acc[low]: ("low", "above_hgl", "status_changed"), acc[removed]: ("ok", None, "removed"),
                "N0001": (None, "low", "new_customer")}
    return expected, first.iloc[removed]


def test_second_run_reports_exactly_the_changes_made(world, changed):
    expected, removed_row = changed
    res = run(world)
    assert res.exit_code == 0, res.stderr
    # the current customers' changes are a view of the customers layer; the removed one has a layer of its own
    layer, removed = world.read("changes"), world.read("removed_customers")
    got = {r.account: (r.previous_status, r.status, r.change) for r in layer.itertuples()}
    got |= {r.account: (r.previous_status, None, r.change) for r in removed.itertuples()}
    got = {k: tuple(None if pd.isna(v) else v for v in t) for k, t in got.items()}
    assert got == expected
    gone = removed.iloc[0]
    assert len(removed) == 1 and gone["change"] == "removed"
    assert gone.geometry.equals(removed_row.geometry) and gone["zone"] == removed_row["zone"]
    # the changes layer is a view: the same rows, fids and values as in customers
    cust = world.read()
    assert set(layer["account"]) == set(cust.loc[cust["change"] != "unchanged", "account"])

    info = json.loads((world.out.parent / "run.json").read_text())
    assert info["changes"]["baseline"] == str(nightly.baseline_link(world.out))
    assert info["changes"]["counts"] == {"new_customer": 1, "removed": 1, "unchanged": 16, "newly_flagged": 1,
                                         "cleared": 1, "status_changed": 1}
    assert info["changes"]["newly_in_status"] == {"high": 1, "low": 1, "above_hgl": 1, "low_upper_floors": 0}
    # each of these customers has one finding, its status's: the new lists hold the same customers
    assert info["changes"]["newly_in_finding"] == {"above_hgl": 1, "low": 1, "high": 1, "low_upper_floors": 0,
                                                   **{name: 0 for name in NO_STORAGE}}

    new = {now: k for k, (_, now, _) in expected.items() if now in FLAGGED_LAYERS}
    assert csv_accounts(world, "new_high_pressure") == [new["high"]]
    assert csv_accounts(world, "new_low_pressure") == ["N0001"]
    assert csv_accounts(world, "new_above_hgl") == [new["above_hgl"]]
    assert csv_accounts(world, "new_upper_floors") == []
    # the full lists still list everyone flagged
    assert len(csv_accounts(world, "high_pressure")) == int((world.read()["status"] == "high").sum())


def test_a_rerun_without_changes_mails_nobody(world):
    good_run(world)
    res = run(world)
    assert res.exit_code == 0, res.stderr
    assert len(world.read("changes")) == 0
    for name in FLAGGED_LAYERS.values():
        assert csv_accounts(world, f"new_{name}") == []


def test_first_run_lists_every_flagged_customer_as_new(world):
    good_run(world)
    cust = world.read()
    assert sorted(csv_accounts(world, "new_high_pressure")) == sorted(cust.loc[cust["status"] == "high", "account"])
    assert set(world.read("changes")["change"]) == {"new_customer"}


def test_baseline_option_compares_with_a_chosen_geopackage(world, changed):
    expected, _ = changed
    saved = world.root / "last_mailed.gpkg"
    shutil.copy(world.out, saved)  # the first run's output, as mailed
    assert run(world).exit_code == 0  # second run: the changes
    res = run(world, "--baseline", saved)  # third run: still against the first
    assert res.exit_code == 0, res.stderr
    assert set(world.read("changes")["account"]) | set(world.read("removed_customers")["account"]) == set(expected)
    info = json.loads((world.out.parent / "run.json").read_text())
    assert info["changes"]["baseline"] == str(saved)


def test_missing_baseline(world):
    good_run(world)
    assert_bad(run(world, "--baseline", world.root / "nope.gpkg"), "nope.gpkg", "--baseline", "not found")


def test_baseline_that_is_not_a_geopress_output(world):
    good_run(world)
    assert_bad(run(world, "--baseline", world.zones_path), str(world.zones_path), "no layer 'customers'",
               "layers there: zones", "--baseline")


def test_baseline_with_duplicate_ids(world):
    good_run(world)
    edited = world.read()
    edited.loc[1, "account"] = edited.loc[0, "account"]  # someone edited the output: two customers share an id
    saved = world.root / "edited.gpkg"
    edited.to_file(saved, layer="customers", driver="GPKG")
    assert_bad(run(world, "--baseline", saved), str(saved), "--baseline", "field 'account' has duplicate ids")


def test_previous_output_without_the_id_field(world):
    good_run(world)
    import geopandas as gpd

    cust = gpd.read_file(world.customers_path, layer="parcels")
    cust["meter"] = [f"M{i}" for i in range(len(cust))]  # the utility switches to meter numbers as ids
    world.customers_path.unlink()
    cust.to_file(world.customers_path, layer="parcels", driver="GPKG")
    world.config_path.write_text(world.config_path.read_text().replace('id_field = "account"', 'id_field = "meter"'))
    # the baseline is the last accepted run, kept beside the output
    assert_bad(run(world), str(nightly.baseline_link(world.out)), "no field 'meter'", "output.path", "move the file away")


def test_a_truncated_export_is_refused_and_never_becomes_the_baseline(world):
    prior = good_run(world)
    first = world.read()
    keep = first.iloc[:15]  # 5 of 20 customers gone: 25 %, more than the default 20 %
    rewrite(world, keep["account"].tolist(), list(shapely.get_x(keep.geometry.to_numpy())),
            list(shapely.get_y(keep.geometry.to_numpy())))
    assert_bad(run(world), str(world.customers_path), "5 of the baseline's 20 customers (25.0 %) are missing",
               "output.max_drop_percent (20 %)", "--accept-drop")
    assert snapshot(world.out.parent) == prior
    # the export comes back whole the next night: compared with the last accepted run, nobody is new
    rewrite(world, first["account"].tolist(), list(shapely.get_x(first.geometry.to_numpy())),
            list(shapely.get_y(first.geometry.to_numpy())))
    assert run(world).exit_code == 0
    for name in FLAGGED_LAYERS.values():
        assert csv_accounts(world, f"new_{name}") == []


def test_an_accepted_drop_becomes_the_baseline(world):
    good_run(world)
    first = world.read()
    keep = first.iloc[:10]
    rewrite(world, keep["account"].tolist(), list(shapely.get_x(keep.geometry.to_numpy())),
            list(shapely.get_y(keep.geometry.to_numpy())))
    res = run(world, "--accept-drop")
    assert res.exit_code == 0, res.stderr
    assert len(world.read("removed_customers")) == 10
    assert len(gpd.read_file(nightly.baseline_link(world.out), layer="customers")) == 10


def test_the_drop_threshold_is_configurable(world):
    good_run(world)
    first = world.read()
    keep = first.iloc[:15]
    rewrite(world, keep["account"].tolist(), list(shapely.get_x(keep.geometry.to_numpy())),
            list(shapely.get_y(keep.geometry.to_numpy())))
    world.config_path.write_text(world.config_path.read_text() + "max_drop_percent = 30\n")
    assert run(world).exit_code == 0


def test_log_file_ends_each_run_with_one_summary_line(world, changed):
    log = world.root / "nightly.log"
    assert run(world, "--log-file", log).exit_code == 0
    world.config_path.write_text(world.config_path.read_text().replace('id_field = "account"', 'id_field = "acct"'))
    assert run(world, "--log-file", log).exit_code == 2
    lines = log.read_text().splitlines()
    ends = [i for i, line in enumerate(lines) if " run done: " in line or " run failed: " in line]
    starts = [i for i, line in enumerate(lines) if " run started: " in line]
    assert len(starts) == 2 and len(ends) == 2 and ends[-1] == len(lines) - 1 and starts[1] == ends[0] + 1
    done, failed = lines[ends[0]], lines[ends[1]]
    assert ("exit 0: 20 customers:" in done and "high " in done
            and "changes: new_customer 1, removed 1, newly_flagged 1, cleared 1, status_changed 1;" in done)
    assert done.rstrip().endswith(" s")
    assert "run failed: exit 2: " in failed and "no field 'acct'" in failed
    assert all(line[:4].isdigit() and " geopress[" in line for line in lines)  # timestamped, pid-tagged


def test_run_prints_what_changed(world, changed):
    res = run(world)
    assert res.exit_code == 0, res.stderr
    assert f"changes since {nightly.baseline_link(world.out)}: new_customer 1, removed 1, newly_flagged 1, cleared 1, status_changed 1" in res.stdout
