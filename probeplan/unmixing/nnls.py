"""Batched exact non-negative least squares for many pixels sharing one design matrix.

Every pixel ``n`` of an image stack solves ``min ||M x - y_n||`` subject to ``x >= 0``
with the same ``(C, K)`` matrix ``M``.  Because ``M`` is shared, its Gram matrix
``G = MᵀM`` and pseudo-inverse are computed once (Bro & De Jong 1997) and each pixel
costs a few small matrix-vector products.

Two engines give the same answer (both in float64 arithmetic whatever the input dtype):

``"numba"``
    A compiled kernel.  Per block of pixels it computes the unconstrained solution
    ``x = M⁺ y`` (vectorised over pixels); where every component is ``>= 0`` that *is*
    the NNLS optimum.  Other pixels are solved exactly: first the passive set
    ``{k: x_k > 0}`` is tried and accepted when it satisfies the Karush–Kuhn–Tucker
    conditions; otherwise the Lawson–Hanson active-set method runs on ``G`` and ``Mᵀy``
    (any ``K``), and, should it not converge within ``3K`` steps on a degenerate
    pixel, all ``2^K`` passive sets are enumerated (``K <= 12``).
``"numpy"``
    Pure numpy, ``K <= 12``: all ``2^K`` passive sets are solved for all pixels at once
    and each pixel keeps the feasible one with the lowest objective.

Status codes returned per pixel: :data:`STATUS_INTERIOR` (no constraint active),
:data:`STATUS_CONSTRAINED`, :data:`STATUS_NAN` (a channel was NaN, +inf or -inf: the pixel is
invalid; output NaN),
:data:`STATUS_SATURATED` (a channel reached the saturation level; output NaN).
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from probeplan.errors import input_error

__all__ = [
    "nnls_pixels",
    "lstsq_pixels",
    "STATUS_INTERIOR",
    "STATUS_CONSTRAINED",
    "STATUS_NAN",
    "STATUS_SATURATED",
    "MAX_ENUMERATION_COMPONENTS",
    "ENGINES",
]

STATUS_INTERIOR = 0
STATUS_CONSTRAINED = 1
STATUS_NAN = 2
STATUS_SATURATED = 3

#: Largest number of components for which all passive sets are enumerated.
MAX_ENUMERATION_COMPONENTS = 12

ENGINES = ("auto", "numba", "numpy")

_BLOCK = 1024  # pixels per block in the compiled kernel (fits in L1/L2 with C <= 32)


# --------------------------------------------------------------------------- compiled engine
# compiled with numba (a dependency); cached on disk after the first call
@njit(cache=True, inline="always")
def _solve_subset(G, b, passive, A, idx, s):
    # s = argmin over the passive set (Cholesky of G[P, P]); zero elsewhere
    K = G.shape[0]
    m = 0
    for j in range(K):
        s[j] = 0.0
        if passive[j]:
            idx[m] = j
            m += 1
    for r in range(m):
        for q in range(m):
            A[r, q] = G[idx[r], idx[q]]
    for r in range(m):
        d = A[r, r]
        for q in range(r):
            d -= A[r, q] * A[r, q]
        if d <= 0.0:
            return False
        d = np.sqrt(d)
        A[r, r] = d
        for t in range(r + 1, m):
            v = A[t, r]
            for q in range(r):
                v -= A[t, q] * A[r, q]
            A[t, r] = v / d
    # forward then backward substitution (A holds L in its lower triangle)
    for r in range(m):
        v = b[idx[r]]
        for q in range(r):
            v -= A[r, q] * s[idx[q]]
        s[idx[r]] = v / A[r, r]
    for r in range(m - 1, -1, -1):
        v = s[idx[r]]
        for q in range(r + 1, m):
            v -= A[q, r] * s[idx[q]]
        s[idx[r]] = v / A[r, r]
    return True

@njit(cache=True)
def _lawson_hanson(G, b, tol, x, passive, w, s, A, idx):
    K = G.shape[0]
    for j in range(K):
        x[j] = 0.0
        passive[j] = False
        w[j] = b[j]
    steps = 0
    while True:
        jmax = -1
        wmax = tol
        for j in range(K):
            if not passive[j] and w[j] > wmax:
                wmax = w[j]
                jmax = j
        if jmax < 0:
            return True
        passive[jmax] = True
        while True:
            steps += 1
            if steps > 3 * K:
                return False
            if not _solve_subset(G, b, passive, A, idx, s):
                return False
            feasible = True
            for j in range(K):
                if passive[j] and s[j] <= 0.0:
                    feasible = False
            if feasible:
                break
            alpha = 1.0
            jmin = -1
            for j in range(K):
                if passive[j] and s[j] <= 0.0:
                    a = x[j] / (x[j] - s[j])
                    if a < alpha:
                        alpha = a
                        jmin = j
            for j in range(K):
                x[j] += alpha * (s[j] - x[j])
            for j in range(K):
                if passive[j] and (x[j] <= 0.0 or j == jmin):
                    passive[j] = False
                    x[j] = 0.0
        for j in range(K):
            x[j] = s[j]
        for j in range(K):
            v = b[j]
            for q in range(K):
                v -= G[j, q] * x[q]
            w[j] = v

@njit(cache=True)
def _enumerate(G, b, x, passive, s, A, idx):
    K = G.shape[0]
    best = 0.0
    for j in range(K):
        x[j] = 0.0
    for mask in range(1, 1 << K):
        for j in range(K):
            passive[j] = (mask >> j) & 1 == 1
        if not _solve_subset(G, b, passive, A, idx, s):
            continue
        ok = True
        val = 0.0
        for j in range(K):
            if passive[j]:
                if s[j] < 0.0:
                    ok = False
                val += b[j] * s[j]
        if ok and val > best:
            best = val
            for j in range(K):
                x[j] = s[j]

@njit(cache=True, fastmath={"contract"})
def _accumulate(P, Y, i0, n, acc):
    K, C = P.shape
    for k in range(K):
        a = acc[k]
        for c in range(C):
            p = P[k, c]
            yy = Y[c, i0 : i0 + n]
            for i in range(n):
                a[i] += p * yy[i]

@njit(cache=True)
def _slow_pixels(Y, acc, bad, i0, n, Mt, G, sat, check_sat, nonneg, tol_rel, normM, max_enum, out, status):
    C = Y.shape[0]
    K = acc.shape[0]
    y = np.empty(C)
    b = np.empty(K)
    x = np.empty(K)
    w = np.empty(K)
    s = np.empty(K)
    passive = np.zeros(K, dtype=np.bool_)
    A = np.empty((K, K))
    idx = np.empty(K, dtype=np.int64)
    for i in range(n):
        if not bad[i]:
            continue
        isnan = False
        issat = False
        ymax = 0.0
        for c in range(C):
            v = np.float64(Y[c, i0 + i])
            y[c] = v
            if v - v != 0.0:  # NaN or +-inf: invalid
                isnan = True
            elif check_sat and v >= sat:
                issat = True
            elif abs(v) > ymax:
                ymax = abs(v)
        if isnan or issat:
            for k in range(K):
                out[k, i0 + i] = np.nan
            status[i0 + i] = 2 if isnan else 3
            continue
        if not nonneg:
            continue
        status[i0 + i] = 1
        for k in range(K):
            v = 0.0
            for c in range(C):
                v += Mt[k, c] * y[c]
            b[k] = v
        tol = tol_rel * normM * ymax
        # warm start: passive set of the positive unconstrained components
        for k in range(K):
            passive[k] = acc[k, i] > 0.0
        done = False
        if _solve_subset(G, b, passive, A, idx, s):
            done = True
            for k in range(K):
                if passive[k]:
                    if s[k] <= 0.0:
                        done = False
                else:
                    v = b[k]
                    for q in range(K):
                        v -= G[k, q] * s[q]
                    if v > tol:
                        done = False
        if done:
            for k in range(K):
                x[k] = s[k]
        elif not _lawson_hanson(G, b, tol, x, passive, w, s, A, idx):
            if K <= max_enum:
                _enumerate(G, b, x, passive, s, A, idx)
        for k in range(K):
            out[k, i0 + i] = x[k]

@njit(cache=True, parallel=True)
def _nnls_kernel(Y, P, Mt, G, sat, check_sat, nonneg, tol_rel, max_enum, out, status):
    C, N = Y.shape
    K = P.shape[0]
    nblocks = (N + _BLOCK - 1) // _BLOCK
    normM = 0.0
    for k in range(K):
        col = 0.0
        for c in range(C):
            col += abs(Mt[k, c])
        normM = max(normM, col)
    for bi in prange(nblocks):
        i0 = bi * _BLOCK
        n = min(N, i0 + _BLOCK) - i0
        acc = np.zeros((K, _BLOCK))
        bad = np.zeros(_BLOCK, dtype=np.bool_)
        # unconstrained solution for the block, vectorised over pixels (float64 arithmetic)
        _accumulate(P, Y, i0, n, acc)
        if check_sat:
            for c in range(C):
                for i in range(n):
                    bad[i] |= Y[c, i0 + i] >= sat
        for k in range(K):
            for i in range(n):
                v = acc[k, i]
                out[k, i0 + i] = v
                if nonneg:
                    bad[i] |= not v >= 0.0
                bad[i] |= v - v != 0.0  # NaN or +-inf: looked at pixel by pixel
        nbad = 0
        for i in range(n):
            status[i0 + i] = 0
            nbad += bad[i]
        if nbad:
            _slow_pixels(Y, acc, bad, i0, n, Mt, G, sat, check_sat, nonneg, tol_rel, normM, max_enum, out, status)


def _kernel():
    return _nnls_kernel


# --------------------------------------------------------------------------- numpy engine
def _numpy_engine(Y, P, M, sat, check_sat, nonneg, out, status):
    C, N = Y.shape
    K = P.shape[0]
    G = M.T @ M
    step = max(1, 2**18 // max(1, 2**K if nonneg else 1))
    for i0 in range(0, N, step):
        y = np.asarray(Y[:, i0 : i0 + step], dtype=np.float64)
        nan = ~np.isfinite(y).all(axis=0)  # NaN or +-inf in a channel: invalid
        satm = (y >= sat).any(axis=0) & ~nan if check_sat else np.zeros(y.shape[1], dtype=bool)
        x = P @ y
        st = np.zeros(y.shape[1], dtype=np.uint8)
        if nonneg:
            need = ~(x >= 0).all(axis=0) & ~nan & ~satm
            if need.any():
                b = M.T @ y[:, need]
                best_val = np.zeros(b.shape[1])
                best = np.zeros((K, b.shape[1]))
                for mask in range(1, 1 << K):
                    sel = np.array([(mask >> j) & 1 == 1 for j in range(K)])
                    xs = np.linalg.solve(G[np.ix_(sel, sel)], b[sel])
                    val = np.einsum("kn,kn->n", b[sel], xs)
                    better = (xs >= 0).all(axis=0) & (val > best_val)
                    best_val = np.where(better, val, best_val)
                    best[np.ix_(sel, better)] = xs[:, better]
                    best[np.ix_(~sel, better)] = 0.0
                x[:, need] = best
                st[need] = STATUS_CONSTRAINED
        st[nan] = STATUS_NAN
        st[satm] = STATUS_SATURATED
        x[:, nan | satm] = np.nan
        out[:, i0 : i0 + step] = x
        status[i0 : i0 + step] = st


# --------------------------------------------------------------------------- public
def _prepare(matrix, data, saturation, out_dtype, engine):
    M = np.asarray(matrix, dtype=np.float64)
    if M.ndim != 2:
        raise input_error("matrix", f"shape {M.shape}, expected (C, K)", "give one column per component")
    Y = np.asarray(data)
    if Y.ndim != 2 or Y.shape[0] != M.shape[0]:
        raise input_error("data", f"shape {Y.shape}, expected ({M.shape[0]}, N)", "give one row per channel")
    if not (np.issubdtype(Y.dtype, np.integer) or np.issubdtype(Y.dtype, np.floating)):
        raise TypeError(f"data: dtype {Y.dtype} is not a real number type")
    if engine not in ENGINES:
        raise input_error("engine", f"{engine!r} is not known", f"choose one of {', '.join(ENGINES)}")
    Y = np.ascontiguousarray(Y)
    if Y.dtype.byteorder not in ("=", "|"):
        Y = Y.astype(Y.dtype.newbyteorder("="))
    if out_dtype is None:
        out_dtype = np.float32 if Y.dtype == np.float32 else np.float64
    sat = np.inf if saturation is None else float(saturation)
    return M, Y, np.dtype(out_dtype), sat


def _run(M, Y, out_dtype, sat, nonneg, engine, tol_rel):
    C, N = Y.shape
    K = M.shape[1]
    G = M.T @ M
    P = np.linalg.solve(G, M.T)
    out = np.empty((K, N), dtype=out_dtype)
    status = np.empty(N, dtype=np.uint8)
    check_sat = bool(np.isfinite(sat))
    use_numba = engine == "numba" or (engine == "auto")
    if engine == "numpy" and nonneg and K > MAX_ENUMERATION_COMPONENTS:
        raise input_error(
            "engine", f"'numpy' enumerates passive sets only up to K={MAX_ENUMERATION_COMPONENTS}, got K={K}",
            "use engine='numba'",
        )
    if use_numba and N:
        _kernel()(
            Y, np.ascontiguousarray(P), np.ascontiguousarray(M.T), np.ascontiguousarray(G),
            sat, check_sat, nonneg, tol_rel, MAX_ENUMERATION_COMPONENTS, out, status,
        )
    elif N:
        _numpy_engine(Y, P, M, sat, check_sat, nonneg, out, status)
    return out, status


def nnls_pixels(matrix, data, *, saturation=None, out_dtype=None, engine="auto", tol=1e-13):
    """Exact non-negative least squares for every pixel: ``min ||M x - y||, x >= 0``.

    Parameters
    ----------
    matrix : array_like, shape (C, K)
        Design matrix ``M`` (reference spectra as columns); full column rank.
    data : array_like, shape (C, N)
        One column per pixel, any real dtype; arithmetic is float64.
    saturation : float, optional
        Pixels where any channel is ``>= saturation`` give NaN and status 3.
    out_dtype : dtype, optional
        float32 for float32 data, float64 otherwise (the default).
    engine : {"auto", "numba", "numpy"}
        ``"auto"`` uses the compiled kernel.
    tol : float
        Relative tolerance of the optimality test ``w_j <= tol·||M||₁·max|y|``.

    Returns
    -------
    x : ndarray, shape (K, N)
        Non-negative solution; NaN where the pixel had a NaN or saturated channel.
    status : ndarray of uint8, shape (N,)
        0 no constraint active, 1 a constraint active, 2 NaN input, 3 saturated.

    Raises
    ------
    InputError
        On shape mismatch or an unknown engine.

    Notes
    -----
    The optimum of a full-column-rank NNLS problem is unique and its support ``P``
    satisfies the Karush–Kuhn–Tucker conditions ``x_P = (G_PP)⁻¹ (Mᵀy)_P > 0`` and
    ``w_j = (Mᵀy − G x)_j <= 0`` for ``j ∉ P``.  Any feasible passive-set solution has
    objective ``-½ (Mᵀy)_Pᵀ x_P`` relative to ``½||y||²``, which is how the enumeration
    engines pick the optimum without a tolerance.

    References
    ----------
    Lawson, C. L. & Hanson, R. J. Solving Least Squares Problems (Prentice-Hall, 1974),
    ch. 23. doi:10.1137/1.9781611971217
    Bro, R. & De Jong, S. A fast non-negativity-constrained least squares algorithm.
    J. Chemometrics 11, 393–401 (1997). doi:10.1002/(SICI)1099-128X(199709/10)11:5<393::AID-CEM483>3.0.CO;2-L

    Examples
    --------
    >>> import numpy as np
    >>> M = np.array([[1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
    >>> x, status = nnls_pixels(M, np.array([[2.0], [-1.0], [1.0]]))
    >>> np.round(x[:, 0], 6).tolist(), int(status[0])
    ([1.5, 0.0], 1)
    """
    M, Y, out_dtype, sat = _prepare(matrix, data, saturation, out_dtype, engine)
    return _run(M, Y, out_dtype, sat, True, engine, float(tol))


def lstsq_pixels(matrix, data, *, saturation=None, out_dtype=None, engine="auto"):
    """Unconstrained least squares for every pixel, ``x = (MᵀM)⁻¹Mᵀ y``.

    Same parameters, NaN/saturation handling and returns as :func:`nnls_pixels`
    (status is 0, 2 or 3).

    Examples
    --------
    >>> import numpy as np
    >>> M = np.array([[1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
    >>> x, _ = lstsq_pixels(M, np.array([[2.0], [-1.0], [1.0]]))
    >>> np.round(x[:, 0], 6).tolist()
    [2.0, -1.0]
    """
    M, Y, out_dtype, sat = _prepare(matrix, data, saturation, out_dtype, engine)
    return _run(M, Y, out_dtype, sat, False, engine, 0.0)
