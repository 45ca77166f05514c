"""Tissue absorption beyond 1000 nm: whole blood with its water, fat, and the refusals where no table exists.

Sources, each named beside its check:
[B14] N. Bosschaart et al., Lasers Med. Sci. 29, 453 (2014), doi:10.1007/s10103-013-1446-7, appendix table of
      compiled whole-blood absorption (haematocrit 45 %, SO2 > 98 % and 0 %), mm^-1.
[F09] M. Friebel et al., J. Biomed. Opt. 14, 034001 (2009): above the cells' haemoglobin bands blood's absorption
      "approximates the absorption of water with values 20 to 30 % below" (abstract).
[vV05] R. L. P. van Veen et al., J. Biomed. Opt. 10, 054004 (2005), tabulated by S. Prahl (1/m).
[P99] S. Prahl's haemoglobin compilation (Gratzer, Kollias), 250-1000 nm.
[S81] D. J. Segelstein (1981), water, tabulated by S. Prahl.
"""

from __future__ import annotations

import numpy as np
import pytest

from probeplan.errors import InputError
from probeplan.model import tissue
from probeplan.model.spectra import Spectrum

# [B14] appendix values (mm^-1), oxygenated / deoxygenated, at named wavelengths.  The 660 and 995 nm rows
# are also quoted, identically, by an independent script that converts them to extinction coefficients.
B14_POINTS_PER_MM = [
    (660.0, 0.15, 1.64),
    (995.0, 0.65, 0.23),
    (1300.0, 0.19, 0.20),
    (1450.0, 2.41, 2.48),
    (1700.0, 0.60, 0.59),
]


@pytest.mark.parametrize(("wl", "oxy", "deoxy"), B14_POINTS_PER_MM)
def test_whole_blood_table_rows(wl, oxy, deoxy):
    cols, data, prov = tissue.load_table("blood_absorption.tsv")
    assert "Bosschaart" in prov and "45 %" in prov
    row = data[data[:, 0] == wl][0]
    assert row[cols.index("mu_a_oxy_per_mm")] == pytest.approx(oxy)
    assert row[cols.index("mu_a_deoxy_per_mm")] == pytest.approx(deoxy)


@pytest.mark.parametrize(("wl", "oxy", "deoxy"), [p for p in B14_POINTS_PER_MM if p[0] >= 1000.0])
def test_blood_beyond_1000nm_is_the_whole_blood_table_in_per_cm(wl, oxy, deoxy):
    # [B14], mm^-1 -> cm^-1 (x10); saturation mixes the two columns linearly.
    assert float(tissue.absorption("blood", wl, saturation=1.0)) == pytest.approx(10.0 * oxy)
    assert float(tissue.absorption("blood", wl, saturation=0.0)) == pytest.approx(10.0 * deoxy)
    mixed = float(tissue.absorption("blood", wl, saturation=0.7))
    assert mixed == pytest.approx(10.0 * (0.7 * oxy + 0.3 * deoxy))


def test_blood_below_1000nm_is_haemoglobin_plus_its_water():
    # [P99] at 150 g/L (ln 10 * eps * 150 / 64500) + [S81] water at the blood's water fraction.
    wl = np.array([650.0, 800.0, 970.0])
    hb = 0.75 * tissue.absorption("HbO2", wl) + 0.25 * tissue.absorption("Hb", wl)
    water = tissue.absorption("water", wl)
    expected = hb + tissue.BLOOD_WATER_FRACTION * water
    np.testing.assert_allclose(tissue.absorption("blood", wl, saturation=0.75), expected, rtol=1e-12)
    # 800 nm, [P99]: eps(HbO2) = 816 -> 2.303 * 816 * 150 / 64500 = 4.37 cm^-1, water adds ~0.016 cm^-1.
    assert float(tissue.absorption("blood", 800.0)) == pytest.approx(4.37 + 0.8 * 0.01964, rel=2e-3)


def test_blood_water_dominates_at_1450nm():
    # [F09]: where haemoglobin no longer matters, blood absorbs like water, 20-30 % below it (at haematocrit
    # 33 %); the compiled table at 1450 nm sits about 23 % below Segelstein's water.  Loose band: 0.6-1.0.
    ratio = float(tissue.absorption("blood", 1450.0, saturation=0.8) / tissue.absorption("water", 1450.0))
    assert 0.6 < ratio < 1.0


def test_mouse_whole_blood_preset_includes_its_water():
    # Haemoglobin alone held at its 1000 nm value gave about 4.6 cm^-1 at 1450 nm (S 0.8); whole blood with
    # its water [B14] is 24-25 cm^-1 there, about five times more.
    mu_a = tissue.tissue_preset("mouse whole blood").mu_a_per_cm(1450.0)
    assert float(mu_a) == pytest.approx(0.8 * 24.1 + 0.2 * 24.8)


def test_blood_outside_its_tables_refused():
    with pytest.raises(InputError, match="250-1800 nm"):
        tissue.absorption("blood", 1900.0)
    with pytest.raises(InputError, match="saturation"):
        tissue.absorption("blood", 800.0, saturation=1.5)


def test_fat_table_points():
    # [vV05], published in 1/m: 13.10 /m at the 930 nm lipid band, 7.029 /m at 1040 nm, 0.403 /m at 800 nm.
    np.testing.assert_allclose(tissue.absorption("fat", [930.0, 1040.0, 800.0]), [0.1310, 0.07029, 0.00403])
    _, _, prov = tissue.load_table("fat_absorption.tsv")
    assert "van Veen" in prov


def test_fat_band_near_930nm():
    # The lipid C-H band near 930 nm is a fact of the trade (common practice): the table peaks there.
    wl = np.arange(880.0, 990.0, 1.0)
    assert 925.0 <= wl[np.argmax(tissue.absorption("fat", wl))] <= 935.0


def test_fat_beyond_its_published_table_is_refused_not_held():
    with pytest.raises(InputError, match="fat absorption asked at 1300 nm, outside 429-1098 nm.*spectra/absorption"):
        tissue.absorption("fat", 1300.0)
    with pytest.raises(InputError, match="subcutaneous fat.*outside 429-1098 nm"):
        tissue.optical_properties(tissue.tissue_preset("subcutaneous fat"), [800.0, 1300.0])


def test_fat_fraction_works_in_presets_and_compositions():
    t = tissue.tissue_preset("subcutaneous fat")
    assert t.fat_fraction > 0
    mu_a = t.mu_a_per_cm(930.0)
    lean = t.with_composition(fat_fraction=0.0)
    assert float(mu_a) - float(lean.mu_a_per_cm(930.0)) == pytest.approx(t.fat_fraction * 0.1310)
    user = tissue.Tissue("adipose", blood_fraction=0.01, saturation=0.7, water_fraction=0.15, fat_fraction=0.8,
                         a_per_cm=13.7, b=0.385)
    assert float(user.mu_a_per_cm(1040.0)) > float(user.with_composition(fat_fraction=0.0).mu_a_per_cm(1040.0))


def test_user_fat_spectrum_extends_the_range():
    fat = Spectrum([400.0, 1800.0], [0.1, 0.1], name="fat", unit="cm^-1", kind="material")
    t = tissue.tissue_preset("subcutaneous fat").with_composition(fat_absorption=fat)
    lean = t.with_composition(fat_fraction=0.0)
    assert float(t.mu_a_per_cm(1300.0) - lean.mu_a_per_cm(1300.0)) == pytest.approx(t.fat_fraction * 0.1)


def test_every_preset_without_fat_covers_400_to_1700nm():
    wl = np.arange(400.0, 1701.0, 10.0)
    for name in tissue.preset_names():
        t = tissue.tissue_preset(name)
        if t.fat_fraction > 0:
            continue
        mu_a = t.mu_a_per_cm(wl)
        assert np.all(np.isfinite(mu_a)) and np.all(mu_a > 0), name


# --------------------------------------------------------------------------- scattering within its measured range
# [J13] Jacques 2013, Table 1 (mouse organs after Alexandrakis et al. 2005) and Table 2 (class means incl. b_Mie).


def test_every_preset_states_its_scattering_range():
    for name in tissue.preset_names():
        t = tissue.tissue_preset(name)
        assert t.scattering_range_nm is not None, name
        assert "scattering_range_source" in t.sources, name


def test_no_preset_falls_below_the_scattering_floor_anywhere_400_to_1700nm():
    wl = np.arange(400.0, 1701.0, 5.0)
    for name in tissue.preset_names():
        mu_sp = tissue.tissue_preset(name).mu_s_prime_per_cm(wl, warn=False)
        assert np.all(np.isfinite(mu_sp)), name
        assert mu_sp.min() >= tissue.MU_S_PRIME_FLOOR_PER_CM, (name, float(mu_sp.min()))
        assert np.all(np.diff(mu_sp) <= 0), name  # reduced scattering never rises with wavelength here


def test_mouse_muscle_at_1300nm_follows_the_stated_rule():
    # [J13] Table 1: a = 9.8 cm^-1, b = 2.82 up to 900 nm; beyond, b_Mie = 1.091 of 'other soft tissue' (Table 2).
    # The bare power law gave 0.66 cm^-1 at 1300 nm, below the muscle's own absorption there.
    edge = 9.8 * (900.0 / 500.0) ** -2.82
    expected = edge * (1300.0 / 900.0) ** -1.091
    with pytest.warns(tissue.ScatteringRangeWarning, match="outside the 500-900 nm its source measured") as rec:
        _, mu_sp = tissue.optical_properties(tissue.tissue_preset("mouse muscle"), 1300.0)
    assert float(mu_sp) == pytest.approx(expected, rel=1e-12)
    assert float(mu_sp) > 1.0
    assert rec[0].filename == __file__  # stacklevel points at the caller


def test_inside_the_range_the_published_law_holds_without_warning():
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error")
        _, mu_sp = tissue.optical_properties(tissue.tissue_preset("skin"), [650.0, 800.0])
    # [J13] worked values: skin mu_s'(800 nm) = 23.59 cm^-1
    assert float(mu_sp[1]) == pytest.approx(23.59, abs=0.01)


def test_user_tissue_range_is_validated():
    with pytest.raises(InputError, match="scattering_range_nm"):
        tissue.Tissue("x", blood_fraction=0.0, saturation=0.0, water_fraction=0.5, a_per_cm=10.0, b=1.0,
                      scattering_range_nm=(900.0, 500.0))


def test_a_users_fat_spectrum_extends_the_fat_presets(_isolated_user_library):
    # Beyond 1098 nm the user supplies the fat spectrum (their own measurement or a published one they choose).
    folder = _isolated_user_library / "spectra" / "absorption"
    folder.mkdir(parents=True)
    (folder / "fat.csv").write_text("# my lab's lard measurement (example)\nwavelength_nm,fat\n400,0.1\n1800,0.3\n")
    from probeplan.catalog import resolve

    t = resolve.tissue("subcutaneous fat")  # the catalog applies the library's fat spectrum to the preset
    lean = t.with_composition(fat_fraction=0.0)
    expected = t.fat_fraction * (0.1 + 0.2 * (1300.0 - 400.0) / 1400.0)
    assert float(t.mu_a_per_cm(1300.0) - lean.mu_a_per_cm(1300.0)) == pytest.approx(expected)
