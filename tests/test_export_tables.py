"""The close's further tables (belt split, measured change, materials) and the reason codes
reach the workbook as the controller needs them."""

from __future__ import annotations

import pandas as pd
from openpyxl import load_workbook

from inventory.export import write_workbook


def test_extra_tables_and_reason_codes_in_the_workbook(make_close_result, tmp_path):
    res = make_close_result("2026-01")
    res.tables = {
        "Belt split": pd.DataFrame({
            "scale_id": ["BC1", "BC1"],
            "start": pd.to_datetime(["2026-01-10T23:00:00Z", "2026-01-11T00:00:00Z"], utc=True),
            "pile_id": ["P1", "P2"], "share": [0.25, 0.75], "tonnes": [30.0, 90.0],
        }),
        "Materials": pd.DataFrame({"material": ["coal"], "piles": [["P1", "P2"]], "variance_t": [-12.5]}),
    }
    res.reason_codes = {"WITHIN_SIGMA": "inside the combined uncertainty"}
    path = write_workbook(res, tmp_path / "v.xlsx")
    wb = load_workbook(path)
    split = wb["Belt split"]
    assert [c.value for c in split[1]] == ["scale_id", "start", "pile_id", "share", "tonnes"]
    # times are shown in the site's time zone (Europe/Berlin is UTC+1 in January)
    assert split["B2"].value.isoformat() == "2026-01-11T00:00:00"
    assert split["E3"].value == 90.0
    assert wb["Materials"]["B2"].value == "P1, P2"
    adj = wb["Journal"]
    texts = [c.value for row in adj.iter_rows() for c in row if isinstance(c.value, str)]
    assert "WITHIN_SIGMA" in texts and "inside the combined uncertainty" in texts


def test_report_shows_the_survey_instant_in_site_time(make_close_result):
    # 11:00 UTC on 28 January is 12:00 in Europe/Berlin (CET, UTC+1; IANA tz database)
    from inventory.export.report import report_html

    res = make_close_result("2026-01")
    assert str(res.survey_instant) == "2026-01-28 11:00:00+00:00"
    assert "instant 2026-01-28 12:00 CET (UTC+0100)" in report_html(res)
