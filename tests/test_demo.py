import numpy as np
import pandas as pd

from sitecheck.demo import GLUCOSE_MGDL_PER_MMOLL, SITES, generate_demo
from sitecheck.reading.intake import read_table


def test_fixture_is_the_generators_output(demo_small_path, demo_truth):
    # fixtures/demo_small.csv is write_demo(dir, n_rows=1200, seed=7)'s demo.csv
    from sitecheck.reading.intake import frame_to_raw

    fixture = read_table(demo_small_path, site="hospital").frame
    fresh = generate_demo(1200, seed=7)
    assert demo_truth == fresh.truth
    parsed = frame_to_raw(fresh.frame, site="hospital").frame   # the idiom cells ("<5", "4,3") read as numbers
    pd.testing.assert_frame_equal(fixture.drop(columns=["arrival_date"]).reset_index(drop=True),
                                  parsed.drop(columns=["arrival_date"]),
                                  check_dtype=False, check_exact=False, rtol=1e-12)


def test_truth_matches_what_was_injected():
    d = generate_demo(6000, seed=11)
    n = generate_demo(6000, seed=11, null=True)
    f, g = d.frame, n.frame
    by = lambda fr, s: fr[fr.hospital == s]  # noqa: E731
    eff = {(e["feature"], e["site"]): e["kind"] for e in d.truth["effects"]}
    assert eff == {("sodium", "Brackenholt"): "shift", ("glucose", "Cindervale"): "unit_ratio",
                   ("crp", "Duskwater"): "floor", ("temperature", "Aldermoor"): "precision",
                   ("lactate", "Brackenholt"): "missing_code", ("albumin", "Duskwater"): "site_missing",
                   ("troponin", "Aldermoor"): "censored_below", ("potassium", "Cindervale"): "number_format"}
    # export idioms: '<5' only at Aldermoor (troponin below 5 there), decimal commas only at Cindervale
    trop = f.troponin.astype(str)
    assert set(trop[trop.str.startswith("<")]) == {"<5"}
    assert set(f.hospital[trop == "<5"]) == {"Aldermoor"} and (trop[f.hospital == "Aldermoor"] == "<5").mean() > 0.08
    assert pd.to_numeric(f.troponin[f.hospital != "Aldermoor"], errors="coerce").min() < 5
    k = f.potassium.astype(str)
    assert k[f.hospital == "Cindervale"].str.fullmatch(r"\d+,\d").all() and not k[f.hospital != "Cindervale"].str.contains(",").any()
    assert not g.troponin.astype(str).str.startswith("<").any() and not g.potassium.astype(str).str.contains(",").any()
    # shift: +4 mmol/L
    others = f[f.hospital != "Brackenholt"].sodium.mean()
    assert abs(by(f, "Brackenholt").sodium.mean() - others - 4.0) < 0.5
    # unit: glucose ratio of medians is the mg/dL factor
    ratio = by(f, "Cindervale").glucose.median() / f[f.hospital != "Cindervale"].glucose.median()
    assert abs(ratio / GLUCOSE_MGDL_PER_MMOLL - 1) < 0.05
    # floor at 5 only at Duskwater
    assert by(f, "Duskwater").crp.min() == 5.0 and (by(f, "Duskwater").crp == 5.0).mean() > 0.2
    assert f[f.hospital != "Duskwater"].crp.min() < 5.0
    # rounding to 0.5
    t = by(f, "Aldermoor").temperature.dropna()
    assert np.allclose((t * 2) % 1, 0)
    assert not np.allclose((by(f, "Cindervale").temperature.dropna() * 2) % 1, 0)
    # sentinel
    assert (by(f, "Brackenholt").lactate == -99).sum() > 50 and (f[f.hospital != "Brackenholt"].lactate < 0).sum() == 0
    # never measured
    assert by(f, "Duskwater").albumin.isna().all()
    # older case mix
    assert by(f, "Cindervale").age.mean() - f[f.hospital != "Cindervale"].age.mean() > 5
    # prevalence varies by site in the demo, and less in the null variant
    prev = f.groupby("hospital").admitted_hdu.mean()
    prev0 = g.groupby("hospital").admitted_hdu.mean()
    assert prev.max() - prev.min() > 0.08 and prev0.max() - prev0.min() < 0.06
    # the null variant has none of the effects
    assert n.truth["effects"] == [] and (g.lactate.dropna() >= 0).all() and g.albumin.notna().groupby(g.hospital).mean().min() > 0.9


def test_demo_is_seeded():
    a = generate_demo(500, seed=3).frame
    b = generate_demo(500, seed=3).frame
    pd.testing.assert_frame_equal(a, b)
    assert set(a.hospital) == set(SITES)
