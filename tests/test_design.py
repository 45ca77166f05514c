"""Tests of probeplan.design.search: exactness of the pruned search, agreement with the channel model, limits.

Outside references used here:

* the unmixed SNR c/√[(MᵀΣ⁻¹M)⁻¹]ₖₖ of weighted least squares (Neher & Neher, J. Microsc. 213, 46
  (2004), doi:10.1111/j.1365-2818.2004.01262.x), computed independently with numpy's general
  matrix inverse for the brute-force checks;
* the camera SNR S/√(S + B + σr²) in electrons (docs/sources.md "Camera noise"; EMVA 1288) for the
  channel without crosstalk;
* exhaustive enumeration (itertools) as the definition of the optimum.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from probeplan.design.search import (
    camera_for_filter,
    design,
    exhaustive_search,
    filter_grid,
    probe_series,
)
from probeplan.errors import AssumptionWarning, InputError
from probeplan.model import channels, dots, optics
from probeplan.model.tissue import tissue_preset

LENS = optics.Lens(2.0, 0.1)
SI = optics.camera("si-deep-depletion")
LASER_532 = optics.Laser(532.0, 1.0)
COMMON = dict(lens=LENS, depth_mm=2.0, exposure_s=0.1, concentration_uM=0.1)


def _brute_force(resp, back, upt, read, *, k, n_ch, t, c, top):
    """Every combination evaluated with numpy's matrix inverse (no pruning, no shared code)."""
    n_src, n_probe, n_filt = resp.shape
    rows = []
    for s in range(n_src):
        for pset in itertools.combinations(range(n_probe), k):
            for fset in itertools.combinations(range(n_filt), n_ch):
                m = resp[s][np.ix_(pset, fset)].T
                var = (m.sum(axis=1) * c + back[s, list(fset)] + upt[s][np.ix_(pset, fset)].sum(axis=0)) / t \
                    + read[list(fset)] ** 2 / t**2
                fisher = m.T @ (m / var[:, None])
                try:
                    diag = np.diag(np.linalg.inv(fisher))
                    worst = float(np.min(c / np.sqrt(diag))) if np.all(diag > 0) else 0.0
                except np.linalg.LinAlgError:
                    worst = 0.0
                if not math.isfinite(worst):
                    worst = 0.0
                rows.append((-worst, s, pset, fset))
    rows.sort()
    return rows[:top], rows


@pytest.fixture(scope="module")
def small():
    """6 CdTe probes × 8 filters under a 532 nm laser (far from every probe's band edge)."""
    probes = [dots.make_probe("CdTe", p) for p in (650, 665, 680, 695, 710, 725)]
    filters = [optics.parse_filter(f) for f in ("650/20", "670/20", "690/20", "710/20", "730/20", "750/40",
                                                  "700/40", "LP 760")]
    res = design("soft tissue", probes, filters, sources=LASER_532, camera=SI, k=3, top=5, **COMMON)
    return probes, filters, res


def test_pruned_search_equals_brute_force_on_the_forward_model(small):
    _, _, res = small
    top, _ = _brute_force(res.response_e_per_s_per_uM, res.background_e_per_s, res.uptake_e_per_s, res.read_noise_e,
                          k=3, n_ch=3, t=0.1, c=0.1, top=5)
    got = [(c.probes, c.filters) for c in res.candidates]
    want = [(tuple(res.probe_names[i] for i in p), tuple(res.filter_names[i] for i in f)) for _, _, p, f in top]
    assert got == want
    np.testing.assert_allclose([c.worst_snr for c in res.candidates], [-v for v, *_ in top], rtol=1e-9)
    assert res.total_combinations == math.comb(6, 3) * math.comb(8, 3)
    assert 0 < res.evaluated < res.total_combinations  # the bound did prune
    assert res.pruned == res.total_combinations - res.evaluated


@pytest.mark.parametrize("k, n_ch, n_src", [(1, 1, 1), (2, 2, 2), (3, 3, 1), (2, 3, 1), (3, 4, 2), (4, 4, 1)])
@pytest.mark.parametrize("seed", [0, 1, 2, 3, 4, 5])
def test_exhaustive_search_equals_brute_force_on_random_tables(k, n_ch, n_src, seed):
    # random crosstalk-heavy tables with a duplicated probe (singular pairs) and a dark probe
    rng = np.random.default_rng(seed)
    n_probe, n_filt = 8, 8
    resp = rng.gamma(1.0, 100.0, (n_src, n_probe, n_filt))
    resp[:, 1] = resp[:, 0]  # identical probes 0 and 1
    resp[:, 2] = 0.0  # a probe the source does not excite
    upt = rng.gamma(1.0, 5.0, (n_src, n_probe, n_filt))
    back = rng.gamma(1.0, 50.0, (n_src, n_filt))
    read = rng.uniform(0.0, 10.0, n_filt)
    top, _ = _brute_force(resp, back, upt, read, k=k, n_ch=n_ch, t=0.5, c=0.3, top=10)
    for prune in (True, False):
        out = exhaustive_search(resp, back, upt, read, k=k, n_channels=n_ch, exposure_s=0.5, concentration_uM=0.3,
                                top=10, prune=prune)
        got = [(int(s), tuple(p), tuple(f)) for s, p, f in zip(out.source, out.probes.tolist(), out.filters.tolist(),
                                                                strict=True)]
        assert got == [(s, p, f) for _, s, p, f in top]
        np.testing.assert_allclose(out.worst_snr, [-v for v, *_ in top], rtol=1e-9)
        np.testing.assert_allclose(out.worst_snr, out.snr.min(axis=1), rtol=1e-12)


def test_each_candidate_equals_channel_report(small):
    # design's evaluation must be the channel model's (probeplan.model.channels.channel_report), probe for probe
    probes, filters, res = small
    for cand in res.candidates[:2]:
        chosen = [probes[res.probe_names.index(n)] for n in cand.probes]
        chans = [optics.Channel(f, LASER_532, filters[res.filter_names.index(f)], SI, LENS, 0.1) for f in cand.filters]
        rep = channels.channel_report(tissue_preset("soft tissue"), chosen, chans, irradiance_mw_per_cm2=cand.irradiance_mw_per_cm2,
                                      depth_mm=2.0, concentration_uM=0.1, uptake_ratio=5.0)
        np.testing.assert_allclose(cand.snr, rep.unmixed_snr[0], rtol=1e-9)
        np.testing.assert_allclose(cand.noise_amplification, rep.noise_amplification[0], rtol=1e-9)
        assert cand.condition_number == pytest.approx(float(rep.condition_number[0]), rel=1e-9)
        np.testing.assert_allclose(cand.response_e_per_s_per_uM, rep.response_e_per_s_per_uM[0], rtol=1e-12)


def test_identical_probes_are_never_separable():
    twin_a = dots.make_probe("CdTe", 700, name="CdTe 700 nm (batch A)")
    twin_b = dots.make_probe("CdTe", 700, name="CdTe 700 nm (batch B)")
    other = dots.make_probe("CdTe", 660)
    filters = [optics.parse_filter(f) for f in ("660/20", "700/20", "720/20", "750/40")]
    res = design("soft tissue", [twin_a, twin_b, other], filters, sources=LASER_532, camera=SI, k=2, top=18, **COMMON)
    assert len(res.candidates) == res.total_combinations == 18  # every combination is ranked
    twins = [c for c in res.candidates if set(c.probes) == {twin_a.name, twin_b.name}]
    assert len(twins) == 6
    assert all(c.worst_snr == 0.0 and not c.separable for c in twins)
    assert all(c.worst_snr > 0 for c in res.candidates if c not in twins)
    assert set(res.best.probes) != {twin_a.name, twin_b.name}


def test_channels_without_crosstalk_give_the_camera_snr():
    # identity response: each probe seen by its own filter only; then the unmixed SNR is the
    # single-channel camera SNR S/√(S + B + σr²) in electrons (docs/sources.md, camera noise)
    r = np.diag([400.0, 900.0, 250.0])[None]
    back = np.array([[30.0, 10.0, 60.0]])
    upt = np.zeros((1, 3, 3))
    upt[0, [0, 1, 2], [0, 1, 2]] = [5.0, 8.0, 2.0]
    read = np.array([6.0, 6.0, 40.0])
    t, c = 0.2, 0.5
    out = exhaustive_search(r, back, upt, read, k=3, exposure_s=t, concentration_uM=c, top=1)
    s_e = np.diag(r[0]) * c * t
    b_e = (back[0] + np.diag(upt[0])) * t
    np.testing.assert_allclose(out.snr[0], s_e / np.sqrt(s_e + b_e + read**2), rtol=1e-12)
    np.testing.assert_allclose(channels.noise_amplification(r[0], np.ones(3)), 1.0)


def test_well_separated_probes_have_unit_noise_amplification():
    # a visible/NIR-I probe on silicon and two NIR-II probes on InGaAs: practically no crosstalk
    probes = [dots.make_probe("CdTe", 700), dots.make_probe("PbS", 1100), dots.make_probe("PbS", 1400)]
    filters = [optics.parse_filter(f) for f in ("700/40", "1100/50", "1400/50", "900/50")]
    cams = [SI, optics.camera("ingaas")]
    res = design("soft tissue", probes, filters, sources=LASER_532, camera=cams, k=3, top=1,
                 **dict(COMMON, depth_mm=1.0))
    best = res.best
    assert best.filters == ("700/40", "1100/50", "1400/50")
    assert best.cameras == ("si-deep-depletion", "ingaas", "ingaas")
    assert best.condition_number == pytest.approx(1.0, abs=1e-3)
    np.testing.assert_allclose(best.noise_amplification, 1.0, atol=1e-6)


def test_more_irradiance_gives_a_higher_worst_snr(small):
    probes, filters, _ = small
    worst = [design("soft tissue", probes[:4], filters[:5], sources=LASER_532, camera=SI, k=2, top=1,
                    irradiance_mw_per_cm2=e, **COMMON).best.worst_snr for e in (25.0, 50.0, 100.0, 200.0)]
    assert all(b > a for a, b in zip(worst, worst[1:], strict=False))


def test_default_irradiance_is_the_skin_mpe():
    # ANSI Z136.1 / IEC 60825-1 long exposure: 0.2 C_A W/cm² with C_A = 10^(0.002(λ-700)) (docs/sources.md: 808 nm -> 328.9)
    probes = [dots.make_probe("PbS", p) for p in (1100, 1300)]
    filters = [optics.parse_filter(f) for f in ("1100/50", "1300/50")]
    res = design("soft tissue", probes, filters, sources=optics.Laser(808.0, 1.0), camera=optics.camera("ingaas"), k=2,
                 top=1, **COMMON)
    assert res.sources[0]["skin_mpe_mw_per_cm2"] == pytest.approx(328.9, abs=0.05)
    assert res.best.irradiance_mw_per_cm2 == pytest.approx(328.9, abs=0.05)


def test_unexcited_probe_is_noted_and_ranked_last():
    # 640 nm is longer than the absorption edge of a CdTe dot emitting at 650 nm (exciton near 630 nm)
    probes = [dots.make_probe("CdTe", 650), dots.make_probe("PbS", 1000), dots.make_probe("PbS", 1200)]
    filters = [optics.parse_filter(f) for f in ("650/20", "1000/50", "1200/50")]
    res = design("soft tissue", probes, filters, sources=optics.Laser(640.0, 1.0),
                 camera=[SI, optics.camera("ingaas")], k=2, top=9, **COMMON)
    assert np.all(res.response_e_per_s_per_uM[0, 0] == 0.0)
    assert any("CdTe 650 nm is not excited" in n for n in res.notes)
    assert set(res.best.probes) == {"PbS 1000 nm", "PbS 1200 nm"}
    assert all(c.worst_snr == 0.0 for c in res.candidates if "CdTe 650 nm" in c.probes)


def test_forward_model_warnings_are_passed_on_once():
    probes = probe_series("CdTeSe", 700, 740, 20)
    filters = [optics.parse_filter(f) for f in ("700/20", "720/20", "740/20", "760/20")]
    with pytest.warns(AssumptionWarning, match="typical epsilon") as record:
        design("soft tissue", probes, filters, sources=LASER_532, camera=SI, k=2, top=1, **COMMON)
    messages = [str(w.message) for w in record if issubclass(w.category, AssumptionWarning)]
    assert len(messages) == len(set(messages)) == len(probes)  # one per probe, not one per filter


def test_explanation_names_winner_limit_and_runner_up(small):
    _, _, res = small
    text = res.explanation()
    best, second = res.candidates[0], res.candidates[1]
    assert f"limited by {best.limiting_probe}" in text
    assert "vs #2" in text and "condition number" in text
    assert f"{res.total_combinations:,} combinations" in text
    assert best.worst_snr >= second.worst_snr
    d = res.as_dict()
    assert d["counts"]["evaluated"] + d["counts"]["pruned"] == d["counts"]["total_combinations"]


def test_progress_reaches_the_end(small):
    probes, filters, _ = small
    calls = []
    design("soft tissue", probes[:4], filters[:4], sources=LASER_532, camera=SI, k=2, top=1,
           progress=lambda done, total: calls.append((done, total)), **COMMON)
    assert calls and calls[-1][0] == calls[-1][1] == math.comb(4, 2)


def test_generators_and_camera_rule():
    assert [p.emission_peak_nm for p in probe_series("CdTeSe", 660, 840, 20)] == list(range(660, 841, 20))
    grid = filter_grid(np.arange(650, 1001, 10), [20, 30, 40])
    assert len(grid) == 36 * 3 and grid[0].name == "650/20"
    cams = [SI, optics.camera("ingaas")]
    assert camera_for_filter(optics.parse_filter("LP 1300"), cams).name == "ingaas"
    assert camera_for_filter(optics.parse_filter("700/40"), cams).name == "si-deep-depletion"


# --------------------------------------------------------------------------- bad input


@pytest.fixture(scope="module")
def few():
    return [dots.make_probe("CdTe", p) for p in (660, 700)], [optics.parse_filter("700/20"), optics.parse_filter("660/20")]


def test_k_larger_than_candidates_is_refused(few):
    probes, filters = few
    with pytest.raises(InputError, match=r"^k: 3 probes to multiplex but only 2 candidate probes; give more"):
        design("soft tissue", probes, filters, sources=LASER_532, camera=SI, k=3, **COMMON)


def test_no_filters_is_refused(few):
    probes, _ = few
    with pytest.raises(InputError, match=r"^candidate_filters: none given"):
        design("soft tissue", probes, [], sources=LASER_532, camera=SI, k=1, **COMMON)


def test_too_few_filters_for_the_channels_is_refused(few):
    probes, filters = few
    with pytest.raises(InputError, match=r"candidate_filters: 2 candidate filters for 3 channels"):
        design("soft tissue", probes, filters, sources=LASER_532, camera=SI, k=2, n_channels=3, **COMMON)
    with pytest.raises(InputError, match=r"n_channels: got 1"):
        design("soft tissue", probes, filters, sources=LASER_532, camera=SI, k=2, n_channels=1, **COMMON)


def test_irradiance_above_the_skin_mpe_is_refused(few):
    probes, filters = few
    with pytest.raises(InputError, match=r"irradiance_mw_per_cm2: 250 mW/cm\^2 at 532 nm is above the skin MPE 200"):
        design("soft tissue", probes, filters, sources=LASER_532, camera=SI, k=2, irradiance_mw_per_cm2=250.0,
               **COMMON)


def test_other_bad_values_are_refused(few):
    probes, filters = few
    with pytest.raises(InputError, match=r"uptake_ratio: got 0.5"):
        design("soft tissue", probes, filters, sources=LASER_532, camera=SI, k=1, uptake_ratio=0.5, **COMMON)
    with pytest.raises(InputError, match=r"^search size: 4 combinations \(limit 3\)"):
        design("soft tissue", probes, filters, sources=LASER_532, camera=SI, k=1, max_combinations=3, **COMMON)
    with pytest.raises(InputError, match=r"sources: no excitation source given"):
        design("soft tissue", probes, filters, sources=[], camera=SI, k=1, **COMMON)
    with pytest.raises(TypeError, match=r"candidate_probes: expected Probe objects"):
        design("soft tissue", ["CdTe:700"], filters, sources=LASER_532, camera=SI, k=1, **COMMON)
    with pytest.raises(TypeError, match=r"k: expected an integer"):
        design("soft tissue", probes, filters, sources=LASER_532, camera=SI, k=1.5, **COMMON)
    with pytest.raises(InputError, match=r"probe series: CdTeSe:700-660:20"):
        probe_series("CdTeSe", 700, 660, 20)


def test_bad_tables_are_refused():
    r = np.ones((1, 2, 2))
    with pytest.raises(InputError, match=r"background_e_per_s: has negative"):
        exhaustive_search(r, -np.ones((1, 2)), np.zeros((1, 2, 2)), np.zeros(2), k=1, exposure_s=1.0,
                          concentration_uM=1.0)
    with pytest.raises(InputError, match=r"uptake_e_per_s: shape \(1, 2\)"):
        exhaustive_search(r, np.ones((1, 2)), np.zeros((1, 2)), np.zeros(2), k=1, exposure_s=1.0, concentration_uM=1.0)
