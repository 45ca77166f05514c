"""The stable top-level interface exists, every module declares its public names, and they resolve."""

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


#: The stable top-level interface: every name a notebook may rely on with its documented signature.
STABLE_NAMES = [
    "optical_properties", "molar_extinction", "absorption", "mu_eff", "diffuse_reflectance", "point_source_escape",
    "point_source_exitance_per_mm2", "point_source_blur_fwhm_mm", "broad_beam_fluence", "diameter_nm",
    "exciton_peak_nm", "extinction_coefficient", "concentration_uM", "skin_mpe_mw_per_cm2",
    "max_injection_volume_ml", "unmix", "sphere_reduced_scattering_per_cm", "phantom_recipe",
]


@pytest.mark.parametrize("name", STABLE_NAMES)
def test_every_stable_name_is_at_the_top_level_and_callable(name):
    assert name in probeplan.__all__ and name in dir(probeplan)
    assert callable(getattr(probeplan, name))


def test_every_top_level_name_resolves():
    for name in probeplan.__all__:
        assert getattr(probeplan, name) is not None, name
    with pytest.raises(AttributeError):
        probeplan.no_such_function  # noqa: B018


def test_import_probeplan_stays_light():
    # the public API is imported on first use: a bare import loads neither numpy nor pandas
    import subprocess
    import sys

    code = "import sys, probeplan; print(sorted(m for m in ('numpy', 'pandas', 'scipy') if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


def test_stable_interfaces_behave_as_stated():
    # the stable signatures, with a value each; the sources are cited in the modules' own tests.
    p = probeplan
    mu_a, mu_sp = p.optical_properties("skin", 800.0)  # a preset name works at the top level
    assert float(mu_sp) == pytest.approx(23.59, abs=0.01)  # Jacques 2013 Table 2
    assert p.optical_properties(p.tissue("skin"), 800.0)[1] == mu_sp  # and so does the object
    assert float(p.molar_extinction("HbO2", 800.0)) == 816.0  # Prahl
    assert float(p.absorption("water", 800.0)) == pytest.approx(0.01964)  # Segelstein
    assert float(p.mu_eff(0.1, 10.0)) == pytest.approx(1.7407, abs=1e-4)  # sqrt(3 mu_a (mu_a + mu_s')), by hand
    assert float(p.diffuse_reflectance(0.1, 10.0, n=1.4)) == pytest.approx(0.6141, abs=1e-4)  # Farrell 1992
    assert float(p.diameter_nm("CdSe", 550.0)) == pytest.approx(3.04, abs=0.01)  # Yu 2003
    assert float(p.exciton_peak_nm("CdSe", float(p.diameter_nm("CdSe", 550.0)))) == pytest.approx(550.0)
    assert float(p.extinction_coefficient("CdSe", 3.04)) == pytest.approx(1.115e5, rel=0.01)  # Yu 2003
    assert float(p.concentration_uM("CdSe", 550.0, 0.1, path_cm=1.0)) > 0
    assert float(p.skin_mpe_mw_per_cm2(808.0, 100.0)) == pytest.approx(328.9, abs=0.1)  # ANSI Z136.1 / IEC 60825-1
    assert float(p.max_injection_volume_ml("mouse", "iv", 25.0)) == pytest.approx(0.125)  # Diehl 2001
    for f in (p.point_source_escape, p.point_source_blur_fwhm_mm, p.broad_beam_fluence):
        assert np.isfinite(float(f(2.0, 0.1, 10.0, 1.4)))
    assert np.isfinite(float(p.point_source_exitance_per_mm2(1.0, 2.0, 0.1, 10.0, 1.4)))
    m = np.array([[1.0, 0.0], [0.5, 0.5], [0.0, 1.0]])
    a = p.unmix(np.einsum("ck,kyx->cyx", m, np.ones((2, 2, 2))), m, method="nnls", channel_axis=0)
    np.testing.assert_allclose(a, 1.0)


def test_stable_signatures():
    from probeplan.model import transport
    from probeplan.study import safety
    from probeplan.unmixing import pipeline as unmix

    assert list(inspect.signature(transport.diffuse_reflectance).parameters)[:3] == [
        "mu_a_per_cm", "mu_s_prime_per_cm", "n"]
    params = inspect.signature(unmix.unmix).parameters
    assert params["method"].default == "nnls" and params["channel_axis"].default == 0
    assert list(inspect.signature(safety.max_injection_volume_ml).parameters) == [
        "species", "route", "body_mass_g", "rules"]


@pytest.mark.parametrize(
    ("name", "leading"),
    [
        ("optical_properties", ["tissue", "wavelength_nm"]),
        ("molar_extinction", ["chromophore", "wavelength_nm"]),
        ("absorption", ["chromophore", "wavelength_nm"]),
        ("mu_eff", ["mu_a_per_cm", "mu_s_prime_per_cm"]),
        ("diffuse_reflectance", ["mu_a_per_cm", "mu_s_prime_per_cm", "n"]),
        ("point_source_escape", ["depth_mm", "mu_a_per_cm", "mu_s_prime_per_cm", "n"]),
        ("point_source_exitance_per_mm2", ["rho_mm", "depth_mm", "mu_a_per_cm", "mu_s_prime_per_cm", "n"]),
        ("point_source_blur_fwhm_mm", ["depth_mm", "mu_a_per_cm", "mu_s_prime_per_cm", "n"]),
        ("broad_beam_fluence", ["depth_mm", "mu_a_per_cm", "mu_s_prime_per_cm", "n"]),
        ("diameter_nm", ["material", "exciton_peak_nm"]),
        ("exciton_peak_nm", ["material", "diameter_nm"]),
        ("extinction_coefficient", ["material", "diameter_nm"]),
        ("concentration_uM", ["material", "exciton_peak_nm", "absorbance", "path_cm"]),
        ("skin_mpe_mw_per_cm2", ["wavelength_nm", "exposure_s"]),
        ("max_injection_volume_ml", ["species", "route", "body_mass_g", "rules"]),
        ("unmix", ["stack", "references"]),
    ],
)
def test_top_level_positional_order(name, leading):
    params = [p.name for p in inspect.signature(getattr(probeplan, name)).parameters.values()
              if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)]
    assert params[: len(leading)] == leading


def test_warnings_point_at_the_callers_line():
    # however deep inside the package a warning starts, it is attributed to the calling code (this file)
    from probeplan.errors import ProbeplanWarning

    with pytest.warns(ProbeplanWarning) as caught:
        probeplan.optical_properties("mouse muscle", 1300.0)  # beyond the measured scattering range
    assert caught[0].filename == __file__
    with pytest.warns(ProbeplanWarning) as caught:
        probeplan.concentration_uM("CdSe", 550.0, 2.5)  # absorbance above the linear range
    assert {w.filename for w in caught} == {__file__}
