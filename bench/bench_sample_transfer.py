"""The sample site's volumes and the planted unrecorded transfer, with the volume sigma terms.

Usage::

    python bench/bench_sample_transfer.py [--cache /tmp/sample_surfaces.pkl]

Runs both sample surveys through the real survey chain (``measure_survey``; a minute or
two each; with ``--cache`` the surfaces are kept in a pickle so that a change to the volume
step alone can be measured again in seconds), measures the piles (``measure_piles``),
closes September and October as ``inventory close`` does, and prints per pile and survey
the volume error against ``sample_site/truth.json`` with its sigma and its terms, and for
the planted 420 t transfer FE2 -> FE1 the variance of each pile in units of its sigma.
"""

from __future__ import annotations

import argparse
import json
import pickle
import sys
import tempfile
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from inventory.errors import CoverageWarning  # noqa: E402
from inventory.site.load import load_site  # noqa: E402
from inventory.volume.measure import BaseSurfaces, measure_piles  # noqa: E402

DATES = ("2026-09-30", "2026-10-31")


def _surfaces(site, cache: Path | None):
    if cache is not None and cache.is_file():
        return pickle.loads(cache.read_bytes())
    from inventory.survey.measure import measure_survey

    out = {}
    with tempfile.TemporaryDirectory() as tmp:
        for d in DATES:
            Path(tmp, d).mkdir()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                out[d] = measure_survey(site, d, out_dir=Path(tmp, d)).surface
    if cache is not None:
        cache.write_bytes(pickle.dumps(out))
    return out


def _close_both(site, tables):
    from inventory.model.period import Period
    from inventory.stock.book import book_stock, opening_from_close
    from inventory.stock.reconcile import reconcile

    cfg = site.config.reconcile
    piles = site.piles[["pile_id", "material"]]
    s9, e9 = Period.parse("2026-09").bounds(site.timezone)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        b9 = book_stock(site.movements_for("2026-09"), site.opening, site.surveys["2026-09-30"].instant,
                        site.scales, piles, e9, s9, duplicate_window_min=cfg.duplicate_window_min)
        r9 = reconcile(tables[0], b9, site.materials, cfg, period="2026-09", scales=site.scales)
        s10, e10 = Period.parse("2026-10").bounds(site.timezone)
        opening = opening_from_close(r9.piles, site.materials, cfg.adjust_to)
        b10 = book_stock(site.movements_for("2026-10"), opening, site.surveys["2026-10-31"].instant,
                         site.scales, piles, e10, s10, duplicate_window_min=cfg.duplicate_window_min)
        previous = r9.piles[["pile_id", "survey_t", "survey_sigma_t", "base_sigma_t", "after_survey_net_t",
                             "volume_m3"]]
        r10 = reconcile(tables[1], b10, site.materials, cfg, previous=previous, history=r9.bias_rows,
                        period="2026-10", scales=site.scales)
    return r9, r10


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cache", type=Path, default=None)
    ap.add_argument("--site", type=Path, default=ROOT / "sample_site")
    args = ap.parse_args(argv)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        site = load_site(args.site)
    truth = json.loads((args.site / "truth.json").read_text())
    surfaces = _surfaces(site, args.cache)
    tables = []
    zs = []
    for k, d in enumerate(DATES):
        surf = surfaces[d]
        base = BaseSurfaces.from_site(site, surf.grid)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", CoverageWarning)
            t = measure_piles(surf, site.piles, site.materials, base)
        tables.append(t)
        tv = truth["surveys"][k]["piles"]
        print(f"survey {d}")
        print(f"  {'pile':6} {'err %':>7} {'z':>6} {'sigma':>7} {'random':>7} {'corr':>7} {'interp':>7} {'base':>7}"
              f" {'scanned':>7}")
        for _, r in t.iterrows():
            true = tv[r.pile_id]["volume_m3"]
            z = (r.volume_m3 - true) / r.volume_sigma_m3
            zs.append(z)
            print(f"  {r.pile_id:6} {100 * (r.volume_m3 - true) / true:7.2f} {z:6.2f} {r.volume_sigma_m3:7.1f}"
                  f" {r.sigma_random_m3:7.1f} {r.sigma_correlated_m3:7.1f} {r.sigma_interpolated_m3:7.1f}"
                  f" {r.sigma_base_m3:7.1f} {r.scanned_fraction:7.2f}")
    zs = np.array(zs)
    print(f"all {len(zs)} pile-surveys: sd(z) {zs.std(ddof=1):.2f}, mean(z) {zs.mean():.2f}, "
          f"covered {np.mean(np.abs(zs) <= 1.96) * 100:.0f} %")
    r9, r10 = _close_both(site, tables)
    fault = truth["faults"]["missing_transfer"]
    p = r10.piles.set_index("pile_id")
    for pid in (fault["from_pile"], fault["to_pile"]):
        v, s = p.loc[pid, "variance_t"], p.loc[pid, "variance_sigma_t"]
        print(f"2026-10 {pid}: variance {v:.0f} t, sigma {s:.0f} t, {v / s:+.2f} sigma, significant "
              f"{bool(p.loc[pid, 'significant'])}, reason {p.loc[pid, 'reason_code']}: {p.loc[pid, 'reason']}")
    for name, r in (("2026-09", r9), ("2026-10", r10)):
        sig = r.piles[r.piles["significant"]]
        print(f"{name} significant piles: {', '.join(f'{a} ({b})' for a, b in zip(sig.pile_id, sig.reason_code))}")


if __name__ == "__main__":
    main()
