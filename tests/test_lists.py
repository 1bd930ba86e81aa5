"""Mailing lists a mail merge can take: letter fields per address, CSV bytes a Windows spreadsheet reads
as UTF-8, and .xlsx copies whose text cells are text."""

from __future__ import annotations

import json

import numpy as np
import openpyxl
import pandas as pd
import pytest
import shapely

import geopress
from geopress.errors import ConfigError, InputError
from geopress.scenario import load_scenario

from conftest import ORIGIN, write_layer

X0, Y1 = ORIGIN
BOM = b"\xef\xbb\xbf"


@pytest.fixture
def letters(world):
    """The world's customers with a service address; accounts C0010 and C0011, both on the high-pressure
    list, share one mailing address."""
    xs = world.extra["xs"]
    n = len(xs)
    owners = [f"Owner {i}" for i in range(n)]
    addresses = [f"{i} Test Row" for i in range(n)]
    owners[10] = owners[11] = "Zoë Søren"  # two accounts mailed to one address
    addresses[10] = addresses[11] = "=1+2 Mill Lane"  # text a spreadsheet would run as a formula
    service = [f"{100 + i} Service St" for i in range(n)]
    service[11] = None  # one account without a service address
    world.customers_path.unlink()
    write_layer(world.customers_path, "parcels",
                {"account": [f"C{i:04d}" for i in range(n)], "owner": owners, "mail_address": addresses,
                 "floors": [1] * n, "service_address": service},
                [shapely.Point(x, Y1 - 500.0) for x in xs])
    text = world.config_path.read_text().replace('floors_field = "floors"',
                                                 'floors_field = "floors"\nletter_fields = ["service_address"]')
    world.config_path.write_text(text)
    return world


def flagged_list(res) -> tuple[str, pd.DataFrame]:
    """The name and frame of a mailing list that holds accounts C0010 and C0011."""
    for name, df in res.mailing.items():
        if (df["accounts"] == "C0010; C0011").any():
            return name, df
    raise AssertionError({k: v["accounts"].tolist() for k, v in res.mailing.items()})


def test_letter_fields_are_joined_per_mailing_address(letters):
    res = geopress.run(load_scenario(letters.config_path, ["output.report=false"], replace_outputs=True))
    name, df = flagged_list(res)
    row = df.set_index("accounts").loc["C0010; C0011"]
    assert row["service_address"] == "110 Service St"  # C0011 has none: left out
    assert list(df.columns[:4]) == ["owner", "mail_address", "accounts", "service_address"]
    assert row["mail_address"] == "=1+2 Mill Lane"  # the list keeps the text; the CSV guards it
    csv = letters.out.parent / "mailing" / f"{name}.csv"
    raw = csv.read_bytes()
    # a UTF-8 byte-order mark first: how a spreadsheet on Windows knows the file is UTF-8 and not its ANSI
    # code page; the names are UTF-8 bytes after it
    assert raw.startswith(BOM) and "Zoë Søren".encode("utf-8") in raw
    assert raw[len(BOM):].decode("utf-8").splitlines()[0].startswith("owner,mail_address,accounts,service_address")
    back = pd.read_csv(csv, dtype=str)  # pandas skips the mark
    assert back.set_index("accounts").loc["C0010; C0011", "mail_address"] == "'=1+2 Mill Lane"
    # without the mark the same bytes read in the Windows-1252 code page mangle the names (what it guards against)
    assert "Zoë" not in raw[len(BOM):].decode("cp1252", errors="replace")


def test_xlsx_copies_hold_text_as_text_and_numbers_as_numbers(letters):
    res = geopress.run(load_scenario(letters.config_path, ["output.report=false"], replace_outputs=True))
    info = json.loads((letters.out.parent / "run.json").read_text())
    assert info["xlsx"] == {"written": True, "reason": None}
    mailing = letters.out.parent / "mailing"
    for name, df in {**res.mailing, **res.new_mailing}.items():
        book = openpyxl.load_workbook(mailing / f"{name}.xlsx")
        ws = book.worksheets[0]
        assert ws.title == name
        rows = list(ws.iter_rows())
        assert [c.value for c in rows[0]] == list(df.columns)
        assert len(rows) == len(df) + 1
        for row, (_, want) in zip(rows[1:], df.iterrows()):
            for cell, col in zip(row, df.columns):
                value = want[col]
                if isinstance(value, str):
                    # stored as text: never a formula, and exactly the list's text, without a guard apostrophe
                    assert cell.data_type == "s" and cell.value == value, (name, col, cell.value)
                elif pd.isna(value):
                    assert cell.value is None
                else:
                    assert cell.data_type == "n" and cell.value == value, (name, col, cell.value)
        assert all(c.data_type != "f" for r in rows for c in r)
    name, _ = flagged_list(res)
    ws = openpyxl.load_workbook(mailing / f"{name}.xlsx").worksheets[0]
    texts = [c.value for r in ws.iter_rows() for c in r if isinstance(c.value, str)]
    assert "=1+2 Mill Lane" in texts and "Zoë Søren" in texts


def test_no_xlsx_when_switched_off(world):
    geopress.run(load_scenario(world.config_path, ["output.report=false", "output.xlsx=false"], replace_outputs=True))
    assert not list((world.out.parent / "mailing").glob("*.xlsx"))
    info = json.loads((world.out.parent / "run.json").read_text())
    assert info["xlsx"] == {"written": False, "reason": "output.xlsx = false"}


def test_a_letter_field_missing_from_the_layer_names_its_key(world):
    cfg = load_scenario(world.config_path, ['customers.letter_fields=["floors", "service_address"]'], replace_outputs=True)
    with pytest.raises(InputError, match=r"no field 'service_address' \(from customers.letter_fields\[1\]\)") as err:
        geopress.run(cfg, write=False)
    assert err.value.key == "customers.letter_fields[1]"


@pytest.mark.parametrize("fields, key, needle", [
    ('["owner"]', "customers.letter_fields[0]", "already in customers.mail_fields"),
    ('["floors", "account"]', "customers.letter_fields[1]", "already in customers.id_field"),
    ('["floors", "floors"]', "customers.letter_fields[1]", "listed twice"),
    ('["status"]', "customers.letter_fields[0]", "name of a result column"),
])
def test_letter_fields_that_cannot_be_letter_fields(world, fields, key, needle):
    text = world.config_path.read_text().replace('floors_field = "floors"',
                                                 f'floors_field = "floors"\nletter_fields = {fields}')
    world.config_path.write_text(text)
    line = text.splitlines().index(f"letter_fields = {fields}") + 1
    with pytest.raises(ConfigError, match=needle) as err:
        load_scenario(world.config_path)
    assert err.value.key == key and f"{key} (line {line})" in str(err.value)


def test_a_list_with_no_rows_is_an_empty_sheet_with_its_header(world):
    geopress.run(load_scenario(world.config_path, ["output.report=false"], replace_outputs=True))
    ws = openpyxl.load_workbook(world.out.parent / "mailing" / "upper_floors.xlsx").worksheets[0]
    assert [[c.value for c in r] for r in ws.iter_rows()] == [
        ["owner", "mail_address", "accounts", "customer_count", "zones", "worst_psi", "target_area"]]
    assert np.all([c.data_type == "s" for c in next(ws.iter_rows())])
