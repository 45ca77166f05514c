"""Exact branch-and-bound search over precomputed response tables (the engine of :mod:`probeplan.design.search`).

Tables: ``response[s, p, f]`` (e⁻/s per pixel per µM of probe p through filter f
under source s), ``background[s, f]`` (probe-free background rate), ``uptake[s,
p, f]`` (nonspecific uptake rate of probe p) and the read noise of each filter's
camera.  :func:`exhaustive_search` returns the N best combinations of one
source, K probes and C filters by their worst per-probe unmixed SNR, exactly.

Exact pruning
-------------
Every term of a channel's variance is ≥ 0, so dropping probes from a set
only lowers the variances, and dropping unknowns from the unmixing only
lowers the others' variances (the inverse of a principal block of the Fisher
matrix is at most that block of the inverse).  Hence each probe's SNR in a set
is at most its SNR in any pair drawn from the set, evaluated with only that
pair's light in the noise: worst(P) ≤ min over pairs {a, b} ⊂ P of
w_ab(F), the pair's own worst SNR (for K = 1 the single-probe SNR
c·√(Σ_c M_ck²/σ²_c,k) plays that role).  A probe can then reach at most the
(K−1)-th largest of its pair bounds, and a filter set at most the K-th largest
of those.  Filter sets are visited in decreasing order of their bound, and
inside one the probe sets are built depth first, a branch being cut as soon as
the smallest pair bound among its probes falls below the N-th best value found
so far.  A combination is skipped only when its bound is below the N-th best
value (less a relative margin of 1e-6, and with a slack of 1e-13 on each pair's
2 × 2 determinant, both against rounding), so the N best combinations are
exactly those a brute-force evaluation finds (ties broken by source, then probe
indices, then filter indices).

References
----------
R. Neher, E. Neher, J. Microsc. 213, 46 (2004), doi:10.1111/j.1365-2818.2004.01262.x;
S. M. Kay, Fundamentals of Statistical Signal Processing: Estimation Theory
(Prentice Hall, 1993), ch. 3 (chapter from memory).
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass

import numba
import numpy as np

from probeplan.errors import input_error

__all__ = ["SearchOutcome", "exhaustive_search", "check_count", "DEFAULT_TOP", "MAX_COMBINATIONS", "SINGULAR_PIVOT",
           "VAR_FLOOR"]

#: Number of best combinations kept by default.
DEFAULT_TOP = 5
#: Largest search accepted by default (combinations of source × probe set × filter set).
MAX_COMBINATIONS = 1e10
#: Smallest pivot of the Cholesky factor of the unit-diagonal Fisher matrix counted as separable;
#: below it (weighted probe spectra agreeing to about 1e-6 in angle) the set is not separable, SNR 0.
SINGULAR_PIVOT = 1e-12

#: Variance floor (same as probeplan.model.channels.channel_report).
VAR_FLOOR = 1e-30
#: Relative margin under which an upper bound prunes (guards against rounding in the bound).
_PRUNE_MARGIN = 1e-6
#: Slack added to the 2 × 2 determinant of a pair bound, relative to F_aa·F_bb (covers rounding).
_PAIR_SLACK = 1e-13


@numba.njit(cache=True)
def _combinations(n, r, total):  # pragma: no cover - compiled
    out = np.empty((total, r), np.int32)
    idx = np.arange(r)
    for row in range(total):
        for j in range(r):
            out[row, j] = idx[j]
        j = r - 1
        while j >= 0 and idx[j] == n - r + j:
            j -= 1
        if j < 0:
            break
        idx[j] += 1
        for m in range(j + 1, r):
            idx[m] = idx[m - 1] + 1
    return out


@numba.njit(cache=True)
def _set_bounds(resp, upt, back, rvar, inv_t, conc, s, fset, k, single, pair, per_probe, tmp):  # pragma: no cover
    """Upper bounds for one (source, filter set); returns the bound of the whole filter set.

    single[p]: probe p's SNR with no other probe present (K = 1 only).  pair[a, b]: the
    worst SNR of the pair {a, b} with only their light in the noise, with a slack of
    _PAIR_SLACK × F_aa F_bb on the 2 × 2 determinant against rounding.  per_probe[p]: a bound
    for any set holding p (single, or the (K-1)-th largest pair bound of p).  The set bound is
    the K-th largest per_probe.
    """
    n_probe = resp.shape[1]
    n_ch = fset.shape[0]
    if k == 1:
        for p in range(n_probe):
            acc = 0.0
            for j in range(n_ch):
                f = fset[j]
                r = resp[s, p, f]
                var = (r * conc + back[s, f] + upt[s, p, f]) * inv_t + rvar[f]
                if var < VAR_FLOOR:
                    var = VAR_FLOOR
                acc += r * r / var
            single[p] = conc * math.sqrt(acc)
            per_probe[p] = single[p]
    else:
        for a in range(n_probe):
            for b in range(a + 1, n_probe):
                f11 = 0.0
                f22 = 0.0
                f12 = 0.0
                for j in range(n_ch):
                    f = fset[j]
                    ra = resp[s, a, f]
                    rb = resp[s, b, f]
                    var = ((ra + rb) * conc + back[s, f] + upt[s, a, f] + upt[s, b, f]) * inv_t + rvar[f]
                    if var < VAR_FLOOR:
                        var = VAR_FLOOR
                    f11 += ra * ra / var
                    f22 += rb * rb / var
                    f12 += ra * rb / var
                if f11 > 0.0 and f22 > 0.0:
                    det = f11 * f22 - f12 * f12 + _PAIR_SLACK * f11 * f22
                    if det < 0.0:
                        det = 0.0
                    w = conc * math.sqrt(det / max(f11, f22))
                else:
                    w = 0.0
                pair[a, b] = w
                pair[b, a] = w
        for p in range(n_probe):
            m = 0
            for q in range(n_probe):
                if q != p:
                    tmp[m] = pair[p, q]
                    m += 1
            tmp[:m].sort()
            per_probe[p] = tmp[m - (k - 1)]
    for p in range(n_probe):
        tmp[p] = per_probe[p]
    tmp[:n_probe].sort()
    return tmp[n_probe - k]


@numba.njit(cache=True)
def _unit_bounds(resp, upt, back, rvar, inv_t, conc, fsets, k):  # pragma: no cover - compiled
    n_src, n_probe = resp.shape[0], resp.shape[1]
    ub = np.empty((n_src, fsets.shape[0]))
    single = np.empty(n_probe)
    pair = np.zeros((n_probe, n_probe))
    per_probe = np.empty(n_probe)
    tmp = np.empty(n_probe)
    for s in range(n_src):
        for i in range(fsets.shape[0]):
            ub[s, i] = _set_bounds(resp, upt, back, rvar, inv_t, conc, s, fsets[i], k, single, pair, per_probe, tmp)
    return ub


@numba.njit(cache=True)
def _snr_of_set(rl, ul, bl, rv, inv_t, conc, sel, w, g, lo, out):  # pragma: no cover - compiled
    """Per-probe unmixed SNR of the probes ``sel`` (rows of rl/ul) into ``out``; returns the minimum."""
    k = sel.shape[0]
    n_ch = rl.shape[1]
    for c in range(n_ch):
        tot = bl[c]
        for j in range(k):
            tot += rl[sel[j], c] * conc + ul[sel[j], c]
        var = tot * inv_t + rv[c]
        if var < VAR_FLOOR:
            var = VAR_FLOOR
        w[c] = 1.0 / var
    for i in range(k):
        for j in range(i + 1):
            acc = 0.0
            for c in range(n_ch):
                acc += rl[sel[i], c] * rl[sel[j], c] * w[c]
            g[i, j] = acc
    for i in range(k):
        if not g[i, i] > 0.0:
            for j in range(k):
                out[j] = 0.0
            return 0.0
    # unit-diagonal form G = D^-1/2 F D^-1/2 (d_i = sqrt F_ii), lower triangle
    for i in range(k):
        out[i] = math.sqrt(g[i, i])
    for i in range(k):
        for j in range(i + 1):
            g[i, j] = g[i, j] / (out[i] * out[j])
    # Cholesky G = L L^T in place (lower triangle)
    for j in range(k):
        acc = g[j, j]
        for m in range(j):
            acc -= g[j, m] * g[j, m]
        if acc < SINGULAR_PIVOT:
            for jj in range(k):
                out[jj] = 0.0
            return 0.0
        ljj = math.sqrt(acc)
        g[j, j] = ljj
        for i in range(j + 1, k):
            acc = g[i, j]
            for m in range(j):
                acc -= g[i, m] * g[j, m]
            g[i, j] = acc / ljj
    # L^-1 (lower) into lo; [G^-1]_kk = sum_{i>=k} (L^-1)_ik^2
    for i in range(k):
        lo[i, i] = 1.0 / g[i, i]
        for j in range(i):
            acc = 0.0
            for m in range(j, i):
                acc += g[i, m] * lo[m, j]
            lo[i, j] = -acc / g[i, i]
    worst = np.inf
    for kk in range(k):
        acc = 0.0
        for i in range(kk, k):
            acc += lo[i, kk] * lo[i, kk]
        snr = conc * out[kk] / math.sqrt(acc)
        out[kk] = snr
        if snr < worst:
            worst = snr
    return worst


@numba.njit(cache=True)
def _key_better(val, s, prb, flt, top_val, top_src, top_prb, top_flt, i):  # pragma: no cover - compiled
    """Whether (−val, s, probes, filters) sorts before top entry i."""
    if val != top_val[i]:
        return val > top_val[i]
    if s != top_src[i]:
        return s < top_src[i]
    for j in range(prb.shape[0]):
        if prb[j] != top_prb[i, j]:
            return prb[j] < top_prb[i, j]
    for j in range(flt.shape[0]):
        if flt[j] != top_flt[i, j]:
            return flt[j] < top_flt[i, j]
    return False


@numba.njit(cache=True)
def _insert(worst, s, prb, flt, snr, sel, top_val, top_src, top_prb, top_flt, top_snr):  # pragma: no cover
    """Insert a combination into the sorted top-N arrays if its key beats the last entry."""
    n_top = top_val.shape[0]
    k = prb.shape[0]
    if not _key_better(worst, s, prb, flt, top_val, top_src, top_prb, top_flt, n_top - 1):
        return
    pos = n_top - 1
    while pos > 0 and _key_better(worst, s, prb, flt, top_val, top_src, top_prb, top_flt, pos - 1):
        top_val[pos] = top_val[pos - 1]
        top_src[pos] = top_src[pos - 1]
        for j in range(k):
            top_prb[pos, j] = top_prb[pos - 1, j]
            top_snr[pos, j] = top_snr[pos - 1, j]
        for j in range(flt.shape[0]):
            top_flt[pos, j] = top_flt[pos - 1, j]
        pos -= 1
    top_val[pos] = worst
    top_src[pos] = s
    for j in range(k):
        top_prb[pos, j] = prb[j]
        for m in range(k):
            if sel[m] == prb[j]:
                top_snr[pos, j] = snr[m]  # per-probe SNR in ascending probe-index order
    for j in range(flt.shape[0]):
        top_flt[pos, j] = flt[j]


@numba.njit(cache=True)
def _search_units(resp, upt, back, rvar, inv_t, conc, fsets, order_src, order_fs, order_ub, start, stop, k,
                  top_val, top_src, top_prb, top_flt, top_snr, prune, counters):  # pragma: no cover - compiled
    """Visit units (source, filter set) start..stop-1 in bound order; keep the N best keys.

    Inside a unit, probe sets are built depth first over the probes sorted by their bound;
    a branch is cut when its bound (the smallest pair bound among its probes) falls below
    the N-th best value.  counters: [0] combinations evaluated, [1] units with fewer than K
    probes above the bar, [2] set to 1 when the remaining units were cut by their bound.
    Returns the next unit index.
    """
    n_probe = resp.shape[1]
    n_ch = fsets.shape[1]
    n_top = top_val.shape[0]
    rl = np.empty((n_probe, n_ch))
    ul = np.empty((n_probe, n_ch))
    bl = np.empty(n_ch)
    rv = np.empty(n_ch)
    single = np.empty(n_probe)
    pair = np.zeros((n_probe, n_probe))
    per_probe = np.empty(n_probe)
    tmp = np.empty(n_probe)
    w = np.empty(n_ch)
    g = np.empty((k, k))
    lo = np.empty((k, k))
    snr = np.empty(k)
    idx = np.empty(k, np.int64)
    cur = np.empty(k)
    sel = np.empty(k, np.int64)
    prb = np.empty(k, np.int64)
    flt = np.empty(n_ch, np.int64)
    margin = 1.0 - _PRUNE_MARGIN
    for u in range(start, stop):
        bar = top_val[n_top - 1] * margin if prune else -np.inf
        if order_ub[u] < bar:
            counters[2] = 1
            return u
        s = order_src[u]
        for c in range(n_ch):
            flt[c] = fsets[order_fs[u], c]
            bl[c] = back[s, flt[c]]
            rv[c] = rvar[flt[c]]
            for p in range(n_probe):
                rl[p, c] = resp[s, p, flt[c]]
                ul[p, c] = upt[s, p, flt[c]]
        _set_bounds(resp, upt, back, rvar, inv_t, conc, s, flt, k, single, pair, per_probe, tmp)
        q = np.argsort(-per_probe, kind="mergesort")  # probes by bound, best first
        nq = n_probe
        while nq > 0 and per_probe[q[nq - 1]] < bar:
            nq -= 1
        if nq < k:
            counters[1] += 1
            continue
        level = 0
        idx[0] = -1
        while level >= 0:
            idx[level] += 1
            pos = idx[level]
            if pos > nq - (k - level):
                level -= 1
                continue
            p = q[pos]
            bound = per_probe[p]
            if bound < bar:  # probes are sorted by this bound: the rest of this level fails too
                level -= 1
                continue
            if level > 0 and cur[level - 1] < bound:
                bound = cur[level - 1]
            for i in range(level):
                if pair[p, sel[i]] < bound:
                    bound = pair[p, sel[i]]
            if bound < bar:
                continue
            sel[level] = p
            cur[level] = bound
            if level < k - 1:
                level += 1
                idx[level] = pos
                continue
            worst = _snr_of_set(rl, ul, bl, rv, inv_t, conc, sel, w, g, lo, snr)
            counters[0] += 1
            for j in range(k):  # probe indices ascending for the key (insertion sort, K small)
                v = sel[j]
                m = j - 1
                while m >= 0 and prb[m] > v:
                    prb[m + 1] = prb[m]
                    m -= 1
                prb[m + 1] = v
            _insert(worst, s, prb, flt, snr, sel, top_val, top_src, top_prb, top_flt, top_snr)
            if prune:
                bar = top_val[n_top - 1] * margin
    return stop


# --------------------------------------------------------------------------- search on tables


@dataclass
class SearchOutcome:
    """The N best combinations of an exhaustive search on precomputed tables, and its counts.

    ``worst_snr`` (N,), ``source`` (N,), ``probes`` (N, K) and ``filters`` (N, C) index
    the tables; ``snr`` (N, K) holds each probe's unmixed SNR in the order of ``probes``.
    """

    worst_snr: np.ndarray
    source: np.ndarray
    probes: np.ndarray
    filters: np.ndarray
    snr: np.ndarray
    total_combinations: int
    evaluated: int
    filter_sets_total: int
    filter_sets_skipped: int
    filter_sets_cut: int
    search_s: float

    @property
    def pruned(self) -> int:
        """Combinations ruled out by the bound without being evaluated."""
        return self.total_combinations - self.evaluated


def _check_table(name: str, value, shape: tuple[int, ...]) -> np.ndarray:
    arr = np.ascontiguousarray(value, dtype=np.float64)
    if arr.shape != shape:
        raise input_error(name, f"shape {arr.shape}", f"give shape {shape}")
    if not np.all(np.isfinite(arr)) or np.any(arr < 0):
        raise input_error(name, "has negative, NaN or inf entries", "give finite rates >= 0 (e-/s)")
    return arr


def check_count(name: str, value, low: int, high: int | None, fix: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise TypeError(f"{name}: expected an integer, got {value!r}")
    if value < low or (high is not None and value > high):
        raise input_error(name, f"got {value}", fix)
    return int(value)


def exhaustive_search(
    response_e_per_s_per_uM,
    background_e_per_s,
    uptake_e_per_s,
    read_noise_e,
    *,
    k: int,
    n_channels: int | None = None,
    exposure_s: float,
    concentration_uM: float,
    top: int = DEFAULT_TOP,
    prune: bool = True,
    max_combinations: float = MAX_COMBINATIONS,
    progress: Callable[[int, int], None] | None = None,
) -> SearchOutcome:
    """The ``top`` best (source, probe set, filter set) by worst-probe unmixed SNR, exactly.

    Parameters
    ----------
    response_e_per_s_per_uM : array_like, shape (S, P, F)
        Rate per binned pixel per µM of probe p through filter f under source s.
    background_e_per_s : array_like, shape (S, F)
        Probe-free background rate (autofluorescence + leakage + dark).
    uptake_e_per_s : array_like, shape (S, P, F)
        Each probe's nonspecific-uptake background rate at its background concentration.
    read_noise_e : array_like, shape (F,)
        Read noise (e- rms) of one binned pixel of the camera behind each filter.
    k : int
        Probes per set.
    n_channels : int, optional
        Filters per set, ``k`` by default; any number from ``k`` to F.
    exposure_s : float
        Exposure of every channel (s).
    concentration_uM : float
        Target concentration of every probe (µM).
    top : int
        Number of best combinations kept.
    prune : bool
        False evaluates every combination (for checks); the result is the same.
    max_combinations : float
        Refuse larger searches.
    progress : callable, optional
        Called as ``progress(filter_sets_done, filter_sets_total)``.

    Returns
    -------
    SearchOutcome

    Raises
    ------
    InputError
        Bad shapes or values, k or n_channels out of range, a search above ``max_combinations``.

    Notes
    -----
    See the module notes for the objective and the bound.  Sets whose
    unit-diagonal Fisher matrix has a Cholesky pivot below
    :data:`SINGULAR_PIVOT` (probes that look the same in these channels) get SNR 0.

    Examples
    --------
    Two probes, each seen only by its own filter, and a third filter seeing both
    (no background, no read noise, 1 s, 1 µM: own filters give √100 = 10 each; with
    filters 0 and 2 the Fisher matrix is [[125, 25], [25, 25]] and probe 2 gets
    1/√(125/2500) = √20):

    >>> r = np.array([[[100.0, 0.0, 50.0], [0.0, 100.0, 50.0]]])
    >>> out = exhaustive_search(r, np.zeros((1, 3)), np.zeros((1, 2, 3)), np.zeros(3), k=2,
    ...                         exposure_s=1.0, concentration_uM=1.0, top=3)
    >>> out.filters.tolist(), [round(v, 3) for v in out.worst_snr.tolist()]
    ([[0, 1], [0, 2], [1, 2]], [10.0, 4.472, 4.472])
    """
    resp = np.asarray(response_e_per_s_per_uM, dtype=np.float64)
    if resp.ndim != 3:
        raise input_error("response_e_per_s_per_uM", f"shape {resp.shape}", "give a (sources, probes, filters) array")
    n_src, n_probe, n_filt = resp.shape
    resp = _check_table("response_e_per_s_per_uM", resp, (n_src, n_probe, n_filt))
    back = _check_table("background_e_per_s", background_e_per_s, (n_src, n_filt))
    upt = _check_table("uptake_e_per_s", uptake_e_per_s, (n_src, n_probe, n_filt))
    read = _check_table("read_noise_e", read_noise_e, (n_filt,))
    k = check_count("k", k, 1, n_probe, f"choose 1 to {n_probe} probes per set (there are {n_probe} candidates)")
    n_ch = k if n_channels is None else check_count(
        "n_channels", n_channels, k, None, f"give at least k = {k} channels (unmixing needs one per probe)")
    if n_ch > n_filt:
        raise input_error("candidate_filters", f"{n_filt} filters for {n_ch} channels",
                          f"give at least {n_ch} candidate filters or lower k / n_channels")
    top = check_count("top", top, 1, None, "keep at least 1 combination")
    t = float(exposure_s)
    c = float(concentration_uM)
    if not (math.isfinite(t) and t > 0):
        raise input_error("exposure_s", f"got {exposure_s!r}", "give a positive exposure in s")
    if not (math.isfinite(c) and c > 0):
        raise input_error("concentration_uM", f"got {concentration_uM!r}", "give a positive concentration in µM")
    n_fsets = math.comb(n_filt, n_ch)
    total = n_src * math.comb(n_probe, k) * n_fsets
    if total > max_combinations:
        raise input_error("search size", f"{total:.3g} combinations (limit {max_combinations:.3g})",
                          "give fewer candidate probes or filters, or a smaller k")
    start = time.perf_counter()
    fsets = _combinations(n_filt, n_ch, n_fsets)
    rvar = read**2 / t**2
    inv_t = 1.0 / t
    ub = _unit_bounds(resp, upt, back, rvar, inv_t, c, fsets, k)
    order = np.argsort(-ub.ravel(), kind="stable")
    order_src = (order // n_fsets).astype(np.int64)
    order_fs = (order % n_fsets).astype(np.int64)
    order_ub = ub.ravel()[order]
    top_val = np.full(top, -np.inf)
    top_src = np.full(top, np.iinfo(np.int64).max, dtype=np.int64)
    top_prb = np.full((top, k), np.iinfo(np.int64).max, dtype=np.int64)
    top_flt = np.full((top, n_ch), np.iinfo(np.int64).max, dtype=np.int64)
    top_snr = np.zeros((top, k))
    counters = np.zeros(3, dtype=np.int64)
    n_units = order.size
    chunk = max(1, n_units // 200)
    u = 0
    while u < n_units:
        stop = min(n_units, u + chunk)
        nxt = _search_units(resp, upt, back, rvar, inv_t, c, fsets, order_src, order_fs, order_ub, u, stop, k,
                            top_val, top_src, top_prb, top_flt, top_snr, bool(prune), counters)
        u = n_units if counters[2] else nxt
        if progress is not None:
            progress(u, n_units)
    cut = (n_units - nxt) if counters[2] else 0
    keep = np.isfinite(top_val)
    return SearchOutcome(
        worst_snr=top_val[keep], source=top_src[keep], probes=top_prb[keep], filters=top_flt[keep],
        snr=top_snr[keep], total_combinations=int(total), evaluated=int(counters[0]), filter_sets_total=int(n_units),
        filter_sets_skipped=int(counters[1]), filter_sets_cut=int(cut), search_s=time.perf_counter() - start,
    )


# --------------------------------------------------------------------------- the design search
