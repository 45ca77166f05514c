"""Batched exact non-negative least squares for many pixels sharing one design matrix.

Every pixel ``n`` of an image stack solves ``min ||M x - y_n||`` subject to ``x >= 0``
with the same ``(C, K)`` matrix ``M``.  Because ``M`` is shared, its Gram matrix
``G = MᵀM`` and pseudo-inverse are computed once (Bro & De Jong 1997) and each pixel
costs a few small matrix-vector products.

Two engines give the same answer (both in float64 arithmetic whatever the input dtype):

``"numba"``
    A compiled kernel.  Per block of pixels it computes the unconstrained solution
    ``x = M⁺ y`` (vectorised over pixels); where every component is ``>= 0`` that *is*
    the NNLS optimum.  For ``K <= 8`` the other pixels are solved on a table computed once
    per matrix: for every passive set ``P`` (all ``2^K`` of them) a ``K x K`` matrix that
    turns ``x`` into the least-squares solution on ``P`` and the gradient off ``P``, so that
    testing ``P`` against the Karush–Kuhn–Tucker conditions costs one small product.
    Two cheap tests come first, on the whole block at once with no data moved: where exactly
    one component ``j`` is negative, the solution without ``j`` is the rank-one update
    ``x − x_j H_{:j} / H_jj`` (``H = G⁻¹``), whose gradient at ``j`` is negative by construction;
    where a pair ``Z`` of components is negative (in ``x`` or in that update), the solution
    off ``Z`` is ``x − H_{:Z} α`` with ``α = (H_ZZ)⁻¹ x_Z``, its gradient on ``Z`` (the Schur
    complement form of the restricted normal equations).  Pixels these settle are done; on
    images where half the probes are absent from half the field they are most of them.
    Starting from ``P = {k: x_k > 0}``, the other pending pixels are sorted by passive set and tested
    together (vectorised over pixels); every variable that breaks a condition is exchanged
    at once (block principal pivoting, Júdice & Pires 1994; Kim & Park 2011).  Pixels not
    settled after a few rounds finish one by one with the method's backup rule, which
    guarantees termination.  For larger ``K`` (or as a last safeguard) the Lawson–Hanson
    active-set method runs on ``G = MᵀM`` and ``Mᵀy``, and, should it not converge within
    ``3K`` steps on a degenerate pixel, all ``2^K`` passive sets are enumerated (``K <= 12``).
``"numpy"``
    Pure numpy, ``K <= 12``: all ``2^K`` passive sets are solved for all pixels at once
    and each pixel keeps the feasible one with the lowest objective.

Status codes returned per pixel: :data:`STATUS_INTERIOR` (no constraint active),
:data:`STATUS_CONSTRAINED`, :data:`STATUS_NAN` (a channel was NaN, +inf or -inf: the pixel is
invalid; output NaN),
:data:`STATUS_SATURATED` (a channel reached the saturation level; output NaN).
"""

from __future__ import annotations

import numba
import numpy as np
from numba import njit

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

#: Largest number of components for which the KKT test of every passive set is tabulated
#: (2^K matrices of K x K: 512 KiB at K = 8).
MAX_TABLE_COMPONENTS = 8
# Relative tolerance of the tabulated KKT test (its gradients are formed from the unconstrained
# solution, a few hundred rounding errors away from Mᵀy for well-conditioned references).
_TABLE_TOL = 1e-11

ENGINES = ("auto", "numba", "numpy")

_BATCH = 4096  # pending constrained pixels solved together on the table
_ROUNDS = 4  # vectorised exchange rounds before the remaining pixels finish one by one
_DROP_PAIRS = 4  # most pairs of components tried per block by _drop_two
_BLOCK = 256  # pixels per block in the compiled kernel (its float64 work arrays stay in L1 for K <= 8)


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

@njit(cache=True)
def _passive_set_table(G):
    # For every passive set P (bit mask m) one K x K matrix T[m] such that, with x the
    # unconstrained solution and b = G x = Mᵀy, v = T[m] @ x gives v_P = (G_PP)⁻¹ b_P (the
    # least-squares solution on P) and v_Z = b_Z − G_ZP v_P (the gradient off P).  Testing a
    # passive set against the KKT conditions is then one K x K product per pixel.
    K = G.shape[0]
    T = np.zeros((1 << K, K, K))
    S = np.zeros((K, K))
    passive = np.zeros(K, dtype=np.bool_)
    A = np.empty((K, K))
    idx = np.empty(K, dtype=np.int64)
    e = np.zeros(K)
    s = np.empty(K)
    inv = np.empty((K, K))
    for m in range(1 << K):
        for j in range(K):
            passive[j] = (m >> j) & 1 == 1
        for q in range(K):
            for j in range(K):
                inv[j, q] = 0.0
            if passive[q]:
                e[q] = 1.0
                _solve_subset(G, e, passive, A, idx, s)
                e[q] = 0.0
                for j in range(K):
                    inv[j, q] = s[j]
        # S: v = S @ b
        for j in range(K):
            if passive[j]:
                for q in range(K):
                    S[j, q] = inv[j, q]
            else:
                for q in range(K):
                    if passive[q]:
                        v = 0.0
                        for r in range(K):
                            v -= G[j, r] * inv[r, q]
                        S[j, q] = v
                    else:
                        S[j, q] = 1.0 if q == j else 0.0
        for j in range(K):
            for q in range(K):
                v = 0.0
                for r in range(K):
                    v += S[j, r] * G[r, q]
                T[m, j, q] = v
    return T

@njit(cache=True)
def _principal_pivoting(T, xu, mask, tol, x, v):
    # Block principal pivoting (Júdice & Pires 1994; Kim & Park 2011, Algorithm 2) on the
    # precomputed table: exchange every variable that breaks the KKT conditions at once, with
    # the single-variable backup rule that guarantees termination.  Returns False if it did
    # not settle within its step budget (the caller then falls back to Lawson-Hanson).
    K = xu.shape[0]
    best_bad = K + 1
    backup = 3
    for _ in range(8 * K + 8):
        flip = 0
        nbad = 0
        last = 0
        for j in range(K):
            t = 0.0
            for q in range(K):
                t += T[mask, j, q] * xu[q]
            v[j] = t
            inside = (mask >> j) & 1
            wrong = (inside == 1 and t < 0.0) or (inside == 0 and t > tol)
            flip |= wrong << j
            nbad += wrong
            if wrong:
                last = j
        if nbad == 0:
            for j in range(K):
                x[j] = v[j] if (mask >> j) & 1 else 0.0
            return True
        if nbad < best_bad:
            best_bad = nbad
            backup = 3
            mask ^= flip
        elif backup > 0:
            backup -= 1
            mask ^= flip
        else:
            mask ^= 1 << last
    return False

@njit(cache=True, fastmath={"contract"})
def _accumulate(P, Y, i0, n, acc, yrow):
    # acc[:, :n] = P @ Y[:, i0:i0+n] in float64.  The channels go four at a time: their rows are
    # converted once into yrow (4, _BLOCK), then each component's row takes all four in one pass, so
    # that acc is loaded and stored once per four multiply-adds; one-dimensional views let LLVM
    # vectorise the loops over pixels.
    K, C = P.shape
    for c0 in range(0, C, 4):
        m = min(4, C - c0)
        for r in range(m):
            src = Y[c0 + r, i0 : i0 + n]
            yy = yrow[r, :n]
            for i in range(n):
                yy[i] = src[i]
        for r in range(m, 4):
            yrow[r, :n] = 0.0
        y0 = yrow[0, :n]
        y1 = yrow[1, :n]
        y2 = yrow[2, :n]
        y3 = yrow[3, :n]
        for k in range(K):
            a = acc[k, :n]
            p0 = P[k, c0]
            p1 = P[k, c0 + 1] if m > 1 else 0.0
            p2 = P[k, c0 + 2] if m > 2 else 0.0
            p3 = P[k, c0 + 3] if m > 3 else 0.0
            if c0 == 0:
                for i in range(n):
                    a[i] = p0 * y0[i] + p1 * y1[i] + p2 * y2[i] + p3 * y3[i]
            else:
                for i in range(n):
                    a[i] += p0 * y0[i] + p1 * y1[i] + p2 * y2[i] + p3 * y3[i]

@njit(cache=True)
def _lawson_hanson_pixel(Y, col, Mt, G, tol_rel, normM, max_enum, x, passive, w, s, A, idx, y, b):
    # the general path for one pixel: Lawson-Hanson on b = Mᵀy, then enumeration if it stalls
    C = Y.shape[0]
    K = G.shape[0]
    ymax = 0.0
    for c in range(C):
        y[c] = np.float64(Y[c, col])
        ymax = max(ymax, abs(y[c]))
    for k in range(K):
        v = 0.0
        for c in range(C):
            v += Mt[k, c] * y[c]
        b[k] = v
    if not _lawson_hanson(G, b, tol_rel * normM * ymax, x, passive, w, s, A, idx):
        if K <= max_enum:
            _enumerate(G, b, x, passive, s, A, idx)

@njit(cache=True, fastmath={"contract"})
def _table_batch(T, xs, masks, tols, cols, n, out):
    # Pixels with a negative unconstrained component (columns ``cols``, unconstrained solutions
    # ``xs``, starting passive sets ``masks``), solved on the table.  Each round sorts the pending
    # pixels by passive set, tests each set's pixels together (one K x K product vectorised over
    # pixels) and exchanges every variable that breaks the KKT conditions (block principal
    # pivoting without its backup rule).  The few still pending after the rounds finish one by
    # one with the backup rule; the columns of any left over are returned in cols[:nleft] for
    # Lawson-Hanson.  Overwrites xs, masks, tols, cols.
    K = xs.shape[0]
    nm = 1 << K
    count = np.empty(nm + 1, dtype=np.int64)
    xs2 = np.empty((K, n))
    tols2 = np.empty(n)
    cols2 = np.empty(n, dtype=np.int64)
    V = np.empty((K, n))
    flip = np.empty(n, dtype=np.int64)
    for _ in range(_ROUNDS):
        if n == 0:
            break
        # counting sort by passive set into xs2/tols2/cols2
        for m in range(nm + 1):
            count[m] = 0
        for t in range(n):
            count[masks[t] + 1] += 1
        for m in range(nm):
            count[m + 1] += count[m]
        for t in range(n):
            m = masks[t]
            d = count[m]
            count[m] = d + 1
            for k in range(K):
                xs2[k, d] = xs[k, t]
            tols2[d] = tols[t]
            cols2[d] = cols[t]
        # count[m] is now the end of group m
        keep = 0
        lo = 0
        for m in range(nm):
            hi = count[m]
            if hi == lo:
                continue
            fl = flip[lo:hi]
            tg = tols2[lo:hi]
            cg = cols2[lo:hi]
            fl[:] = 0
            for j in range(K):
                vj = V[j, lo:hi]
                coef = T[m, j, 0]
                g = xs2[0, lo:hi]
                for t in range(hi - lo):
                    vj[t] = coef * g[t]
                for q in range(1, K):
                    coef = T[m, j, q]
                    g = xs2[q, lo:hi]
                    for t in range(hi - lo):
                        vj[t] += coef * g[t]
                bit = 1 << j
                o = out[j]
                if (m >> j) & 1:
                    for t in range(hi - lo):
                        fl[t] |= (vj[t] < 0.0) * bit
                        o[cg[t]] = vj[t]
                else:
                    for t in range(hi - lo):
                        fl[t] |= (vj[t] > tg[t]) * bit
                        o[cg[t]] = 0.0
            # pixels that broke a condition go on with the exchanged set (their output is rewritten)
            for t in range(hi - lo):
                if fl[t]:
                    for k in range(K):
                        xs[k, keep] = xs2[k, lo + t]
                    masks[keep] = m ^ fl[t]
                    tols[keep] = tg[t]
                    cols[keep] = cg[t]
                    keep += 1
            lo = hi
        n = keep
    nleft = 0
    if n:
        xu = np.empty(K)
        x = np.empty(K)
        v = np.empty(K)
        for t in range(n):
            for k in range(K):
                xu[k] = xs[k, t]
            if _principal_pivoting(T, xu, masks[t], tols[t], x, v):
                for k in range(K):
                    out[k, cols[t]] = x[k]
            else:
                cols[nleft] = cols[t]
                nleft += 1
    return nleft


@njit(cache=True)
def _fallback_pixels(Y, cols, n, Mt, G, tol_rel, normM, max_enum, out):
    # pixels on which the tabulated method did not settle (a safeguard): Lawson-Hanson from Mᵀy
    C = Y.shape[0]
    K = G.shape[0]
    x = np.empty(K)
    passive = np.zeros(K, dtype=np.bool_)
    w = np.empty(K)
    s = np.empty(K)
    A = np.empty((K, K))
    idx = np.empty(K, dtype=np.int64)
    y = np.empty(C)
    b = np.empty(K)
    for t in range(n):
        _lawson_hanson_pixel(Y, cols[t], Mt, G, tol_rel, normM, max_enum, x, passive, w, s, A, idx, y, b)
        for k in range(K):
            out[k, cols[t]] = x[k]


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

@njit(cache=True, fastmath={"contract"})
def _drop_one(acc, flag, n, R, i0, out, status, cand, cnt, s):
    # Pixels of the block with exactly one negative unconstrained component j: the least-squares
    # solution without j is the rank-one update x - x_j R[j] (R[j] = H[j] / H[j, j], H = G⁻¹), and
    # the gradient at j is x_j / H[j, j] < 0, so that set is optimal when the update has no negative
    # component.  Computed for every pixel at once, vectorised (a pixel's j enters through a select);
    # the pixels settled this way are written out and their flag cleared.
    K = acc.shape[0]
    cn = cnt[:n]
    cn[:] = 0
    for k in range(K):
        a = acc[k, :n]
        for i in range(n):
            cn[i] += a[i] < 0.0
    for k in range(K):
        cand[k, :n] = acc[k, :n]
    sj = s[:n]
    for j in range(K):
        a = acc[j, :n]
        for i in range(n):
            sj[i] = a[i] if (a[i] < 0.0) & (cn[i] == 1) else 0.0
        for k in range(K):
            r = R[j, k]
            c = cand[k, :n]
            for i in range(n):
                c[i] -= sj[i] * r
    for i in range(n):
        cn[i] = (cn[i] == 1) & (flag[i] == 1)
    for k in range(K):
        c = cand[k, :n]
        for i in range(n):
            cn[i] &= c[i] >= 0.0
    for k in range(K):
        c = cand[k, :n]
        o = out[k, i0 : i0 + n]
        for i in range(n):
            o[i] = c[i] if cn[i] else o[i]
    for i in range(n):
        status[i0 + i] = cn[i]
        flag[i] = flag[i] & ~cn[i]


@njit(cache=True, fastmath={"contract"})
def _drop_two(acc, cand, flag, n, H, i0, tol_scale, out, status, zm, ok, scale, al, bl, seen, distinct):
    # Pixels still pending after _drop_one whose negative components, in x or in the rank-one update,
    # form a pair Z = {a, b}: the least-squares solution off Z is x - H[:, Z] α with α = (H_ZZ)⁻¹ x_Z,
    # and α is the gradient on Z, so that set is optimal when α <= tol and the solution has no negative
    # component.  One vectorised pass over the block per pair present (at most _DROP_PAIRS of them).
    K = acc.shape[0]
    z = zm[:n]
    sc = scale[:n]
    z[:] = 0
    sc[:] = 0.0
    for k in range(K):
        a = acc[k, :n]
        c = cand[k, :n]
        for i in range(n):
            z[i] |= ((a[i] < 0.0) | (c[i] < 0.0)) << k
            sc[i] = max(sc[i], abs(a[i]))
    nd = 0
    for i in range(n):
        zi = z[i] if flag[i] == 1 else 0
        z[i] = zi
        rest = zi & (zi - 1)
        if rest != 0 and (rest & (rest - 1)) == 0 and not seen[zi]:
            seen[zi] = True
            distinct[nd] = zi
            nd += 1
    for d in range(nd):
        seen[distinct[d]] = False
    if nd > _DROP_PAIRS:
        return
    o_k = ok[:n]
    aa = al[:n]
    bb = bl[:n]
    for d in range(nd):
        zz = distinct[d]
        ia = 0
        while not (zz >> ia) & 1:
            ia += 1
        ib = ia + 1
        while not (zz >> ib) & 1:
            ib += 1
        haa = H[ia, ia]
        hbb = H[ib, ib]
        hab = H[ia, ib]
        rdet = 1.0 / (haa * hbb - hab * hab)
        xa = acc[ia, :n]
        xb = acc[ib, :n]
        for i in range(n):
            u = (hbb * xa[i] - hab * xb[i]) * rdet
            v = (haa * xb[i] - hab * xa[i]) * rdet
            aa[i] = u
            bb[i] = v
            o_k[i] = (z[i] == zz) & (u <= tol_scale * sc[i]) & (v <= tol_scale * sc[i])
        for k in range(K):
            if k == ia or k == ib:
                continue
            a = acc[k, :n]
            c = cand[k, :n]
            h1 = H[k, ia]
            h2 = H[k, ib]
            for i in range(n):
                c[i] = a[i] - aa[i] * h1 - bb[i] * h2
                o_k[i] &= c[i] >= 0.0
        for k in range(K):
            o = out[k, i0 : i0 + n]
            c = cand[k, :n]
            if k == ia or k == ib:
                for i in range(n):
                    o[i] = 0.0 if o_k[i] else o[i]
            else:
                for i in range(n):
                    o[i] = c[i] if o_k[i] else o[i]
        for i in range(n):
            status[i0 + i] |= o_k[i]
            flag[i] = flag[i] & ~o_k[i]
            z[i] = 0 if o_k[i] else z[i]


@njit(cache=True, nogil=True)
def _nnls_range(Y, P, Mt, G, T, R, H, use_table, sat, check_sat, nonneg, tol_rel, table_tol, max_enum, normM, gnorm,
                out, status, b0, b1):
    # blocks b0..b1-1 of _BLOCK pixels, one thread
    C, N = Y.shape
    K = P.shape[0]
    acc = np.empty((K, _BLOCK))
    yrow = np.empty((4, _BLOCK))
    flag = np.empty(_BLOCK, dtype=np.uint8)
    bad = np.empty(_BLOCK, dtype=np.bool_)
    table = nonneg and use_table
    nbatch = _BATCH if table else 1
    xs = np.empty((K, nbatch))
    masks = np.empty(nbatch, dtype=np.int64)
    tols = np.empty(nbatch)
    cols = np.empty(nbatch, dtype=np.int64)
    npend = 0
    cand = np.empty((K, _BLOCK))
    cnt = np.empty(_BLOCK, dtype=np.uint8)
    sbuf = np.empty(_BLOCK)
    zm = np.empty(_BLOCK, dtype=np.int64)
    okb = np.empty(_BLOCK, dtype=np.uint8)
    scale_b = np.empty(_BLOCK)
    al = np.empty(_BLOCK)
    bl = np.empty(_BLOCK)
    seen = np.zeros(1 << K if table else 1, dtype=np.bool_)
    distinct = np.empty(1 << K if table else 1, dtype=np.int64)
    for bi in range(b0, b1):
        i0 = bi * _BLOCK
        n = min(N, i0 + _BLOCK) - i0
        # unconstrained solution for the block, vectorised over pixels (float64 arithmetic)
        _accumulate(P, Y, i0, n, acc, yrow)
        # flag 0: done; 1: a negative component (NNLS to solve); >= 2: NaN/inf/saturated
        for i in range(n):
            flag[i] = 0
        if check_sat:
            for c in range(C):
                yy = Y[c, i0 : i0 + n]
                for i in range(n):
                    flag[i] |= (yy[i] >= sat) << 1
        for k in range(K):
            a = acc[k, :n]
            o = out[k, i0 : i0 + n]
            for i in range(n):
                v = a[i]
                o[i] = v
                flag[i] |= (v < 0.0) | ((not abs(v) < np.inf) << 1)
        nneg = 0
        nspecial = 0
        for i in range(n):
            status[i0 + i] = 0
            f = flag[i]
            nneg += f == 1
            nspecial += f >= 2
        if not nonneg:
            nneg = 0
        if nneg and table:
            _drop_one(acc, flag, n, R, i0, out, status, cand, cnt, sbuf)
            _drop_two(acc, cand, flag, n, H, i0, table_tol * gnorm, out, status, zm, okb, scale_b, al, bl, seen, distinct)
            for i in range(n):
                if flag[i] == 1:
                    mask = 0
                    scale = 0.0
                    for k in range(K):
                        v = acc[k, i]
                        xs[k, npend] = v
                        mask |= (v > 0.0) << k
                        scale = max(scale, abs(v))
                    masks[npend] = mask
                    tols[npend] = table_tol * gnorm * scale
                    cols[npend] = i0 + i
                    status[i0 + i] = 1
                    npend += 1
            if npend > _BATCH - _BLOCK:
                nleft = _table_batch(T, xs, masks, tols, cols, npend, out)
                if nleft:
                    _fallback_pixels(Y, cols, nleft, Mt, G, tol_rel, normM, max_enum, out)
                npend = 0
            nneg = 0
        if nneg or nspecial:
            for i in range(n):
                bad[i] = flag[i] >= 2 or (nneg > 0 and flag[i] == 1)
            _slow_pixels(Y, acc, bad, i0, n, Mt, G, sat, check_sat, nonneg, tol_rel, normM, max_enum, out, status)
    if npend:
        nleft = _table_batch(T, xs, masks, tols, cols, npend, out)
        if nleft:
            _fallback_pixels(Y, cols, nleft, Mt, G, tol_rel, normM, max_enum, out)

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
        G = np.ascontiguousarray(G)
        Mt = np.ascontiguousarray(M.T)
        use_table = nonneg and K <= MAX_TABLE_COMPONENTS
        T = _passive_set_table(G) if use_table else np.zeros((1, 1, 1))
        H = np.linalg.inv(G)
        R = np.ascontiguousarray(H / np.diag(H)[:, None])  # R[j] = H[j] / H[j, j] (H is symmetric)
        normM = float(np.abs(M).sum(axis=0).max())
        gnorm = float(np.abs(G).sum(axis=1).max())
        P = np.ascontiguousarray(P)
        nblocks = -(-N // _BLOCK)
        nthreads = max(1, min(int(numba.config.NUMBA_NUM_THREADS), nblocks))
        nranges = min(nblocks, 4 * nthreads)

        def blocks(r):
            _nnls_range(Y, P, Mt, G, T, R, H, use_table, sat, check_sat, nonneg, tol_rel, max(tol_rel, _TABLE_TOL),
                        MAX_ENUMERATION_COMPONENTS, normM, gnorm, out, status,
                        r * nblocks // nranges, (r + 1) * nblocks // nranges)

        # the compiled function releases the GIL: threads share the ranges of blocks (plain threads
        # instead of numba's parallel loops, whose compilation costs seconds per input dtype)
        if nthreads == 1:
            for r in range(nranges):
                blocks(r)
        else:
            from concurrent.futures import ThreadPoolExecutor

            with ThreadPoolExecutor(nthreads) as pool:
                list(pool.map(blocks, range(nranges)))
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
    Júdice, J. J. & Pires, F. M. A block principal pivoting algorithm for large-scale strictly
    monotone linear complementarity problems. Computers & Operations Research 21, 587–596 (1994).
    Kim, J. & Park, H. Fast nonnegative matrix factorization: an active-set-like method and
    comparisons. SIAM J. Sci. Comput. 33, 3261–3281 (2011), Algorithm 2 (block principal pivoting).

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
