"""The stable interfaces exist, every module declares its public names, and they resolve."""

from __future__ import annotations

import importlib
import inspect
import pkgutil

import numpy as np
import pytest

import probeplan


def _modules():
    for info in pkgutil.walk_packages(probeplan.__path__, "probeplan."):
        if info.name.startswith("probeplan.cli.commands") or info.name == "probeplan.__main__":
            continue
        yield importlib.import_module(info.name)


@pytest.mark.parametrize("module", list(_modules()), ids=lambda m: m.__name__)
def test_every_public_name_in_all_exists(module):
    names = getattr(module, "__all__", None)
    assert names is not None, f"{module.__name__} has no __all__"
    for name in names:
        assert hasattr(module, name), f"{module.__name__}.{name} is in __all__ but missing"


def test_stable_interfaces_behave_as_stated():
    # The stable signatures, with a value each; the sources are cited in the modules' own tests.
    from probeplan.model import dots
    from probeplan.study import safety
    from probeplan.model import tissue
    from probeplan.model import transport
    from probeplan.unmixing import pipeline as unmix

    mu_a, mu_sp = tissue.optical_properties("skin", 800.0)
    assert float(mu_sp) == pytest.approx(23.59, abs=0.01)  # Jacques 2013 Table 2
    assert float(tissue.molar_extinction("HbO2", 800.0)) == 816.0  # Prahl
    assert float(tissue.absorption("water", 800.0)) == pytest.approx(0.01964)  # Segelstein
    assert float(transport.mu_eff(0.1, 10.0)) == pytest.approx(1.7407, abs=1e-4)  # docs/sources.md
    assert float(transport.diffuse_reflectance(0.1, 10.0, n=1.4)) == pytest.approx(0.6141, abs=1e-4)  # Farrell 1992
    assert float(dots.diameter_nm("CdSe", 550.0)) == pytest.approx(3.04, abs=0.01)  # Yu 2003
    assert float(dots.exciton_peak_nm("CdSe", float(dots.diameter_nm("CdSe", 550.0)))) == pytest.approx(550.0)
    assert float(dots.extinction_coefficient("CdSe", 3.04)) == pytest.approx(1.115e5, rel=0.01)  # Yu 2003
    assert float(dots.concentration_uM("CdSe", 550.0, 0.1, path_cm=1.0)) > 0
    assert float(safety.skin_mpe_mw_per_cm2(808.0, 100.0)) == pytest.approx(328.9, abs=0.1)  # ANSI/IEC
    assert float(safety.max_injection_volume_ml("mouse", "iv", 25.0)) == pytest.approx(0.125)  # Diehl 2001
    m = np.array([[1.0, 0.0], [0.5, 0.5], [0.0, 1.0]])
    a = unmix.unmix(np.einsum("ck,kyx->cyx", m, np.ones((2, 2, 2))), m, method="nnls", channel_axis=0)
    np.testing.assert_allclose(a, 1.0)


def test_stable_signatures():
    from probeplan.study import safety
    from probeplan.model import transport
    from probeplan.unmixing import pipeline as unmix

    assert list(inspect.signature(transport.diffuse_reflectance).parameters)[:3] == [
        "mu_a_per_cm", "mu_s_prime_per_cm", "n"]
    params = inspect.signature(unmix.unmix).parameters
    assert params["method"].default == "nnls" and params["channel_axis"].default == 0
    assert list(inspect.signature(safety.max_injection_volume_ml).parameters) == [
        "species", "route", "body_mass_g", "rules"]


STABLE_NAMES = """optical_properties molar_extinction absorption mu_eff diffuse_reflectance point_source_escape
point_source_exitance_per_mm2 point_source_blur_fwhm_mm broad_beam_fluence diameter_nm exciton_peak_nm
extinction_coefficient concentration_uM skin_mpe_mw_per_cm2 max_injection_volume_ml unmix
sphere_reduced_scattering_per_cm phantom_recipe""".split()


@pytest.mark.parametrize("name", STABLE_NAMES)
def test_stable_name_at_the_top_level(name):
    assert name in probeplan.__all__ and name in dir(probeplan)
    assert callable(getattr(probeplan, name))


def test_top_level_names_give_published_values():
    # a preset name works at the top level (Jacques 2013 Table 2: skin mu_s'(800 nm) = 23.59 /cm)
    assert float(probeplan.optical_properties("skin", 800.0)[1]) == pytest.approx(23.59, abs=0.01)
    assert float(probeplan.molar_extinction("HbO2", 800.0)) == 816.0  # Prahl's compilation
    assert float(probeplan.mu_eff(0.1, 10.0)) == pytest.approx(1.7407, abs=1e-4)  # sqrt(3 mu_a (mu_a + mu_s'))
    assert float(probeplan.diameter_nm("CdSe", 550.0)) == pytest.approx(3.04, abs=0.01)  # Yu et al. 2003
    assert float(probeplan.skin_mpe_mw_per_cm2(808.0, 100.0)) == pytest.approx(328.9, abs=0.1)  # ANSI Z136.1
    assert float(probeplan.max_injection_volume_ml("mouse", "iv", 25.0)) == pytest.approx(0.125)  # Diehl 2001
