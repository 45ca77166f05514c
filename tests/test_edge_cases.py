"""Numerical edge cases: degenerate pixels, degenerate reference matrices, and NaN/inf/negative model inputs.

The unmixing checks compare against exact solutions worked by hand or with numpy's dense
solvers (``numpy.linalg.solve``, ``numpy.linalg.cond``: general-purpose reference library).
The sweep at the end calls every public numeric model function with one argument made NaN,
infinite or negative and requires a refusal (InputError or TypeError), never a silent NaN
result or another exception.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest

from probeplan.model import channels as ch
from probeplan.model import dots, optics
from probeplan.model import fluorescence as fl
from probeplan.model import tissue as ti
from probeplan.model import transport as tr
from probeplan.study import animals as an
from probeplan.study import safety as sf
from probeplan.errors import InputError, ModelValidityWarning, ProbeplanWarning
from probeplan.unmixing import references as refs
from probeplan.unmixing.nnls import STATUS_NAN
from probeplan.unmixing.pipeline import CONDITION_WARN, check_references, unmix, unmix_stack

SKIN = ti.tissue_preset("skin")

# Three Gaussian-like emission bands sampled by four channels (invented, common practice, no source).
M4x3 = np.array([[0.70, 0.10, 0.02], [0.25, 0.60, 0.08], [0.04, 0.25, 0.50], [0.01, 0.05, 0.40]])


# --------------------------------------------------------------------------- degenerate pixels

@pytest.mark.parametrize("method", ["nnls", "ls", "wls"])
def test_all_zero_pixels_give_zero_abundance_and_finite_errors(method):
    r = unmix_stack(np.zeros((4, 5, 6), np.float32), M4x3, method=method)
    assert r.abundances.shape == (3, 5, 6)
    np.testing.assert_array_equal(r.abundances, 0.0)
    # the variance floor (1 count) keeps the standard errors finite and positive where the signal is zero
    assert np.isfinite(r.standard_error).all() and (r.standard_error > 0).all()
    np.testing.assert_array_equal(r.residual_rms, 0.0)
    assert r.qc["n_invalid"] == 0 and r.qc["n_saturated"] == 0


def test_saturated_pixels_are_nan_and_counted_others_untouched():
    truth = np.array([100.0, 50.0, 20.0])
    stack = np.empty((4, 3, 3), np.uint16)
    stack[:] = np.round(M4x3 @ truth)[:, None, None].astype(np.uint16)
    stack[1, 0, 0] = 65535  # one channel at full scale of uint16
    stack[:, 2, 2] = 65535  # every channel at full scale
    r = unmix_stack(stack, M4x3)
    assert np.isnan(r.abundances[:, 0, 0]).all() and np.isnan(r.abundances[:, 2, 2]).all()
    assert r.qc["n_saturated"] == 2
    ok = np.ones((3, 3), bool)
    ok[0, 0] = ok[2, 2] = False
    # the other pixels: exact least-squares solution of the rounded data (numpy.linalg.lstsq as reference)
    expected = np.linalg.lstsq(M4x3, stack[:, 1, 1].astype(float), rcond=None)[0]
    np.testing.assert_allclose(r.abundances[:, ok].T, np.tile(expected, (ok.sum(), 1)), rtol=1e-9, atol=1e-9)
    # an explicit, lower full scale moves the limit
    r2 = unmix_stack(stack, M4x3, saturation=float(stack[:, 1, 1].max()))
    assert np.isnan(r2.abundances).all()


@pytest.mark.parametrize("bad", [math.nan, -1.0, 0.0])
def test_nonsense_saturation_is_refused(bad):
    with pytest.raises(InputError, match="saturation"):
        unmix(np.ones((4, 2, 2)), M4x3, saturation=bad)


@pytest.mark.parametrize(("kw", "match"), [
    ({"gain_e_per_count": math.inf}, "gain_e_per_count"), ({"gain_e_per_count": 0.0}, "gain_e_per_count"),
    ({"read_noise_e": math.nan}, "read_noise_e"), ({"read_noise_e": -2.0}, "read_noise_e"),
    ({"read_noise_e": math.inf}, "read_noise_e"), ({"variance_floor_counts": math.nan}, "variance_floor_counts"),
])
def test_nonsense_noise_model_is_refused(kw, match):
    with pytest.raises(InputError, match=match):
        unmix_stack(np.ones((4, 2, 2)), M4x3, **kw)


def test_single_channel_single_component_is_a_division():
    stack = np.array([[[2.0, 4.0], [0.0, 8.0]]])
    a = unmix(stack, [[2.0]], method="ls")
    np.testing.assert_allclose(a, stack / 2.0)
    np.testing.assert_allclose(unmix(stack, [[2.0]]), stack / 2.0)


def test_single_channel_two_components_is_refused():
    with pytest.raises(InputError, match=r"2 components .* but only 1 channels"):
        unmix(np.ones((1, 3, 3)), [[1.0, 0.5]])


def test_more_probes_than_channels_refused_with_the_reason():
    with pytest.raises(InputError, match=r"4 components .* but only 3 channels.*add channels"):
        unmix(np.ones((3, 2, 2)), np.abs(np.random.default_rng(0).random((3, 4))) + 0.1)


@pytest.mark.parametrize("method", ["nnls", "ls", "wls"])
def test_square_case_recovers_the_exact_solution(method):
    M = M4x3[:3]  # C = K = 3, invertible
    rng = np.random.default_rng(3)
    truth = rng.uniform(1.0, 100.0, (3, 4, 4))
    stack = np.einsum("ck,kyx->cyx", M, truth)
    a = unmix(stack, M, method=method)
    # reference: numpy.linalg.solve of the same square system
    ref = np.linalg.solve(M, stack.reshape(3, -1)).reshape(truth.shape)
    np.testing.assert_allclose(a, ref, rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(a, truth, rtol=1e-8)


def test_nearly_collinear_references_warn_with_the_condition_number():
    M = np.array([[1.0, 1.0], [1.0, 1.0 + 1e-4], [1.0, 1.0]])
    Mn = M / np.linalg.norm(M, axis=0)
    expected = np.linalg.cond(Mn)  # numpy as the reference for the 2-norm condition number
    assert expected > CONDITION_WARN
    with pytest.warns(ModelValidityWarning, match=r"condition number (\S+) >") as rec:
        cond = check_references(M)
    assert cond == pytest.approx(expected, rel=1e-6)
    assert f"{expected:.3g}" in str(rec[0].message)


def test_exactly_collinear_references_refused_naming_the_components():
    with pytest.raises(InputError, match=r"\['a', 'b'\] are collinear"):
        check_references([[1.0, 2.0], [2.0, 4.0], [0.5, 1.0]], ["a", "b"])


@pytest.mark.parametrize("bad", [math.nan, math.inf, -1.0])
def test_bad_reference_entries_refused(bad):
    M = M4x3.copy()
    M[2, 1] = bad
    with pytest.raises(InputError):
        unmix(np.ones((4, 2, 2)), M)


def test_nan_pixels_are_nan_in_the_output_and_counted():
    stack = np.ones((4, 2, 2))
    stack[2, 1, 0] = np.nan
    r = unmix_stack(stack, M4x3)
    assert np.isnan(r.abundances[:, 1, 0]).all() and np.isfinite(r.abundances[:, 0, 0]).all()
    assert r.qc["n_invalid"] == 1


@pytest.mark.parametrize("method", ["nnls", "ls", "wls"])
@pytest.mark.parametrize("engine", ["numba", "numpy"])
def test_infinite_pixels_are_invalid_not_constrained(method, engine):
    """+inf and -inf in a float stack are masked and counted as invalid, like NaN (never "constrained")."""
    rng = np.random.default_rng(3)
    stack = rng.poisson(50.0, (4, 6, 7)).astype(np.float32)
    stack[0, 1, 1], stack[3, 2, 5], stack[1, 4, 0], stack[2, 5, 6] = np.inf, -np.inf, np.nan, np.inf
    bad = np.zeros((6, 7), bool)
    bad[1, 1] = bad[2, 5] = bad[4, 0] = bad[5, 6] = True
    r = unmix_stack(stack, M4x3, method=method, engine=engine, saturation=np.inf if method != "wls" else None)
    assert r.qc["n_invalid"] == 4 and (r.status[bad] == STATUS_NAN).all()
    assert np.isnan(r.abundances[:, bad]).all() and np.isnan(r.standard_error[:, bad]).all()
    assert np.isfinite(r.abundances[:, ~bad]).all() and np.isfinite(r.residual_rms[~bad]).all()
    # the valid pixels are solved exactly as without the bad ones (numpy.linalg.lstsq for ls)
    clean = unmix_stack(np.where(np.isfinite(stack), stack, 0.0), M4x3, method=method, engine=engine)
    np.testing.assert_allclose(r.abundances[:, ~bad], clean.abundances[:, ~bad], rtol=1e-6)
    if method == "ls":
        want = np.linalg.lstsq(M4x3, stack.reshape(4, -1)[:, ~bad.ravel()].astype(np.float64), rcond=None)[0]
        np.testing.assert_allclose(r.abundances[:, ~bad], want, rtol=1e-5, atol=1e-4)


def test_infinite_pixels_in_a_file_reported_in_the_table_and_strict_qc_json(tmp_path, capsys):
    import json

    import tifffile

    from probeplan.cli.main import main

    stack = np.full((4, 8, 8), 100.0, np.float32)
    stack[1, 0, :] = np.inf  # 8 pixels
    stack[2, 7, :3] = -np.inf  # 3 pixels
    stack[:, 3, 3] = np.inf  # 1 pixel, every channel
    tifffile.imwrite(tmp_path / "s.tif", stack, photometric="minisblack")
    (tmp_path / "r.csv").write_text("channel,a,b,c\n" + "".join(
        f"ch{c},{','.join(str(v) for v in M4x3[c])}\n" for c in range(4)))
    assert main(["unmix", str(tmp_path / "s.tif"), "--references", str(tmp_path / "r.csv"), "--channel-axis", "0",
                 "--out", str(tmp_path / "a.ome.tif"), "--json"]) == 0
    row = json.loads(capsys.readouterr().out)["stacks"][0]
    assert row["invalid"] == 12
    qc = json.loads((tmp_path / "a_qc.json").read_text(), parse_constant=lambda c: pytest.fail(f"{c} in QC JSON"))
    assert qc["n_invalid"] == 12 and qc["n_pixels"] == 64 and qc["n_constrained"] + 12 <= 64
    assert np.isfinite(qc["residual_rms"]["max"])

    # every pixel invalid: the statistics have no value; null in strict JSON, with a note naming them
    tifffile.imwrite(tmp_path / "all.tif", np.full((4, 4, 4), np.inf, np.float32), photometric="minisblack")
    assert main(["unmix", str(tmp_path / "all.tif"), "--references", str(tmp_path / "r.csv"), "--channel-axis", "0",
                 "--out", str(tmp_path / "all.ome.tif")]) == 0
    qc = json.loads((tmp_path / "all_qc.json").read_text(), parse_constant=lambda c: pytest.fail(f"{c} in QC JSON"))
    assert qc["n_invalid"] == 16 and qc["residual_rms"]["rms"] is None
    assert "residual_rms.rms: NaN" in qc["null_values"]


# --------------------------------------------------------------------------- model inputs sweep

def _model_cases():
    probe = dots.make_probe("CdTe", 700.0)
    probes = [probe, dots.make_probe("CdTeSe", 780.0, extinction_at_excitation_per_M_cm=1e6)]
    src, cam, lens = optics.Laser(640.0, 1.0), optics.camera("si-deep-depletion"), optics.Lens(2.0, 0.1)
    filt = optics.parse_filter("700/30")
    chans = [optics.Channel("a", src, optics.parse_filter("700/30"), cam, lens, 0.1),
             optics.Channel("b", src, optics.parse_filter("780/40"), cam, lens, 0.1)]
    response, noise_var = np.array([[1.0, 0.2], [0.1, 1.0]]), np.array([1.0, 2.0])
    optics_kw = dict(source=src, irradiance_mw_per_cm2=10.0, emission_filter=filt, camera=cam, lens=lens)
    return [
        (tr.mu_eff, (0.1, 10.0), {}), (tr.diffusion_coefficient_cm, (0.1, 10.0), {}),
        (tr.effective_reflection, (1.4,), {}), (tr.boundary_factor, (1.4,), {}),
        (tr.extrapolated_boundary_cm, (0.1, 10.0, 1.4), {}), (tr.diffuse_reflectance, (0.1, 10.0, 1.4), {}),
        (tr.spatially_resolved_reflectance_per_mm2, (1.0, 0.1, 10.0, 1.4), {}),
        (tr.broad_beam_fluence, (1.0, 0.1, 10.0, 1.4), {}),
        (tr.point_source_exitance_per_mm2, (1.0, 2.0, 0.1, 10.0, 1.4), {}),
        (tr.point_source_escape, (2.0, 0.1, 10.0, 1.4), {}), (tr.point_source_blur_fwhm_mm, (2.0, 0.1, 10.0, 1.4), {}),
        (tr.uniform_layer_escape_mm, (0.1, 10.0, 1.4), {"top_mm": 0.0, "bottom_mm": 5.0}),
        (tr.diffusion_validity, (2.0, 0.1, 10.0), {"warn": False}),
        (ti.optical_properties, (SKIN, 700.0), {}), (ti.molar_extinction, ("HbO2", 700.0), {}),
        (ti.absorption, ("water", 700.0), {}),
        (fl.disc_escape_fraction, (1.0, 2.0, 0.1, 10.0, 1.4), {}), (fl.photons_per_s_per_mw, (700.0,), {}),
        (fl.depth_profile, (SKIN, probe), dict(optics_kw, exposure_s=0.1, depth_mm=[1.0, 2.0], target_size_mm=2.0,
                                                 concentration_uM=1.0, uptake_ratio=5.0)),
        (fl.probe_rate_e_per_s, (SKIN, probe), dict(optics_kw, depth_mm=2.0, target_size_mm=2.0, concentration_uM=1.0)),
        (fl.background_rates, (SKIN, probes), dict(optics_kw, background_concentration_uM=[0.1, 0.1])),
        (ch.channel_report, (SKIN, probes, chans), dict(irradiance_mw_per_cm2=10.0, depth_mm=[2.0], target_size_mm=2.0,
                                                          concentration_uM=1.0, uptake_ratio=5.0)),
        (ch.response_matrix, (SKIN, probes, chans), dict(irradiance_mw_per_cm2=10.0, depth_mm=2.0, target_size_mm=2.0)),
        (refs.reference_spectra, (SKIN, probes, chans), dict(irradiance_mw_per_cm2=10.0, depth_mm=2.0,
                                                             target_size_mm=2.0, gain_e_per_count=1.0)),
        (ch.crosstalk, (response,), {}), (ch.condition_number, (response,), {}),
        (ch.noise_amplification, (response, noise_var), {}), (ch.unmixed_snr, (response, noise_var, 1.0), {}),
        (dots.concentration_uM, ("CdSe", 550.0, 0.1, 1.0), {}), (dots.diameter_nm, ("CdSe", 550.0), {}),
        (dots.dose_nmol_per_kg, (100.0, 20.0, 10.0), {}), (dots.dose_volume_ul, (8.0, 20.0, 10.0), {}),
        (dots.emission_peak_from_exciton_nm, ("CdSe", 550.0), {}), (dots.emission_spectrum_per_nm, (700.0, 700.0, 30.0), {}),
        (dots.exciton_peak_from_emission_nm, ("CdSe", 570.0), {}), (dots.exciton_peak_nm, ("CdSe", 3.0), {}),
        (dots.extinction_coefficient, ("CdSe", 3.0), {}), (dots.molar_extinction_at, ("CdSe", 3.0, 500.0), {}),
        (dots.make_probe, ("CdTe", 700.0), {"quantum_yield": 0.5}),
        (sf.correction_factor_ca, (800.0,), {}), (sf.skin_mpe_j_per_cm2, (800.0, 10.0), {}),
        (sf.skin_mpe_mw_per_cm2, (800.0, 10.0), {}), (sf.allowed_irradiance_mw_per_cm2, (800.0, 10.0), {}),
        (sf.max_exposure_time_s, (800.0, 100.0), {}), (sf.irradiance_mw_per_cm2, (100.0, 10.0), {}),
        (sf.aperture_averaged_irradiance_mw_per_cm2, (100.0, 10.0), {}),
        (sf.session_exposure_check, (800.0, 100.0, [10.0, 10.0]), {}),
        (sf.max_injection_volume_ml, ("mouse", "iv", 25.0), {}), (sf.max_blood_sample_ml, ("mouse", 25.0), {}),
        (an.power_two_sample, (8, 1.0, 1.0), {}), (an.animals_per_group, (1.0, 1.0), {}),
        (an.with_attrition, (8, 0.1), {}), (an.total_animals, (8, 2), {}),
    ]


#: (function, argument, value) combinations that are valid by the model's meaning, with the reason.
_VALID = {
    ("uniform_layer_escape_mm", "bottom_mm", math.inf): "a semi-infinite layer",
    ("disc_escape_fraction", "arg0", math.inf): "a disc covering the whole surface (total escape)",
    ("power_two_sample", "arg1", -1.0): "a two-sided test: the sign of the difference does not matter",
    ("animals_per_group", "arg0", -1.0): "a two-sided test: the sign of the difference does not matter",
}


def _is_numeric(value) -> bool:
    if isinstance(value, bool):
        return False
    if isinstance(value, (int, float, np.ndarray)):
        return True
    return isinstance(value, list) and all(isinstance(v, (int, float)) for v in value)


def _poisoned(value, bad):
    if isinstance(value, np.ndarray):
        out = value.astype(float).copy()
        out.flat[0] = bad
        return out
    if isinstance(value, list):
        return [bad, *value[1:]]
    return bad


def _sweep():
    cases = []
    for func, args, kwargs in _model_cases():
        slots = [(f"arg{i}", i) for i, a in enumerate(args) if _is_numeric(a)]
        slots += [(k, k) for k, a in kwargs.items() if _is_numeric(a)]
        for name, slot in slots:
            for bad in (math.nan, math.inf, -1.0):
                cases.append(pytest.param(func, args, kwargs, slot, bad,
                                          id=f"{func.__module__.split('.')[-1]}.{func.__name__}-{name}-{bad}"))
    return cases


def _floats(result):
    if isinstance(result, (float, int, np.ndarray, np.generic)) and not isinstance(result, bool):
        arr = np.asarray(result)
        return [arr.astype(float)] if arr.dtype.kind in "fiu" else []
    if isinstance(result, (tuple, list)):
        return [x for r in result for x in _floats(r)]
    if isinstance(result, dict):
        return [x for r in result.values() for x in _floats(r)]
    if hasattr(result, "__dataclass_fields__"):
        return [x for k in result.__dataclass_fields__ for x in _floats(getattr(result, k))]
    return []


def test_sweep_valid_calls_succeed_with_finite_results():
    """The baseline calls of the sweep are valid: a refusal below is caused by the poisoned argument."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ProbeplanWarning)
        for func, args, kwargs in _model_cases():
            result = func(*args, **kwargs)
            assert all(np.isfinite(x).all() for x in _floats(result) if x.size), func.__name__


@pytest.mark.parametrize(("func", "args", "kwargs", "slot", "bad"), _sweep())
def test_nan_inf_negative_inputs_are_refused(func, args, kwargs, slot, bad):
    args, kwargs = list(args), dict(kwargs)
    name = f"arg{slot}" if isinstance(slot, int) else slot
    if isinstance(slot, int):
        args[slot] = _poisoned(args[slot], bad)
    else:
        kwargs[slot] = _poisoned(kwargs[slot], bad)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ProbeplanWarning)
        if (func.__name__, name, bad) in _VALID:
            result = func(*args, **kwargs)
            assert all(not np.isnan(x).any() for x in _floats(result)), "a valid input gave a NaN result"
            return
        try:
            result = func(*args, **kwargs)
        except (InputError, TypeError):
            return
    pytest.fail(f"{func.__name__}({name}={bad}) was accepted and returned {result!r:.200}")
