"""site.toml's adjustment policy and journal codes, materials.csv's unit cost: read, checked."""

from __future__ import annotations

from inventory.site.load import check_site, load_site


def _add(site, text: str) -> None:
    with open(site / "site.toml", "a") as f:
        f.write("\n" + text)


def test_policy_codes_and_unit_cost_are_read(good_site):
    _add(good_site, '[reconcile]\nadjust = "significant"\nhold_unexplained = false\n\n'
                    '[journal]\ncurrency = "EUR"\n\n[journal.accounts]\ncoal = "1410"\n\n'
                    '[journal.locations]\nA = "YARD-A"\n')
    (good_site / "materials.csv").write_text(
        "material,bulk_density_t_m3,density_sd_t_m3,moisture_pct,tolerance_pct,unit_cost\n"
        "coal,0.85,0.03,8,3,95.5\nsalt,1.25,0.04,2,2,\n")
    site = load_site(good_site)
    rec, journal = site.config.reconcile, site.config.journal
    assert (rec.adjust, rec.hold_unexplained) == ("significant", False)
    assert journal.currency == "EUR" and journal.accounts == {"coal": "1410"}
    assert journal.locations == {"A": "YARD-A"}
    assert site.materials["coal"].unit_cost == 95.5 and site.materials["salt"].unit_cost is None


def test_defaults_without_any_of_it(good_site):
    site = load_site(good_site)
    assert (site.config.reconcile.adjust, site.config.reconcile.hold_unexplained) == ("all", True)
    assert site.config.journal.accounts == {} and site.materials["coal"].unit_cost is None


def test_a_bad_policy_is_an_error_and_an_unknown_code_target_a_warning(good_site):
    _add(good_site, '[reconcile]\nadjust = "some"\n\n[journal.accounts]\ncoke = "1"\n\n'
                    '[journal.locations]\nZ9 = "Y"\n')
    report = check_site(good_site)
    errors = [str(p) for p in report.errors]
    warnings = [str(p) for p in report.warnings]
    assert len(errors) == 1 and "reconcile.adjust" in errors[0] and "'some' is not one of" in errors[0], errors
    assert any("journal.accounts.coke: unknown material 'coke'" in w for w in warnings), warnings
    assert any("journal.locations.Z9: unknown pile 'Z9'" in w for w in warnings), warnings


def test_a_negative_unit_cost_is_refused_with_its_line(good_site):
    (good_site / "materials.csv").write_text(
        "material,bulk_density_t_m3,density_sd_t_m3,moisture_pct,tolerance_pct,unit_cost\n"
        "coal,0.85,0.03,8,3,-1\nsalt,1.25,0.04,2,2,60\n")
    errors = [str(p) for p in check_site(good_site).errors]
    assert any("materials.csv line 2" in e and "unit_cost" in e for e in errors), errors
