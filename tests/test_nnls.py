"""Batched exact NNLS checked against scipy.optimize.nnls (the reference implementation named in
docs/sources.md "Unmixing"; Lawson & Hanson 1974) to 1e-6 relative."""

import numpy as np
import pytest
import scipy.optimize
from hypothesis import given, settings
from hypothesis import strategies as st

from probeplan.errors import InputError
from probeplan.unmixing.nnls import (
    STATUS_CONSTRAINED,
    STATUS_INTERIOR,
    STATUS_NAN,
    STATUS_SATURATED,
    lstsq_pixels,
    nnls_pixels,
)

ENGINES = ["numba", "numpy"]


def _scipy(M, Y):
    # outside check: scipy.optimize.nnls, one pixel at a time
    return np.stack([scipy.optimize.nnls(M, Y[:, i].astype(np.float64))[0] for i in range(Y.shape[1])], axis=1)


def _assert_close(x, ref, rel=1e-6):
    scale = np.maximum(np.abs(ref).max(axis=0), 1e-300)
    err = np.abs(np.asarray(x, np.float64) - ref).max(axis=0) / scale
    assert err.max() <= rel, err.max()


def _gaussian_references(C, K, rng):
    # realistic: Gaussian emission bands sampled by C channels (common practice, no source)
    centres = np.linspace(0.15, 0.85, K) + rng.normal(0, 0.02, K)
    ch = np.linspace(0, 1, C)[:, None]
    M = np.exp(-0.5 * ((ch - centres) / 0.12) ** 2) + 0.01
    return M / M.sum(axis=0)


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize(("C", "K"), [(3, 1), (4, 2), (8, 4), (16, 7), (6, 6), (12, 10)])
def test_random_matches_scipy(engine, C, K):
    rng = np.random.default_rng(C * 100 + K)
    M = rng.random((C, K))
    X = rng.random((K, 600)) * (rng.random((K, 600)) > 0.4)  # many exactly-zero abundances
    Y = M @ X + rng.normal(0, 0.05, (C, 600))
    x, status = nnls_pixels(M, Y, engine=engine)
    _assert_close(x, _scipy(M, Y))
    assert (x >= 0).all()
    assert set(np.unique(status)) <= {STATUS_INTERIOR, STATUS_CONSTRAINED}


@pytest.mark.parametrize("engine", ENGINES)
def test_realistic_poisson_matches_scipy(engine):
    rng = np.random.default_rng(5)
    M = _gaussian_references(8, 4, rng)
    X = rng.gamma(1.0, 200.0, (4, 2000)) * (rng.random((4, 2000)) > 0.3)
    Y = rng.poisson(M @ X + 5.0).astype(np.uint16)
    x, _ = nnls_pixels(M, Y, engine=engine)
    _assert_close(x, _scipy(M, Y))


@pytest.mark.parametrize("engine", ENGINES)
def test_noiseless_exact_zeros_and_ties(engine):
    # exactly-zero abundances without noise: the unconstrained solution is 0 up to rounding
    M = np.array([[1.0, 0.0, 0.5], [0.0, 1.0, 0.5], [1.0, 1.0, 0.0], [0.5, 0.5, 1.0]])
    X = np.array([[1.0, 0.0, 0.0, 2.0, 0.0], [0.0, 0.0, 3.0, 2.0, 0.0], [0.0, 1.0, 0.0, 0.0, 0.0]])
    Y = M @ X
    # ties: mirror-symmetric columns and symmetric data give equal gradients for two components
    Ms = np.array([[1.0, 0.2], [0.2, 1.0], [0.6, 0.6]])
    Ys = np.array([[1.0, -1.0, 0.0], [1.0, -1.0, 0.0], [1.0, -1.0, 0.0]])
    for A, B in ((M, Y), (Ms, Ys)):
        x, _ = nnls_pixels(A, B, engine=engine)
        ref = _scipy(A, B)
        np.testing.assert_allclose(x, ref, rtol=1e-6, atol=1e-12 * max(1.0, np.abs(ref).max()))
    x, _ = nnls_pixels(M, Y, engine=engine)
    np.testing.assert_allclose(x, X, atol=1e-12)


def test_large_k_active_set_path_matches_scipy():
    rng = np.random.default_rng(11)
    M = rng.random((20, 14))
    X = rng.random((14, 300)) * (rng.random((14, 300)) > 0.5)
    Y = M @ X + rng.normal(0, 0.1, (20, 300))
    x, _ = nnls_pixels(M, Y, engine="numba")
    _assert_close(x, _scipy(M, Y))
    with pytest.raises(InputError, match="engine"):
        nnls_pixels(M, Y, engine="numpy")


def test_float32_input_float64_arithmetic():
    rng = np.random.default_rng(2)
    M = _gaussian_references(8, 4, rng)
    Y = (M @ rng.random((4, 500)) * 1000 + rng.normal(0, 5, (8, 500))).astype(np.float32)
    x, _ = nnls_pixels(M, Y)
    assert x.dtype == np.float32
    x64, _ = nnls_pixels(M, Y.astype(np.float64))
    assert x64.dtype == np.float64
    _assert_close(x64, _scipy(M, Y))  # float64 arithmetic on the float32 values
    _assert_close(x, _scipy(M, Y), rel=1e-6)


@pytest.mark.parametrize("engine", ENGINES)
def test_nan_and_saturation_status(engine):
    M = np.array([[1.0, 0.2], [0.3, 1.0], [0.5, 0.5]])
    Y = np.array([[1.0, np.nan, 5.0, 1.0], [1.0, 1.0, 1.0, -3.0], [1.0, 1.0, 1.0, 1.0]])
    x, status = nnls_pixels(M, Y, saturation=4.0, engine=engine)
    assert status.tolist()[:3] == [STATUS_INTERIOR, STATUS_NAN, STATUS_SATURATED]
    assert status[3] == STATUS_CONSTRAINED
    assert np.isnan(x[:, 1:3]).all() and np.isfinite(x[:, [0, 3]]).all()


def test_kkt_conditions_hold():
    # Karush-Kuhn-Tucker conditions of NNLS (Lawson & Hanson 1974, ch. 23)
    rng = np.random.default_rng(3)
    M = rng.random((10, 5))
    Y = rng.normal(0, 1, (10, 1000))
    x, _ = nnls_pixels(M, Y)
    w = M.T @ (Y - M @ x)
    scale = np.abs(M.T @ Y).max()
    assert (w[x > 0] == pytest.approx(0, abs=1e-9 * scale))
    assert (w[x == 0] <= 1e-9 * scale).all()


def test_lstsq_matches_numpy_lstsq():
    # outside check: numpy.linalg.lstsq
    rng = np.random.default_rng(4)
    M = rng.random((6, 3))
    Y = rng.normal(0, 1, (6, 200))
    x, status = lstsq_pixels(M, Y)
    np.testing.assert_allclose(x, np.linalg.lstsq(M, Y, rcond=None)[0], rtol=1e-10, atol=1e-12)
    assert (status == STATUS_INTERIOR).all()


def test_shape_errors():
    with pytest.raises(InputError, match="data"):
        nnls_pixels(np.ones((3, 2)), np.ones((4, 5)))
    with pytest.raises(InputError, match="engine"):
        nnls_pixels(np.ones((3, 2)), np.ones((3, 5)), engine="gpu")
    with pytest.raises(TypeError):
        nnls_pixels(np.ones((3, 2)), np.ones((3, 5), dtype=complex))


@settings(max_examples=40, deadline=None)
@given(
    st.integers(1, 5).flatmap(
        lambda k: st.tuples(
            st.just(k),
            st.integers(k, 8),
            st.integers(0, 2**31 - 1),
        )
    )
)
def test_property_matches_scipy(params):
    K, C, seed = params
    rng = np.random.default_rng(seed)
    M = rng.random((C, K)) + 0.05 * np.eye(C, K)
    Y = rng.normal(0, 1, (C, 20)) * 10
    for engine in ENGINES:
        x, _ = nnls_pixels(M, Y, engine=engine)
        _assert_close(x, _scipy(M, Y))


@pytest.mark.parametrize(("C", "K"), [(8, 4), (12, 8), (16, 7)])
def test_half_absent_probes_match_scipy(C, K):
    # the hard case of real images: half the probes absent from half the pixels, so most of those
    # pixels need several exchanges of the passive set (tabulated path, K <= 8)
    rng = np.random.default_rng(K)
    M = _gaussian_references(C, K, rng)
    X = rng.gamma(2.0, 300.0, (K, 3000))
    X[K // 2 :, :1500] = 0.0
    Y = rng.poisson(M @ X).astype(np.float32)
    x, status = nnls_pixels(M, Y)
    assert (status[:1500] == STATUS_CONSTRAINED).mean() > 0.5
    _assert_close(x, _scipy(M, Y))


def test_passive_set_table_against_lstsq():
    # each tabulated matrix turns the unconstrained solution into the least-squares solution on
    # its passive set and the gradient off it; checked with numpy.linalg.lstsq on the columns of P
    from probeplan.unmixing.nnls import _passive_set_table

    rng = np.random.default_rng(8)
    M = rng.random((9, 5))
    y = rng.normal(0, 1, 9)
    xu = np.linalg.lstsq(M, y, rcond=None)[0]
    T = _passive_set_table(M.T @ M)
    for mask in range(1 << 5):
        sel = ((mask >> np.arange(5)) & 1).astype(bool)
        xp = np.zeros(5)
        if sel.any():
            xp[sel] = np.linalg.lstsq(M[:, sel], y, rcond=None)[0]
        v = T[mask] @ xu
        np.testing.assert_allclose(v[sel], xp[sel], rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(v[~sel], (M.T @ (y - M @ xp))[~sel], rtol=1e-9, atol=1e-12)


def test_fallback_lawson_hanson_pixel_matches_scipy():
    # the path a pixel takes if block principal pivoting does not settle (a safeguard that the
    # data above never reach): Lawson-Hanson from b = Mᵀy, checked against scipy.optimize.nnls
    from probeplan.unmixing.nnls import _lawson_hanson_pixel

    rng = np.random.default_rng(9)
    M = rng.random((7, 4))
    Y = rng.normal(0, 1, (7, 50))
    K = 4
    for col in range(Y.shape[1]):
        x = np.empty(K)
        _lawson_hanson_pixel(Y, col, np.ascontiguousarray(M.T), M.T @ M, 1e-13, np.abs(M).sum(axis=0).max(), 12,
                             x, np.zeros(K, np.bool_), np.empty(K), np.empty(K), np.empty((K, K)),
                             np.empty(K, np.int64), np.empty(7), np.empty(K))
        _assert_close(x[:, None], _scipy(M, Y[:, col : col + 1]))


def test_one_and_two_dropped_components_match_scipy():
    # the block-wide first tests of the compiled kernel: pixels whose unconstrained solution has one
    # negative component (settled by the rank-one update, or not), and pixels where a pair is dropped
    # (its gradient test decides on the pixels of random signs).
    # Which case each pixel is in is decided here with numpy.linalg.lstsq on the reduced columns;
    # every case must be present, and every pixel must equal scipy.optimize.nnls
    rng = np.random.default_rng(21)
    C, K, n = 8, 4, 4000
    M = _gaussian_references(C, K, rng)
    X = rng.gamma(2.0, 100.0, (K, n))
    X[3, : n // 3] = 0.0  # one probe absent
    X[2:, n // 3 : 3 * n // 4] = 0.0  # two probes absent
    X[::2, 3 * n // 4 :] = rng.uniform(-100.0, 30.0, (2, n - 3 * n // 4))  # over-subtracted background
    Y = M @ X + rng.normal(0, 3.0, (C, n))
    xu = np.linalg.lstsq(M, Y, rcond=None)[0]
    nneg = (xu < 0).sum(axis=0)
    one = np.flatnonzero(nneg == 1)
    rank_one_ok = np.array([
        (np.linalg.lstsq(M[:, xu[:, i] >= 0], Y[:, i], rcond=None)[0] >= 0).all() for i in one
    ])
    assert rank_one_ok.sum() > 200 and (~rank_one_ok).sum() > 50
    assert (nneg == 2).sum() > 200
    x, status = nnls_pixels(M, Y)
    _assert_close(x, _scipy(M, Y))
    assert (status[nneg > 0] == STATUS_CONSTRAINED).all() and (status[nneg == 0] == STATUS_INTERIOR).all()
