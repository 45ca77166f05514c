"""The channel model: crosstalk, condition number, noise amplification, separability."""

from __future__ import annotations

import numpy as np
import pytest

from probeplan.errors import InputError
from probeplan.model import dots, optics
from probeplan.model.channels import (
    channel_report,
    condition_number,
    crosstalk,
    noise_amplification,
    unmixed_snr,
)
from probeplan.model.tissue import tissue_preset

SOFT = tissue_preset("soft tissue")


def test_identity_crosstalk_gives_noise_amplification_one():
    # Channels with no crosstalk: unmixing costs nothing (the outside check; common practice).
    np.testing.assert_allclose(noise_amplification(np.eye(4) * 7.0, np.full(4, 3.0)), 1.0)
    assert float(condition_number(np.eye(4) * 7.0)) == pytest.approx(1.0)


def test_condition_number_matches_numpy_for_unit_columns():
    # numpy.linalg.cond (2-norm) as the reference, after scaling columns to unit norm.
    rng = np.random.default_rng(3)
    m = rng.random((5, 3)) + np.eye(5, 3)
    unit = m / np.linalg.norm(m, axis=0)
    assert float(condition_number(m)) == pytest.approx(np.linalg.cond(unit), rel=1e-10)


def test_two_identical_probes_are_not_separable():
    m = np.array([[1.0, 1.0, 0.1], [0.5, 0.5, 0.2], [0.1, 0.1, 1.0]])
    assert np.isinf(condition_number(m))
    amp = noise_amplification(m, np.ones(3))
    assert np.isinf(amp[0]) and np.isinf(amp[1])


def test_more_probes_than_channels_is_not_separable():
    assert np.isinf(condition_number(np.ones((2, 3))))


def test_predicted_unmixed_noise_matches_simulation():
    # Independent check by simulation: y = M a + n with Gaussian noise of known variance per channel,
    # unmixed by weighted least squares (numpy.linalg.lstsq); the empirical standard deviation of each
    # abundance must match sqrt(diag((M^T S^-1 M)^-1)) (Neher & Neher 2004, eq. for linear unmixing).
    rng = np.random.default_rng(11)
    m = np.array([[1.0, 0.35, 0.05], [0.2, 1.0, 0.3], [0.02, 0.25, 1.0], [0.1, 0.1, 0.4]])
    var = np.array([0.5, 1.0, 2.0, 0.8])
    a = np.array([3.0, 2.0, 1.0])
    n = 200_000
    y = (m @ a)[:, None] + rng.normal(size=(4, n)) * np.sqrt(var)[:, None]
    w = 1 / np.sqrt(var)
    est = np.linalg.lstsq(m * w[:, None], y * w[:, None], rcond=None)[0]
    predicted_sd = a / unmixed_snr(m, var, abundance=a)
    np.testing.assert_allclose(est.std(axis=1), predicted_sd, rtol=0.01)
    # and amplification = unmixed sd / best single-channel sd
    single = 1 / np.max(m / np.sqrt(var)[:, None], axis=0)
    np.testing.assert_allclose(noise_amplification(m, var), predicted_sd / single, rtol=1e-12)


def test_crosstalk_columns_normalised_to_own_channel():
    x = crosstalk([[8.0, 1.0], [2.0, 4.0], [0.0, 2.0]])
    np.testing.assert_allclose(x, [[1.0, 0.25], [0.25, 1.0], [0.0, 0.5]])


@pytest.fixture(scope="module")
def three_colour():
    source = optics.Laser(640.0)
    cam = optics.camera("si-deep-depletion").with_binning(2)
    lens = optics.Lens(4.0, 0.1)
    probes = [dots.make_probe("CdTe", 700.0),
              dots.make_probe("CdTeSe", 780.0, extinction_at_excitation_per_M_cm=1.5e6),
              dots.make_probe("InAs", 880.0, extinction_at_excitation_per_M_cm=1.0e6)]
    channels = [optics.Channel(f, source, optics.parse_filter(f), cam, lens, 0.01) for f in ("700/30", "780/40", "880/50")]
    return probes, channels


def test_channel_report_on_a_three_colour_set(three_colour):
    probes, channels = three_colour
    rep = channel_report(SOFT, probes, channels, irradiance_mw_per_cm2=10.0, depth_mm=[1.0, 4.0])
    assert rep.response_e_per_s_per_uM.shape == (2, 3, 3)
    assert rep.separable.all()
    # each probe is brightest in its own channel
    assert [int(np.argmax(rep.response_e_per_s_per_uM[0, :, k])) for k in range(3)] == [0, 1, 2]
    # deeper → weaker signal → lower unmixed SNR
    assert np.all(rep.unmixed_snr[1] < rep.unmixed_snr[0])
    d = rep.as_dict()
    assert d["probes"][0] == "CdTe 700 nm" and len(d["crosstalk"]) == 2


def test_identical_probes_in_the_channel_model(three_colour):
    probes, channels = three_colour
    rep = channel_report(SOFT, [probes[0], probes[0]], channels, irradiance_mw_per_cm2=10.0, depth_mm=[2.0])
    assert not rep.separable.any()
    assert any("cannot be separated" in n for n in rep.notes)


def test_more_probes_than_channels_refused(three_colour):
    probes, channels = three_colour
    with pytest.raises(InputError, match="at least as many channels as probes"):
        channel_report(SOFT, probes, channels[:2], irradiance_mw_per_cm2=10.0, depth_mm=[2.0])
