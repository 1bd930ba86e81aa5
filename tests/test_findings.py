"""The registry of statuses and findings (geopress.findings) and several findings per customer."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from geopress import findings
from geopress.classify import Criteria, reasons, screen, status_names
from geopress.pressure import customer_pressures

from test_classify import customer  # one customer's values, NaN included

CRIT = Criteria()


def reference_findings(geom, ground, zoned, pmin, pmax, ptop, crit) -> list[str]:
    """The findings written out one customer at a time, in registry order."""
    if not geom or np.isnan(ground) or not zoned:
        return []
    out = []
    if pmin <= 0:
        out.append("above_hgl")
    if 0 < pmin < crit.min_static_psi:
        out.append("low")
    if pmax > crit.max_static_psi:
        out.append("high")
    if ptop < crit.min_static_psi and not pmin < crit.min_static_psi:  # NaN compares False
        out.append("low_upper_floors")
    return out


@settings(max_examples=150, deadline=None)
@given(st.lists(customer, min_size=1, max_size=30), st.floats(0.0, 60.0), st.floats(0.0, 100.0))
def test_every_finding_that_applies_and_the_status_is_the_first(rows, lo, span):
    crit = Criteria(min_static_psi=lo, max_static_psi=lo + span)
    geom, ground, zoned, pmin, pmax, ptop = (np.array(c) for c in zip(*rows))
    codes, found = screen(has_geometry=geom.astype(bool), ground_ft=ground, zoned=zoned.astype(bool), psi_min=pmin,
                          psi_max=pmax, psi_top=ptop, criteria=crit)
    assert list(found) == list(findings.FINDINGS)
    statuses = status_names(codes).tolist()
    for i, r in enumerate(rows):
        want = reference_findings(*r, crit)
        assert [f for f in findings.FINDINGS if found[f][i]] == want
        if want:  # a customer with findings has the first as its status
            assert statuses[i] == want[0]
        else:
            assert statuses[i] not in findings.FINDINGS


def test_a_tall_building_is_high_at_the_street_and_low_on_its_top_floor():
    # ground 1000 ft under a tank of 1200 to 1190 ft, 12 stories of 10 ft: street 0.433 * 200 = 86.6 psi at high
    # water; top floor 110 ft up at low water: 0.433 * (1190 - 1110) = 34.64 psi, below 35, street 82.27 psi
    p = customer_pressures(np.array([1000.0]), 1200.0, 1190.0, np.array([12.0]))
    codes, found = screen(has_geometry=[True], ground_ft=[1000.0], zoned=[True], psi_min=p.psi_min,
                          psi_max=p.psi_max, psi_top=p.psi_top, criteria=CRIT)
    assert {f for f, m in found.items() if m[0]} == {"high", "low_upper_floors"}
    assert status_names(codes).tolist() == ["high"]
    text = reasons(codes, ground_ft=[1000.0], hgl_low_ft=[1190.0], psi_min=p.psi_min, psi_max=p.psi_max,
                   psi_top=p.psi_top, floors=[12.0], criteria=CRIT, findings=found).tolist()
    assert text == ["static pressure up to 86.6 psi exceeds 80 psi: individual PRV expected; "
                    "top floor of 12 stories down to 34.6 psi is below 35 psi: upper floors need a booster"]


def test_a_wide_tank_range_is_high_at_high_water_and_low_at_low_water():
    # ground 1000 ft, tank 1200 to 1070 ft: 86.6 psi at high water, 0.433 * 70 = 30.31 psi at low water
    p = customer_pressures(np.array([1000.0]), 1200.0, 1070.0, np.array([1.0]))
    codes, found = screen(has_geometry=[True], ground_ft=[1000.0], zoned=[True], psi_min=p.psi_min,
                          psi_max=p.psi_max, psi_top=p.psi_top, criteria=CRIT)
    assert {f for f, m in found.items() if m[0]} == {"low", "high"}
    assert status_names(codes).tolist() == ["low"]  # low comes first, as before findings had columns


def test_no_finding_where_it_cannot_be_evaluated():
    # no geometry, no terrain, unzoned: their pressures (whatever they hold) give no finding
    codes, found = screen(has_geometry=[False, True, True], ground_ft=[900.0, np.nan, 900.0],
                          zoned=[True, True, False], psi_min=[-5.0] * 3, psi_max=[99.0] * 3, psi_top=[1.0] * 3,
                          criteria=CRIT)
    assert status_names(codes).tolist() == ["no_geometry", "no_terrain", "unzoned"]
    assert not any(m.any() for m in found.values())


def test_the_registry_is_one_consistent_table():
    reg = findings.REGISTRY
    assert findings.STATUSES == tuple(s.name for s in reg if s.is_status) and findings.STATUSES[-1] == "ok"
    # an entry that is no status (the storage levels) is there for its finding: its layer, list and column
    assert all(s.finding is not None for s in reg if not s.is_status)
    assert reg[-1].condition is None and all(s.condition is not None for s in reg[:-1])
    layers = list(findings.FLAGGED_LAYERS.values())
    assert len(set(layers)) == len(layers)  # one layer and one list per finding
    assert set(findings.FLAGGED_LAYERS) == set(findings.FINDINGS) == set(findings.WORST)
    for name in findings.FINDINGS:
        column, worse = findings.WORST[name]
        assert column in ("psi_min", "psi_max", "psi_top", "psi_fire", "psi_standby") and worse in ("min", "max")
        assert findings.FINDING_COLUMNS[name] == f"finding_{name}"
        assert findings.finding_of_layer(findings.FLAGGED_LAYERS[name]) == name
    # every status drawn, in the order of its layer_order; ok lowest
    assert set(findings.STATUS_STYLE) == set(findings.STATUSES) and next(iter(findings.STATUS_STYLE)) == "ok"
    # the statuses before the first finding say why no finding could be evaluated
    assert findings.UNSCREENED == ("no_geometry", "no_terrain", "unzoned")
