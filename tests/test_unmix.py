"""Unmixing of stacks: round trips, limiting cases, noise model and validation."""

import numpy as np
import pytest

from probeplan.errors import InputError, ModelValidityWarning
from probeplan.unmixing.nnls import STATUS_NAN, STATUS_SATURATED
from probeplan.unmixing.references import references_from_matrix
from probeplan.unmixing.pipeline import check_references, design_matrix, unmix, unmix_stack


def _refs(C=8, K=3):
    # Gaussian emission bands sampled by C channels (common practice, no source)
    ch = np.linspace(0, 1, C)[:, None]
    M = np.exp(-0.5 * ((ch - np.linspace(0.2, 0.8, K)) / 0.15) ** 2) + 0.02
    return M / M.sum(axis=0)


def test_identity_references_return_input():
    # limiting case: M = I makes every method the identity (non-negative input for NNLS)
    rng = np.random.default_rng(0)
    stack = rng.random((4, 10, 12)) * 100
    for method in ("nnls", "ls"):
        np.testing.assert_allclose(unmix(stack, np.eye(4), method=method), stack, rtol=1e-12)
    neg = stack - 50
    np.testing.assert_allclose(unmix(neg, np.eye(4), method="ls"), neg, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(unmix(neg, np.eye(4), method="nnls"), np.clip(neg, 0, None), atol=1e-12)


@pytest.mark.parametrize("method", ["nnls", "ls", "wls"])
def test_poisson_round_trip_and_standard_error_coverage(method):
    # mix -> Poisson noise -> unmix: about 95 % of estimates within +-2 SE (normal approximation
    # of the Poisson likelihood; common practice, no source)
    rng = np.random.default_rng(1)
    M = _refs()
    truth = rng.uniform(2000, 6000, (3, 64, 64))
    stack = rng.poisson(np.einsum("ck,kyx->cyx", M, truth)).astype(np.uint16)
    res = unmix_stack(stack, M, method=method)
    z = (res.abundances - truth) / res.standard_error
    inside = np.mean(np.abs(z) < 2)
    assert 0.93 < inside < 0.97, inside
    assert abs(np.mean(res.abundances - truth)) < 0.05 * np.mean(res.standard_error)
    # residual RMS: sqrt of the mean Poisson variance times (C-K)/C degrees of freedom
    expected = np.sqrt(np.mean(np.einsum("ck,kyx->cyx", M, truth)) * (8 - 3) / 8)
    assert np.nanmedian(res.residual_rms) == pytest.approx(expected, rel=0.15)


def test_read_noise_and_gain_enter_standard_error():
    M = _refs()
    stack = np.full((8, 4, 4), 1000.0)
    se1 = unmix_stack(stack, M, method="ls").standard_error
    se2 = unmix_stack(stack, M, method="ls", read_noise_e=100.0).standard_error
    se3 = unmix_stack(stack, M, method="ls", gain_e_per_count=4.0).standard_error
    assert (se2 > se1).all()
    np.testing.assert_allclose(se3, se1 / 2.0, rtol=1e-12)  # var = y/g: SE scales as 1/sqrt(g)


def test_unmix_equals_unmix_stack_and_dtypes():
    rng = np.random.default_rng(2)
    M = _refs()
    stack = rng.poisson(np.einsum("ck,kyx->cyx", M, rng.uniform(0, 500, (3, 16, 16)))).astype(np.float32)
    a = unmix(stack, M)
    assert a.dtype == np.float32 and a.shape == (3, 16, 16)
    np.testing.assert_array_equal(a, unmix_stack(stack, M).abundances)
    assert unmix(stack.astype(np.uint16), M).dtype == np.float64


def test_channel_axis_tcyx():
    rng = np.random.default_rng(3)
    M = _refs(5, 2)
    truth = rng.uniform(10, 20, (2, 3, 6, 7))  # K, T, Y, X
    stack = np.moveaxis(np.einsum("ck,ktyx->ctyx", M, truth), 0, 1)  # T, C, Y, X
    np.testing.assert_allclose(unmix(stack, M, channel_axis=1), truth, rtol=1e-9)


def test_dark_flat_offset():
    rng = np.random.default_rng(4)
    M = _refs()
    truth = rng.uniform(100, 200, (3, 8, 8))
    flat = rng.uniform(0.5, 1.5, (8, 8, 8))
    dark = rng.uniform(90, 110, (8, 8, 8))
    stack = np.einsum("ck,kyx->cyx", M, truth) * flat + dark
    np.testing.assert_allclose(unmix(stack, M, dark=dark, flat=flat), truth, rtol=1e-9)
    a = unmix(np.einsum("ck,kyx->cyx", M, truth) + 7.0, M, offset=True)
    np.testing.assert_allclose(a[:3], truth, rtol=1e-9)
    np.testing.assert_allclose(a[3], 7.0, rtol=1e-9)
    with pytest.raises(InputError, match="flat"):
        unmix(stack, M, flat=np.zeros((8, 8, 8)))
    with pytest.raises(InputError, match="dark"):
        unmix(stack, M, dark=np.zeros((3, 8)))


def test_nan_and_saturated_pixels():
    M = _refs()
    stack = np.full((8, 3, 3), 1000, dtype=np.uint16)
    stack[2, 0, 0] = 65535  # full scale of uint16
    res = unmix_stack(stack, M)
    assert res.status[0, 0] == STATUS_SATURATED and np.isnan(res.abundances[:, 0, 0]).all()
    assert res.qc["n_saturated"] == 1
    res = unmix_stack(stack, M, saturation=1000)  # a 1000-count full scale saturates everything
    assert res.qc["n_saturated"] == 9
    f = stack.astype(np.float64)
    f[1, 1, 1] = np.nan
    res = unmix_stack(f, M)
    assert res.status[1, 1] == STATUS_NAN and res.qc["n_invalid"] == 1
    assert np.isnan(res.abundances[:, 1, 1]).all() and np.isnan(res.standard_error[:, 1, 1]).all()
    assert res.qc["n_saturated"] == 0  # float stacks have no default full scale


def test_qc_summary_contents():
    M = _refs()
    rng = np.random.default_rng(5)
    stack = rng.poisson(50.0, (8, 10, 10)).astype(np.float64)
    qc = unmix_stack(stack, M).qc
    for key in ("condition_number", "fraction_constrained", "residual_rms", "n_saturated", "n_invalid", "n_pixels"):
        assert key in qc
    assert qc["condition_number"] == pytest.approx(check_references(M))
    assert 0 <= qc["fraction_constrained"] <= 1


def test_reference_validation():
    M = _refs()
    stack = np.ones((8, 2, 2))
    with pytest.raises(InputError, match="4 components .* only 3 channels"):
        unmix(np.ones((3, 2, 2)), np.ones((3, 4)) + np.eye(3, 4))
    with pytest.raises(InputError, match="8 channels but the stack has 5"):
        unmix(np.ones((5, 2, 2)), M)
    dup = np.column_stack([M[:, 0], M[:, 1], 2 * M[:, 0]])
    with pytest.raises(InputError, match=r"\['a', 'c'\] are collinear"):
        unmix(stack, references_from_matrix(dup, ["a", "b", "c"]))
    bad = M.copy()
    bad[0, 1] = np.nan
    with pytest.raises(InputError, match="NaN"):
        unmix(stack, bad)
    bad[0, 1] = -0.1
    with pytest.raises(InputError, match="negative"):
        unmix(stack, bad)
    close = np.column_stack([M[:, 0], M[:, 0] + 1e-4 * M[:, 1]])
    with pytest.warns(ModelValidityWarning, match="condition number"):
        design_matrix(close)
    with pytest.raises(InputError, match="method"):
        unmix(stack, M, method="magic")
    with pytest.raises(TypeError):
        unmix(np.ones((8, 2, 2), dtype=bool), M)
