"""Mie theory for phantom spheres (checked against miepython) and the phantom recipe (published emulsion values)."""

import warnings

import miepython
import numpy as np
import pytest

from probeplan.errors import AssumptionWarning, InputError, ModelValidityWarning
from probeplan.model.mie import mie_efficiencies, refractive_index, sphere_reduced_scattering_per_cm
from probeplan.model.phantom import intralipid_scattering, phantom_recipe
from probeplan.model.spectra import Spectrum

# (n_particle, diameter µm, wavelength nm, n_medium): dielectric, polystyrene-like, TiO2-like, absorbing, large, Rayleigh
CASES = [(1.5, 1.0, 633.0, 1.0), (1.59, 0.5, 800.0, 1.33), (2.7, 0.3, 700.0, 1.33), (1.45 + 0.01j, 2.0, 900.0, 1.33),
         (1.59, 10.0, 600.0, 1.33), (1.59, 0.05, 800.0, 1.33)]


@pytest.mark.parametrize("m, d, wl, n_env", CASES)
def test_efficiencies_match_miepython(m, d, wl, n_env):
    # miepython (reference library) uses n - ik for absorption; probeplan n + ik
    _, qsca_ref, _, g_ref = miepython.efficiencies(np.conj(m), d, wl / 1000.0, n_env=n_env)
    qsca, g = mie_efficiencies(m, d, wl, n_medium=n_env)
    assert qsca == pytest.approx(qsca_ref, rel=1e-8)
    assert g == pytest.approx(g_ref, rel=1e-8, abs=1e-10)


def test_reduced_scattering_against_miepython_and_volume_fraction():
    wl = np.array([650.0, 800.0, 1000.0])
    n_ps = refractive_index("polystyrene", wl)
    got = sphere_reduced_scattering_per_cm(1.0, 0.002, wl, n_particle="polystyrene")
    for i, w in enumerate(wl):
        _, qsca, _, g = miepython.efficiencies(n_ps[i], 1.0, w / 1000.0, n_env=1.33)
        radius_cm = 0.5e-4
        assert got[i] == pytest.approx(3 * 0.002 * qsca * (1 - g) / (4 * radius_cm), rel=1e-8)
    # linear in the volume fraction (independent scattering)
    half = sphere_reduced_scattering_per_cm(1.0, 0.001, wl, n_particle="polystyrene")
    assert np.allclose(got, 2 * half)


def test_rayleigh_limit_scales_as_inverse_fourth_power():
    # Bohren & Huffman eq. 5.8: Q_sca = (8/3) x^4 |(m^2 - 1)/(m^2 + 2)|^2 for x << 1, g -> 0
    x = np.pi * 0.002 * 1000.0 / 500.0
    q1, g1 = mie_efficiencies(1.5, 0.002, 500.0, n_medium=1.0)
    q2, _ = mie_efficiencies(1.5, 0.002, 1000.0, n_medium=1.0)
    assert q1 == pytest.approx(8.0 / 3.0 * x**4 * ((1.5**2 - 1) / (1.5**2 + 2)) ** 2, rel=1e-3)
    assert q1 / q2 == pytest.approx(16.0, rel=1e-3)
    assert abs(float(g1)) < 1e-3


def test_refractive_indices_against_published_values():
    # Malitson 1965: fused silica n = 1.4585 at 589.3 nm (sodium D line; handbook value)
    assert float(refractive_index("silica", 589.3)) == pytest.approx(1.4585, abs=2e-4)
    # Ma et al. 2003 polystyrene ~1.58-1.59 in the visible; DeVore 1951 rutile n_o ~2.5 in the NIR (from memory: loose)
    assert 1.57 < float(refractive_index("polystyrene", 800.0)) < 1.59
    assert 2.4 < float(refractive_index("tio2", 1000.0)) < 2.6
    with pytest.warns(ModelValidityWarning, match="extrapolated"):
        refractive_index("polystyrene", 1700.0)
    with pytest.raises(InputError, match="unknown sphere material"):
        refractive_index("gold", 700.0)


def test_bad_sphere_input():
    with pytest.raises(InputError, match="diameter_um"):
        sphere_reduced_scattering_per_cm(-1.0, 0.01, 700.0, n_particle=1.59)
    with pytest.raises(InputError, match="volume_fraction"):
        sphere_reduced_scattering_per_cm(1.0, 1.5, 700.0, n_particle=1.59)
    with pytest.warns(ModelValidityWarning, match="dependent scattering"):
        sphere_reduced_scattering_per_cm(1.0, 0.2, 700.0, n_particle=1.59)


def test_intralipid_against_published_values():
    # van Staveren et al. 1991 formula itself at 632.8 nm: mu_s = 2.54e9 * 632.8^-2.4, g = 1.1 - 0.58e-3 * 632.8
    mu_s, g = intralipid_scattering(632.8)
    assert float(mu_s) == pytest.approx(2.54e9 * 632.8**-2.4, rel=1e-12)
    assert float(g) == pytest.approx(0.7330, abs=1e-4)
    # Di Ninni, Martelli & Zaccanti, Phys. Med. Biol. 56, N21 (2011): Intralipid-20 % specific mu_s'
    # 25.9, 21.2, 18.4 mm^-1 at 632.8, 751, 833 nm (mean of nine batches); van Staveren x 2 within 5 %
    mu_s, g = intralipid_scattering([632.8, 751.0, 833.0], stock="intralipid-20")
    assert mu_s * (1 - g) == pytest.approx([259.0, 212.0, 184.0], rel=0.05)
    with pytest.warns(ModelValidityWarning, match="extrapolated"):
        intralipid_scattering(1300.0)


def test_recipe_hits_targets_and_round_trips():
    ink = Spectrum(np.array([600.0, 1000.0]), np.array([2400.0, 1400.0]), name="my ink", unit="cm^-1", kind="material")
    wl = [700.0]
    r = phantom_recipe(wl, [0.5], [10.0], absorber=ink, batch_ml=250.0)
    # one wavelength: exact match of both targets
    assert r.mu_s_prime_per_cm(700.0) == pytest.approx(10.0, rel=1e-9)
    assert r.mu_a_per_cm(700.0) == pytest.approx(0.5, rel=1e-9)
    # Intralipid-20 % for mu_s' 10 cm^-1 at 700 nm is of the order of 4-5 % (common practice: ~1 % Intralipid-20 per
    # 2-2.5 cm^-1)
    assert 0.03 < r.scatterer_fraction < 0.06
    sheet = r.preparation()
    assert sum(row["volume_ml"] for row in sheet) == pytest.approx(250.0)
    # the medium the forward model sees is the recipe's
    medium = r.medium()
    assert medium.mu_a_per_cm(700.0) == pytest.approx(0.5, rel=1e-9)


def test_recipe_spheres_and_ink_assumption():
    with pytest.warns(AssumptionWarning, match="india ink"):
        r = phantom_recipe([650.0, 850.0], [0.2, 0.15], [12.0, 9.0], scatterer="tio2", diameter_um=0.25)
    assert r.diameter_um == 0.25
    assert any("assumption" in n for n in r.notes)
    solid = r.preparation()[0]
    assert solid["mass_g"] == pytest.approx(solid["volume_ml"] * 4.23)
    # two wavelengths, two amounts: relative errors balanced in least squares (both signs)
    errs = [row["mu_s_prime_error_percent"] for row in r.table]
    assert min(errs) < 0 < max(errs) or max(abs(e) for e in errs) < 1e-6


def test_recipe_bad_input():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AssumptionWarning)
        with pytest.raises(InputError, match="water's own absorption"):
            phantom_recipe([980.0], [0.01], [10.0])
        with pytest.raises(InputError, match="unknown scatterer"):
            phantom_recipe([700.0], [0.3], [10.0], scatterer="milk")
        with pytest.raises(InputError, match="one target"):
            phantom_recipe([700.0, 800.0], [0.3], [10.0])
        with pytest.raises(InputError, match="unknown absorber"):
            phantom_recipe([700.0], [0.3], [10.0], absorber="coffee")


def test_top_level_names_and_signature():
    import inspect

    import probeplan

    sig = inspect.signature(probeplan.sphere_reduced_scattering_per_cm)
    assert list(sig.parameters) == ["diameter_um", "volume_fraction", "wavelength_nm", "n_particle", "n_medium"]
    assert sig.parameters["n_particle"].kind is inspect.Parameter.KEYWORD_ONLY
    assert sig.parameters["n_medium"].default == 1.33
    assert callable(probeplan.phantom_recipe)
    with pytest.raises(AttributeError):
        probeplan.no_such_name  # noqa: B018


def test_phantom_command_with_plan_and_bad_input(tmp_path, capsys):
    import json

    from probeplan.cli.main import main
    from probeplan.demo import demo_folder

    out = tmp_path / "ph"
    assert main(["phantom", "--plan", str(demo_folder() / "plan.toml"), "--out", str(out), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert {"recipe.csv", "preparation.csv", "sbr_curve.csv", "sbr_curve.png"} <= {p.name for p in out.iterdir()}
    # the phantom mimics the plan's tissue at 640 nm and the three emission peaks within 10 % (two amounts, four
    # wavelengths), and its SBR curve follows the tissue's within 15 % at the plan's 3 mm target
    assert max(abs(r["mu_s_prime_error_percent"]) for r in report["properties"]) < 10
    at3 = [r for r in report["sbr_curve"] if r["depth_mm"] == 3.0]
    assert len(at3) == 3 and all(abs(r["sbr_phantom"] / r["sbr_tissue"] - 1) < 0.15 for r in at3)
    assert any("heavy-metal" in n for n in report["notes"])
    assert main(["phantom", "--wavelength-nm", "700", "--mu-a", "0.3"]) == 2
    assert "not all given" in capsys.readouterr().err
    ink = tmp_path / "ink.csv"
    ink.write_text("wavelength_nm,ink\n600,2400\n1000,1400\n")
    assert main(["phantom", "--wavelength-nm", "700", "--mu-a", "0.3", "--mu-s-prime", "10", "--absorber", str(ink),
                 "--scatterer", "polystyrene"]) == 0
    assert "polystyrene spheres" in capsys.readouterr().out
