"""The vectorised mailing lists against a plain pandas groupby written the obvious way."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from geopress.tables import FLAGGED_LAYERS, WORST, mailing_lists, neutralise_frame


def _distinct_by_account(values: pd.Series, ids: pd.Series):
    """The distinct values, missing ones left out, in the order of their accounts (``ids``, then the rows'
    order), "; "-joined; None when there are none."""
    in_order = sorted(zip(ids.loc[values.index], range(len(values)), values), key=lambda t: (t[0], t[1]))
    texts = list(dict.fromkeys(str(v) for _, _, v in in_order if not pd.isna(v)))
    return "; ".join(texts) if texts else None


def _reference(customers, status, id_field, mail_fields, letter_fields=()):
    col, how = WORST[status]
    sub = customers.loc[customers["status"] == status, list(dict.fromkeys([id_field, *mail_fields, *letter_fields,
                                                                           "zone", col]))]
    keys = list(mail_fields) or [id_field]
    sub = sub.assign(_id=sub[id_field].astype(str))
    out = sub.groupby(keys, dropna=False, sort=False).agg(
        accounts=("_id", lambda s: "; ".join(sorted(s))),
        **{f: (f, lambda s: _distinct_by_account(s, sub["_id"])) for f in letter_fields},
        customer_count=("_id", "size"),
        zones=("zone", lambda s: "; ".join(sorted(set(map(str, s))))),
        worst_psi=(col, how),
    ).reset_index()
    out["worst_psi"] = out["worst_psi"].round(1)
    out = out.sort_values(["worst_psi", "accounts"], ascending=[how == "min", True], kind="stable")
    return out.reset_index(drop=True)[[*keys, "accounts", *letter_fields, "customer_count", "zones", "worst_psi"]]


@pytest.mark.parametrize("seed", range(12))
def test_mailing_lists_match_a_plain_groupby(seed):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 300))
    # with seed % 3 == 2 an id may recur at other addresses: equal accounts and worst_psi, so the order of
    # those rows is the order in which their addresses first appear
    ids = rng.permutation(n) if seed % 3 != 2 else rng.integers(0, 8, n)
    near_zero = rng.choice([-0.04, -0.0, 0.0, 0.04], n)  # rounds to -0.0 or 0.0: ties on worst_psi
    df = pd.DataFrame({
        "acct": [f"C{int(i):03d}" for i in ids],
        "owner": rng.choice(["=Formula", "Ann", "Bob", None, "+x", "Zed"], n),
        "addr": rng.choice(["1 Way", "2 Way", "-3 Way", None], n),
        "svc": rng.choice(["1 Elm", "2 Oak", "=Lot 3", None, "4 Elm"], n),
        "zone": rng.choice(["A", "B", "C", None], n, p=[0.3, 0.3, 0.3, 0.1]),
        "status": rng.choice(["high", "low", "above_hgl", "low_upper_floors", "ok"], n),
        "psi_max": np.where(rng.random(n) < 0.1, np.nan, rng.uniform(0, 120, n).round(1)),  # ties and NaN
        "psi_min": np.where(rng.random(n) < 0.3, near_zero, rng.uniform(0, 120, n)),
        "psi_top": np.where(rng.random(n) < 0.2, np.nan, np.where(rng.random(n) < 0.3, near_zero,
                                                                   rng.uniform(0, 60, n))),
    })
    if seed % 2:
        df = df.astype({"owner": "str", "addr": "str", "acct": "str", "zone": "str", "svc": "str"})  # arrow-backed
    if seed % 4 == 2:  # numbers as ids and zones (printed with str), a zone missing as None
        df["acct"] = ids
        df["zone"] = pd.Series(rng.choice([3, 1, 20, None], n), dtype=object)
    for fields, letters in ((["owner", "addr"], ["svc"]), ([], []), (["addr"], ["svc", "owner"])):
        got = mailing_lists(df, id_field="acct", mail_fields=fields, letter_fields=letters)
        for status, name in (("high", "high_pressure"), ("low", "low_pressure"), ("above_hgl", "above_hgl"),
                             ("low_upper_floors", "upper_floors")):
            want = _reference(df, status, "acct", fields, letters)
            pd.testing.assert_frame_equal(got[name], want, check_dtype=False, check_index_type=False)
            # also tells -0.0 from 0.0, and the guard apostrophes a CSV gets
            assert neutralise_frame(got[name]).to_csv(index=False) == neutralise_frame(want).to_csv(index=False)


def test_the_id_field_may_also_be_a_mail_field():
    # a layer keyed by the owner's account number, mailed to that account: one row per account
    df = pd.DataFrame({"acct": ["B", "A"], "addr": ["1 Elm", "1 Elm"], "zone": ["Z", "Z"],
                       "status": ["high", "high"], "psi_max": [81.0, 90.0], "psi_min": [70.0, 79.0],
                       "psi_top": [np.nan, np.nan]})
    got = mailing_lists(df, id_field="acct", mail_fields=["acct", "addr"])["high_pressure"]
    assert got.to_dict("records") == [
        {"acct": "A", "addr": "1 Elm", "accounts": "A", "customer_count": 1, "zones": "Z", "worst_psi": 90.0},
        {"acct": "B", "addr": "1 Elm", "accounts": "B", "customer_count": 1, "zones": "Z", "worst_psi": 81.0},
    ]


def test_lists_select_by_finding_and_carry_the_target_areas():
    # c is high with low upper floors too (its status is high): on both lists. The areas of the accounts at an
    # address are listed once each, in account order; an account in no area adds nothing.
    df = pd.DataFrame({
        "acct": ["a", "b", "c", "d"], "addr": ["1 Elm", "1 Elm", "2 Oak", "3 Ash"], "zone": ["Z"] * 4,
        "status": ["high", "high", "high", "low_upper_floors"], "psi_max": [81.0, 90.0, 85.0, 70.0],
        "psi_min": [70.0, 79.0, 75.0, 60.0], "psi_top": [np.nan, np.nan, 28.0, 30.0],
        "finding_above_hgl": [False] * 4, "finding_low": [False] * 4, "finding_high": [True, True, True, False],
        "finding_low_upper_floors": [False, False, True, True],
        "target_area_high": ["T2", None, "T1", None], "target_area_low_upper_floors": [None, None, None, "T3"],
    })
    got = mailing_lists(df, id_field="acct", mail_fields=["addr"])
    assert [(r["accounts"], r["target_area"]) for r in got["high_pressure"].to_dict("records")] == [
        ("a; b", "T2"), ("c", "T1")]
    upper = got["upper_floors"].to_dict("records")
    assert [(r["accounts"], r["worst_psi"]) for r in upper] == [("c", 28.0), ("d", 30.0)]
    assert pd.isna(upper[0]["target_area"]) and upper[1]["target_area"] == "T3"  # missing: c is in no such area


@pytest.mark.parametrize("seed", range(8))
def test_margins_classes_and_areas_match_a_plain_groupby(seed):
    # margin_psi: the largest margin of an address's accounts; confidence: the surest class among them (firm,
    # borderline, unrated; none when no account has one of those); target_area: the distinct areas in account
    # order. The run gives classes and areas as categoricals; plain arrays of text must give the same lists.
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 200))
    df = pd.DataFrame({
        "acct": [f"C{i:03d}" for i in rng.permutation(n)],
        "addr": rng.choice(["1 Way", "2 Way", "3 Way", None], n),
        "zone": rng.choice(["A", "B"], n),
        "psi_max": rng.uniform(60, 120, n).round(1), "psi_min": rng.uniform(0, 60, n), "psi_top": np.nan,
        "finding_above_hgl": False, "finding_low": rng.random(n) < 0.5, "finding_high": rng.random(n) < 0.5,
        **{f"finding_{name}": False for name in FLAGGED_LAYERS if name not in ("low", "high")},
        "target_area_high": rng.choice(["T2", "T10", None, "T1"], n),
    })
    margins = np.where(rng.random(n) < 0.1, np.nan, rng.uniform(-5, 5, n))
    texts = rng.choice(["firm", "borderline", "unrated", "clear", None], n).astype(object)
    plain = {name: (margins, texts) for name in FLAGGED_LAYERS}
    coded = {name: (margins, pd.Categorical(texts, categories=["firm", "near_limit", "borderline", "clear", "unrated"]))
             for name in plain}
    got = mailing_lists(df, id_field="acct", mail_fields=["addr"], rated=plain)
    as_run = mailing_lists(df.astype({"target_area_high": "category"}), id_field="acct", mail_fields=["addr"],
                           rated=coded)
    for name in got:
        pd.testing.assert_frame_equal(got[name], as_run[name])
    for status, name in (("high", "high_pressure"), ("low", "low_pressure")):
        chosen = df[df[f"finding_{status}"]].assign(margin=margins[df[f"finding_{status}"]],
                                                     cls=texts[df[f"finding_{status}"].to_numpy()])
        for row in got[name].to_dict("records"):
            at = chosen[chosen["addr"].isna()] if pd.isna(row["addr"]) else chosen[chosen["addr"] == row["addr"]]
            assert row["accounts"] == "; ".join(sorted(at["acct"]))
            want_margin = at["margin"].max()
            assert (np.isnan(row["margin_psi"]) and np.isnan(want_margin)) or row["margin_psi"] == round(want_margin, 2)
            surest = [c for c in ("firm", "borderline", "unrated") if c in set(at["cls"])]
            assert (row["confidence"] if not pd.isna(row["confidence"]) else None) == (surest[0] if surest else None)
            if status == "high":
                areas = [a for a in at.sort_values("acct")["target_area_high"] if pd.notna(a)]
                want_areas = "; ".join(dict.fromkeys(areas)) or None
                assert (row["target_area"] if not pd.isna(row["target_area"]) else None) == want_areas
