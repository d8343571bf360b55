"""Damaged settings: the newer keys of site.toml ([survey] control_model / control_rms_max_m,
[reconcile] adjust / hold_unexplained, [journal] currency / accounts / locations,
[unassigned], [ledger], vertical_reference / vertical_crs), materials.csv ``unit_cost``, a
shared ledger that cannot be reached or a ledger file that is not one, and the options of
``inventory volumes`` and ``inventory history``.

Each case runs through :func:`inventory.cli.main`: exit 2, exactly one ``error:`` line naming
the file (or option) and the field, no traceback, and the site folder byte-identical.
"""

from __future__ import annotations

import socket
from pathlib import Path

import pytest

from inventory.cli import main

T = "error: site/site.toml"


def append(site: Path, text: str) -> None:
    toml = site / "site.toml"
    toml.write_text(toml.read_text() + "\n" + text + "\n")


def prepend(site: Path, text: str) -> None:
    toml = site / "site.toml"
    toml.write_text(text + "\n" + toml.read_text())


# ----------------------------------------------------------------------------- site.toml sections
# the small site's site.toml has 18 lines; a section appended after a blank line has its
# header on line 20 and its first key on line 21
SECTIONS = {
    "control-model-unknown": ('[survey]\ncontrol_model = "helmert"',
                              f"{T} line 21: survey.control_model: 'helmert' is not one of ['7-parameter', '4+1']"),
    "control-rms-text": ('[survey]\ncontrol_rms_max_m = "abc"',
                         f"{T} line 21: survey.control_rms_max_m: 'abc' is not of type 'number'"),
    "control-rms-negative": ("[survey]\ncontrol_rms_max_m = -1",
                             f"{T} line 21: survey.control_rms_max_m: -1 is less than or equal to the minimum of 0"),
    "control-rms-nan": ("[survey]\ncontrol_rms_max_m = nan",
                        f"{T} line 21: survey.control_rms_max_m: nan is not a finite number"),
    "control-rms-inf": ("[survey]\ncontrol_rms_max_m = inf",
                        f"{T} line 21: survey.control_rms_max_m: inf is not a finite number"),
    "adjust-unknown": ('[reconcile]\nadjust = "some"',
                       f"{T} line 21: reconcile.adjust: 'some' is not one of ['all', 'significant', 'out_of_tolerance']"),
    "hold-as-text": ('[reconcile]\nhold_unexplained = "yes"',
                     f"{T} line 21: reconcile.hold_unexplained: 'yes' is not of type 'boolean'"),
    "hold-as-number": ("[reconcile]\nhold_unexplained = 1",
                       f"{T} line 21: reconcile.hold_unexplained: 1 is not of type 'boolean'"),
    "currency-two-letters": ('[journal]\ncurrency = "EU"', f"{T} line 21: journal.currency: 'EU' is not a currency code: three "
                                                          "capital letters of ISO 4217, e.g. EUR, USD"),
    "currency-lower-case": ('[journal]\ncurrency = "eur"', f"{T} line 21: journal.currency: 'eur' is not a currency code: three "
                                                           "capital letters of ISO 4217, e.g. EUR, USD"),
    "currency-word": ('[journal]\ncurrency = "EURO"', f"{T} line 21: journal.currency: 'EURO' is not a currency code: three "
                                                      "capital letters of ISO 4217, e.g. EUR, USD"),
    "currency-number": ("[journal]\ncurrency = 978", f"{T} line 21: journal.currency: 978 is not of type 'string'"),
    "account-number": ("[journal]\naccounts = { coal = 1400 }",
                       f"{T} line 21: journal.accounts.coal: 1400 is not of type 'string'"),
    "account-table": ("[journal]\naccounts = { coal = { a = 1 } }",
                      f"{T} line 21: journal.accounts.coal: {{'a': 1}} is not of type 'string'"),
    "account-blank": ('[journal]\naccounts = { coal = "" }', f"{T} line 21: journal.accounts.coal: '' should be non-empty"),
    "accounts-list": ('[journal]\naccounts = ["a"]', f"{T} line 21: journal.accounts: ['a'] is not of type 'object'"),
    "location-bool": ("[journal]\nlocations = { A = true }",
                      f"{T} line 21: journal.locations.A: True is not of type 'string'"),
    "min-thickness-text": ('[unassigned]\nmin_thickness_m = "x"',
                           f"{T} line 21: unassigned.min_thickness_m: 'x' is not of type 'number'"),
    "min-thickness-zero": ("[unassigned]\nmin_thickness_m = 0",
                           f"{T} line 21: unassigned.min_thickness_m: 0 is less than or equal to the minimum of 0"),
    "min-thickness-nan": ("[unassigned]\nmin_thickness_m = nan",
                          f"{T} line 21: unassigned.min_thickness_m: nan is not a finite number"),
    "min-thickness-inf": ("[unassigned]\nmin_thickness_m = inf",
                          f"{T} line 21: unassigned.min_thickness_m: inf is not a finite number"),
    "min-area-negative": ("[unassigned]\nmin_area_m2 = -4",
                          f"{T} line 21: unassigned.min_area_m2: -4 is less than the minimum of 0"),
    "min-area-nan": ("[unassigned]\nmin_area_m2 = nan",
                     f"{T} line 21: unassigned.min_area_m2: nan is not a finite number"),
    "min-area-minus-inf": ("[unassigned]\nmin_area_m2 = -inf",
                           f"{T} line 21: unassigned.min_area_m2: -inf is not a finite number"),
    "unassigned-unknown-key": ("[unassigned]\nmin_volume = 3", f"{T} line 21: unassigned.min_volume: unknown key"),
    "ledger-url-words": ('[ledger]\nurl = "not a url"',
                         f"{T} line 21: ledger.url: 'not a url' is not a PostgreSQL URL: postgresql://user@host:port/database"),
    "ledger-url-other-database": ('[ledger]\nurl = "mysql://u@h/db"',
                                  f"{T} line 21: ledger.url: 'mysql://u@h/db' is not a PostgreSQL URL: "
                                  "postgresql://user@host:port/database"),
    "ledger-url-number": ("[ledger]\nurl = 5", f"{T} line 21: ledger.url: 5 is not of type 'string'"),
    "ledger-site-id-blank": ('[ledger]\nsite_id = ""', f"{T} line 21: ledger.site_id: '' should be non-empty"),
    "ledger-site-id-number": ("[ledger]\nsite_id = 3", f"{T} line 21: ledger.site_id: 3 is not of type 'string'"),
    "key-given-twice": ('[journal]\ncurrency = "EUR"\ncurrency = "USD"',
                        "error: site/site.toml line 22: not valid TOML: Cannot overwrite a value (at line 22, column 17)"),
}


@pytest.mark.parametrize("text, expected", SECTIONS.values(), ids=SECTIONS.keys())
def test_damaged_site_toml_sections(good_site, capsys, text, expected, refused_once):
    append(good_site, text)
    assert refused_once(good_site, capsys) == expected


TOP = {
    "vertical-reference-number": ("vertical_reference = 5",
                                  f"{T} line 1: vertical_reference: 5 is not of type 'string'"),
    "vertical-reference-blank": ('vertical_reference = ""', f"{T} line 1: vertical_reference: '' should be non-empty"),
    "vertical-crs-unknown": ('vertical_crs = "EPSG:99999999"',
                             f"{T} line 1: vertical_crs: unknown CRS 'EPSG:99999999' (Invalid projection: EPSG:99999999: "
                             "(Internal Proj Error: proj_create: crs not found: EPSG:99999999))"),
    "vertical-crs-horizontal": ('vertical_crs = "EPSG:25832"',
                                f"{T} line 1: vertical_crs: EPSG:25832 (ETRS89 / UTM zone 32N) is not a vertical CRS"),
    # EPSG:6360 is NAVD88 height in US survey feet (EPSG registry)
    "vertical-crs-in-feet": ('vertical_crs = "EPSG:6360"',
                             f"{T} line 1: vertical_crs: EPSG:6360 (NAVD88 height (ftUS)) has heights in US survey foot; use "
                             "a vertical CRS in metres"),
    "vertical-crs-proj-string": ('vertical_crs = "+proj=foo"',
                                 f"{T} line 1: vertical_crs: '+proj=foo' is not an EPSG code: EPSG:<number>, e.g. EPSG:25832"),
    "vertical-crs-number": ("vertical_crs = 5703", f"{T} line 1: vertical_crs: 5703 is not of type 'string'"),
}


@pytest.mark.parametrize("text, expected", TOP.values(), ids=TOP.keys())
def test_damaged_top_level_keys(good_site, capsys, text, expected, refused_once):
    prepend(good_site, text)
    assert refused_once(good_site, capsys) == expected


def test_site_toml_not_utf8(good_site, capsys, refused_once):
    toml = good_site / "site.toml"
    toml.write_bytes(toml.read_bytes().replace(b"Test yard", b"Test \xe9yard"))
    assert refused_once(good_site, capsys) == f"{T}: not UTF-8 text"


def test_site_toml_with_bom_and_crlf_is_read(good_site, capsys):
    toml = good_site / "site.toml"
    toml.write_bytes(b"\xef\xbb\xbf" + toml.read_bytes().replace(b"\n", b"\r\n"))
    assert main(["check", str(good_site)]) == 0, capsys.readouterr().err


def test_a_close_refuses_nan_settings_before_writing(good_site, capsys, refused_once):
    append(good_site, "[unassigned]\nmin_thickness_m = nan")
    line = refused_once(good_site, capsys, ["close", str(good_site), "--period", "2026-10"])
    assert line == f"{T} line 21: unassigned.min_thickness_m: nan is not a finite number"


# ----------------------------------------------------------------------------- materials.csv unit_cost
MATERIAL_HEAD = "material,bulk_density_t_m3,density_sd_t_m3,moisture_pct,tolerance_pct,unit_cost\n"
M = "error: site/materials.csv"
UNIT_COSTS = {
    "text": ("abc", f"{M} line 2: unit_cost: 'abc' is not a number"),
    "negative": ("-5", f"{M} line 2: unit_cost: -5 is below the minimum 0"),
    "nan": ("nan", f"{M} line 2: unit_cost: 'nan' is not a finite number"),
    "inf": ("inf", f"{M} line 2: unit_cost: 'inf' is not a finite number"),
    "overflow": ("1e400", f"{M} line 2: unit_cost: '1e400' is not a finite number"),
    "decimal-comma": ('"12,5"', f"{M} line 2: unit_cost: '12,5' is not a number"),
    "currency-sign": ("€12", f"{M} line 2: unit_cost: '€12' is not a number"),
}


@pytest.mark.parametrize("cost, expected", UNIT_COSTS.values(), ids=UNIT_COSTS.keys())
def test_damaged_unit_cost(good_site, capsys, cost, expected, refused_once):
    (good_site / "materials.csv").write_text(MATERIAL_HEAD + f"coal,0.85,0.03,8,3,{cost}\nsalt,1.25,0.04,2,2,5\n")
    assert refused_once(good_site, capsys) == expected


def test_unit_cost_column_twice(good_site, capsys, refused_once):
    (good_site / "materials.csv").write_text(MATERIAL_HEAD.replace("unit_cost", "unit_cost,unit_cost")
                                             + "coal,0.85,0.03,8,3,1,2\nsalt,1.25,0.04,2,2,5,5\n")
    assert refused_once(good_site, capsys) == f"{M} line 1: unit_cost: the column appears twice (columns 6 and 7)"


# ----------------------------------------------------------------------------- ledgers
@pytest.fixture
def closed_port() -> int:
    """A local TCP port nothing listens on (bound, then released)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _refused_connection(line: str, where: str, port: int) -> None:
    assert line.startswith(f"error: {where}cannot connect to the ledger postgresql://u@127.0.0.1:{port}/db: ")
    assert line.endswith("Connection refused")


@pytest.mark.parametrize("argv", [["close", "--period", "2026-10"], ["history"],
                                  ["reopen", "--period", "2026-10", "--reason", "x"]], ids=["close", "history", "reopen"])
def test_unreachable_ledger_from_the_command_line(good_site, capsys, closed_port, argv, refused_once):
    # a refused connection returns at once; a server that drops packets is bounded by
    # inventory.ledger.pg.CONNECT_TIMEOUT_S
    pytest.importorskip("psycopg")
    line = refused_once(good_site, capsys, [argv[0], str(good_site), *argv[1:],
                                            "--ledger", f"postgresql://u@127.0.0.1:{closed_port}/db"])
    _refused_connection(line, "--ledger: ", closed_port)


@pytest.mark.parametrize("argv", [["close", "--period", "2026-10"], ["history"]], ids=["close", "history"])
def test_unreachable_ledger_from_site_toml(good_site, capsys, closed_port, argv, refused_once):
    pytest.importorskip("psycopg")
    append(good_site, f'[ledger]\nurl = "postgresql://u@127.0.0.1:{closed_port}/db"')
    line = refused_once(good_site, capsys, [argv[0], str(good_site), *argv[1:]])
    _refused_connection(line, f"{good_site}/site.toml: ledger.url: ", closed_port)


def test_ledger_url_with_an_impossible_port(good_site, capsys, refused_once):
    pytest.importorskip("psycopg")
    line = refused_once(good_site, capsys, ["history", str(good_site), "--ledger", "postgresql://u@127.0.0.1:99999/db"])
    assert line == ('error: --ledger: cannot connect to the ledger postgresql://u@127.0.0.1:99999/db: connection is bad: '
                    'invalid port number: "99999"')


@pytest.mark.parametrize("url", ["not a url", "mysql://u@h/db", "", "/tmp/ledger.sqlite"])
def test_ledger_option_that_is_not_a_url(good_site, capsys, url, refused_once):
    line = refused_once(good_site, capsys, ["history", str(good_site), "--ledger", url])
    assert line == "error: --ledger: not a PostgreSQL URL (postgresql://user@host:port/database)"


def test_ledger_file_that_is_not_a_database(good_site, capsys, refused_once):
    (good_site / "ledger.sqlite").write_bytes(b"not sqlite " * 100)
    line = refused_once(good_site, capsys, ["history", str(good_site)])
    assert line == (f"error: {good_site}/ledger.sqlite: not a readable SQLite ledger (file is not a database); "
                    "restore it from a backup")


# ----------------------------------------------------------------------------- command options
@pytest.mark.parametrize("date", ["2026-13-45", "yesterday", "", "../../etc"])
def test_volumes_date_that_is_not_a_date(good_site, capsys, date, refused_once):
    line = refused_once(good_site, capsys, ["volumes", str(good_site), "--date", date])
    assert line == f"error: --date: date: {date!r} is not a date YYYY-MM-DD"


def test_volumes_date_without_a_survey(good_site, capsys, refused_once):
    line = refused_once(good_site, capsys, ["volumes", str(good_site), "--date", "2026-10-30"])
    assert line == (f"error: {good_site}/surveys/2026-10-30: date: no survey dated 2026-10-30 "
                    "(survey folders: 2026-10-31)")


def test_history_from_after_to(good_site, capsys, refused_once):
    line = refused_once(good_site, capsys, ["history", str(good_site), "--from", "2026-12", "--to", "2026-01"])
    assert line == "error: --from: period: 2026-12 is after --to 2026-01"


def test_history_xlsx_needs_an_output(good_site, capsys, refused_once):
    line = refused_once(good_site, capsys, ["history", str(good_site), "--format", "xlsx"])
    assert line == ("error: --format xlsx needs --output FILE.xlsx (a workbook is written to a file, not to the "
                    "terminal)")


def test_history_output_that_is_a_folder(good_site, tmp_path, capsys, refused_once):
    folder = tmp_path / "reports"
    folder.mkdir()
    for fmt in ("csv", "xlsx"):
        line = refused_once(good_site, capsys, ["history", str(good_site), "--format", fmt, "--output", str(folder)])
        assert line == f"error: --output: {folder} is a folder; give a file name, e.g. {folder / 'history.csv'}"
    assert list(folder.iterdir()) == [] and sorted(p.name for p in tmp_path.iterdir()) == ["reports", "site"]


def test_history_output_under_a_file(good_site, tmp_path, capsys, refused_once):
    blocker = tmp_path / "notes.txt"
    blocker.write_text("a file where a folder is expected")
    line = refused_once(good_site, capsys, ["history", str(good_site), "--format", "csv",
                                            "--output", str(blocker / "sub" / "h.csv")])
    assert line == f"error: --output: {blocker / 'sub' / 'h.csv'}: {blocker} is a file, not a folder"
    assert blocker.read_text() == "a file where a folder is expected"


@pytest.mark.parametrize("option, value, choices", [
    ("--by", "year", "'pile', 'material', 'month'"),
    ("--format", "pdf", "'table', 'csv', 'json', 'html', 'xlsx'"),
])
def test_history_choice_not_offered(good_site, capsys, option, value, choices, snapshot):
    # argparse answers an unknown choice itself: usage, one error line, exit 2
    before = snapshot(good_site)
    with pytest.raises(SystemExit) as stop:
        main(["history", str(good_site), option, value])
    assert stop.value.code == 2
    last = capsys.readouterr().err.strip().splitlines()[-1]
    assert last == f"inventory history: error: argument {option}: invalid choice: '{value}' (choose from {choices})"
    assert snapshot(good_site) == before


def test_unit_cost_without_a_currency_is_a_warning(good_site, capsys):
    (good_site / "materials.csv").write_text(MATERIAL_HEAD + "coal,0.85,0.03,8,3,80\nsalt,1.25,0.04,2,2,\n")
    assert main(["check", str(good_site)]) == 0
    warnings = [line for line in capsys.readouterr().err.splitlines() if line.startswith("warning: ")]
    assert warnings == ["warning: site/materials.csv line 1: unit_cost: 1 material(s) have a unit cost but site.toml "
                        "has no [journal] currency: the journal's values carry no currency"]
    append(good_site, '[journal]\ncurrency = "EUR"')
    assert main(["check", str(good_site)]) == 0
    assert "warning:" not in capsys.readouterr().err
