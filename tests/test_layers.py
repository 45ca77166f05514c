"""Layered tissue (skin / subcutaneous fat / target tissue) against the package's layered Monte Carlo.

Reference: probeplan.model.montecarlo with several Layer objects (weighted packets, checked against
iadpython for layered slabs in tests/test_montecarlo.py), run live here with fixed seeds.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from probeplan.errors import InputError
from probeplan.model import transport as tr
from probeplan.model.fluorescence import optical_properties
from probeplan.model.layers import (
    Layer,
    LayeredTissue,
    effective_coefficients,
    layered_coefficients_and_factor,
    planar_escape_diffusion,
)
from probeplan.model.montecarlo import Layer as McLayer
from probeplan.model.montecarlo import simulate_point_source, simulate_slab
from probeplan.model.tissue import tissue_preset

G, N = 0.9, 1.4


def _coefficients(wl, names):
    return [optical_properties(tissue_preset(t), np.array([wl])) for t in names]


def test_one_tissue_in_layers_is_the_homogeneous_dipole():
    # Transfer matrices through any split of one tissue equal Farrell et al. (1992)'s closed form.
    c = [(np.array([0.1, 1.0, 30.0]), np.array([10.0, 5.0, 8.0]))]
    d = np.array([0.0, 0.5, 2.0, 10.0])
    a = float(tr.boundary_factor(N))
    expected = tr.point_source_escape(d[:, None], c[0][0], c[0][1], N, model="diffusion")
    np.testing.assert_allclose(planar_escape_diffusion(c, [], d, a), expected, rtol=1e-10)
    np.testing.assert_allclose(planar_escape_diffusion(c * 3, [0.7, 1.9], d, a), expected, rtol=1e-10)


def test_effective_coefficients_keep_the_attenuation_exponent():
    c = [(np.array([0.02]), np.array([24.0])), (np.array([0.3]), np.array([3.0]))]
    mua, musp = effective_coefficients(c, [1.0], [4.0])
    mueff = [math.sqrt(3 * a[0] * (a[0] + s[0])) for a, s in c]
    assert float(np.sqrt(3 * mua * (mua + musp))[0, 0]) == pytest.approx((1.0 * mueff[0] + 3.0 * mueff[1]) / 4.0, rel=1e-12)
    assert float(musp[0, 0]) == pytest.approx((24.0 + 9.0) / 4.0, rel=1e-12)


@pytest.mark.parametrize("depth", [1.0, 3.0, 6.0])
def test_layered_escape_against_layered_monte_carlo(depth):
    # skin 0.5 mm / subcutaneous fat 1.5 mm / mouse muscle at 800 nm: point source at depth in the muscle
    # (or the fat), live Monte Carlo, 20 000 packets.  Within 5 % + 3 sigma; ignoring the layers is not.
    names = ("skin", "subcutaneous fat", "mouse muscle")
    c = _coefficients(800.0, names)
    stack = [McLayer(t, float(a[0]), float(s[0]) / (1 - G), G, N) for t, (a, s) in zip((0.5, 1.5, math.inf), c,
                                                                                         strict=True)]
    res = simulate_point_source(stack, depth, 20_000, seed=41, rho_bins_mm=[], engine="numba")
    mua, musp, factor = layered_coefficients_and_factor(c, [0.5, 2.0], np.array([depth]), N)
    model = float(factor[0, 0] * tr.point_source_escape(depth, mua[0, 0], musp[0, 0], N, g=G))
    assert model / res.escape - 1 == pytest.approx(0.0, abs=0.05 + 3 * res.escape_std / res.escape)
    base_only = float(tr.point_source_escape(depth, c[2][0][0], c[2][1][0], N, g=G))
    assert abs(base_only / res.escape - 1) > 0.1


def test_layered_broad_beam_against_layered_monte_carlo():
    names = ("skin", "subcutaneous fat", "soft tissue")
    c = _coefficients(808.0, names)
    stack = [McLayer(t, float(a[0]), float(s[0]) / (1 - G), G, N) for t, (a, s) in zip((1.0, 0.5, math.inf), c,
                                                                                         strict=True)]
    edges = np.array([2.95, 3.05, 5.95, 6.05])
    res = simulate_slab(stack, 20_000, seed=42, depth_bins_mm=edges, rho_bins_mm=[], engine="numba")
    for b, d in ((0, 3.0), (2, 6.0)):
        mua, musp, factor = layered_coefficients_and_factor(c, [1.0, 1.5], np.array([d]), N)
        model = float(factor[0, 0] * tr.broad_beam_fluence(d, mua[0, 0], musp[0, 0], N, g=G))
        mc, se = float(res.fluence[b]), float(res.fluence_std[b])
        assert model / mc - 1 == pytest.approx(0.0, abs=0.05 + 3 * se / mc)


def test_layered_tissue_in_the_depth_model():
    from probeplan.model import dots, optics
    from probeplan.model.fluorescence import depth_profile

    kw = dict(source=optics.Laser(640.0), irradiance_mw_per_cm2=10.0, emission_filter=optics.parse_filter("700/30"),
              camera=optics.camera("si-deep-depletion"), lens=optics.Lens(2.0, 0.1), exposure_s=0.1,
              depth_mm=[1.0, 3.0, 5.0], warn=False)
    probe = dots.make_probe("CdTe", 700.0)
    muscle = tissue_preset("mouse muscle")
    plain = depth_profile(muscle, probe, **kw)
    # a "layer" of the same tissue changes nothing
    same = depth_profile(LayeredTissue((Layer(muscle, 1.0),), muscle), probe, **kw)
    np.testing.assert_allclose(same.signal_e, plain.signal_e, rtol=1e-9)
    covered = depth_profile(LayeredTissue((Layer(tissue_preset("skin"), 0.5),
                                           Layer(tissue_preset("subcutaneous fat"), 1.0)), muscle), probe, **kw)
    assert covered.transport_model == "mc_table" and not np.allclose(covered.signal_e, plain.signal_e)
    assert LayeredTissue((Layer(tissue_preset("skin"), 0.5),), muscle).name == "skin 0.5 mm / mouse muscle"


def test_layer_input_errors():
    with pytest.raises(InputError, match=r"thickness_mm: got -1\.0"):
        Layer(tissue_preset("skin"), -1.0)
    with pytest.raises(TypeError, match="layers\\[0\\]: expected a Layer"):
        LayeredTissue(("skin",), tissue_preset("skin"))


def test_plan_takes_layers_and_old_plans_stay_valid():
    from pathlib import Path

    from probeplan.study.evaluate import plan_model
    from probeplan.study.plan import parse_plan_text

    text = (Path(__file__).resolve().parents[1] / "demo_tissue" / "plan.toml").read_text()
    old = parse_plan_text(text)
    assert old.tissue == {"transport_model": "auto", "layers": []}
    layered = parse_plan_text(text + '\n[tissue]\ntransport_model = "diffusion"\n[[tissue.layers]]\ntissue = "skin"\n'
                              'thickness_mm = 0.5\n[[tissue.layers]]\ntissue = "subcutaneous fat"\nthickness_mm = 1\n')
    model = plan_model(layered)
    assert isinstance(model.tissue, LayeredTissue)
    assert [layer.thickness_mm for layer in model.tissue.layers] == [0.5, 1.0]
    with pytest.raises(InputError, match=r"tissue\.layers\[0\]\.thickness_mm: got -1"):
        parse_plan_text(text + '\n[[tissue.layers]]\ntissue = "skin"\nthickness_mm = -1\n')
    with pytest.raises(InputError, match=r"tissue\.layers\[0\]\.tissue"):
        plan_model(parse_plan_text(text + '\n[[tissue.layers]]\ntissue = "skn"\nthickness_mm = 1\n'))
