"""Exhaustive search for the probe / emission filter / source combination with the best worst-case unmixed SNR.

The objective
-------------
For a set P of K probes imaged through a set F of C ≥ K emission filters (one
channel per filter) under one excitation source s, the response matrix is
M = R[s, P, F]ᵀ (C × K), with R[s, p, f] the photoelectron rate per binned
pixel per µM of probe p in a target inclusion at the target depth
(:func:`probeplan.fluorescence.probe_rate_e_per_s`).  Each channel's noise
variance of the rate estimate is, as in :func:`probeplan.channels.channel_report`::

    σ²_c = (c·Σ_k M_ck + B_c + Σ_k U_kc) / t + σ_read² / t²

with c the target concentration (µM), B_c the probe-free background rate
(autofluorescence + excitation leakage + dark current), U_kc the nonspecific
uptake of probe k at c / TBR in the surrounding tissue, t the exposure (s) and
σ_read the read noise of one binned pixel.  Each probe's unmixed SNR is
SNR_k = c / √[(MᵀΣ⁻¹M)⁻¹]_kk and the search maximises min_k SNR_k over every
source, every K-subset of the candidate probes and every C-subset of the
candidate filters.

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

The irradiance of each source is its cap (the skin MPE by default): every
light signal and background scales with it while dark current and read noise
do not, so the Fisher matrix a²Mᵀ(aL + D)⁻¹M grows with the scale a and no
lower irradiance can give a higher SNR.  The same holds for the exposure.

Cameras
-------
With one camera every channel uses it.  With several (e.g. a silicon camera
and an InGaAs camera), each filter is assigned, once and before the search, the
camera with the largest band-integrated QE × transmission
∫T(λ)·QE(λ)dλ over 300-2000 nm: silicon below about 1000 nm, InGaAs above.
This is a simple rule of our own: it ignores the cameras' noise figures.

References
----------
R. Neher, E. Neher, "Optimizing imaging parameters for the separation of
multiple labels in a fluorescence image", J. Microsc. 213, 46 (2004),
doi:10.1111/j.1365-2818.2004.01262.x (unmixed SNR and noise amplification).
The bounds use two standard matrix facts for a positive-definite Fisher
matrix F: [F⁻¹]_kk ≥ 1/F_kk, and the inverse of a principal block is at most
the same block of F⁻¹ (Schur complement); e.g. S. M. Kay, Fundamentals of
Statistical Signal Processing: Estimation Theory (Prentice Hall, 1993), ch. 3
(chapter from memory).
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numba
import numpy as np

from probeplan import optics, safety
from probeplan.channels import SEPARABLE_CONDITION_LIMIT, condition_number, noise_amplification
from probeplan.errors import input_error
from probeplan.fluorescence import Autofluorescence, background_rates, probe_rate_e_per_s
from probeplan.tissue import Tissue, tissue_preset

__all__ = [
    "DesignCandidate",
    "DesignResult",
    "SearchOutcome",
    "design",
    "exhaustive_search",
    "probe_series",
    "filter_grid",
    "camera_for_filter",
    "DEFAULT_TOP",
    "MAX_COMBINATIONS",
    "SINGULAR_PIVOT",
    "ROSE_SNR",
]

#: Number of best combinations kept by default.
DEFAULT_TOP = 5
#: Largest search accepted by default (combinations of source × probe set × filter set).
MAX_COMBINATIONS = 1e10
#: Smallest pivot of the Cholesky factor of the unit-diagonal Fisher matrix counted as separable;
#: below it (weighted probe spectra agreeing to about 1e-6 in angle) the set is not separable, SNR 0.
SINGULAR_PIVOT = 1e-12
#: SNR of 5 for a detectable object (Rose criterion; common practice in imaging).
ROSE_SNR = 5.0
#: Variance floor (same as probeplan.channels.channel_report).
_VAR_FLOOR = 1e-30
#: Relative margin under which an upper bound prunes (guards against rounding in the bound).
_PRUNE_MARGIN = 1e-6
#: Slack added to the 2 × 2 determinant of a pair bound, relative to F_aa·F_bb (covers rounding).
_PAIR_SLACK = 1e-13
#: Relative difference in worst SNR reported as a tie in the explanation.
_TIE_FRACTION = 1e-3
#: Wavelength grid for the camera assignment rule (nm).
_ASSIGN_GRID_NM = np.arange(300.0, 2000.5, 1.0)
#: Excitation counted as beyond a probe's absorption edge within this margin (nm).
_EDGE_MARGIN_NM = 0.01


# --------------------------------------------------------------------------- candidate generators


def probe_series(material: str, start_nm: float, stop_nm: float, step_nm: float, **overrides: Any) -> list:
    """Probes of one material at emission peaks start, start + step, … ≤ stop (nm).

    Parameters
    ----------
    material : str
        Library material (:func:`probeplan.dots.list_materials`).
    start_nm, stop_nm, step_nm : float
        Emission peaks in nm; ``stop_nm`` is included when on the grid.
    **overrides
        Passed to :func:`probeplan.dots.make_probe` (``quantum_yield``, ``fwhm_nm``, …).

    Raises
    ------
    InputError
        A non-positive step, a stop below the start, or a peak outside the material's range.

    Examples
    --------
    >>> [p.name for p in probe_series("CdTe", 660, 700, 20)]
    ['CdTe 660 nm', 'CdTe 680 nm', 'CdTe 700 nm']
    """
    from probeplan import dots

    start, stop, step = (float(v) for v in (start_nm, stop_nm, step_nm))
    if not (math.isfinite(step) and step > 0) or not (math.isfinite(start) and math.isfinite(stop)) or stop < start:
        raise input_error("probe series", f"{material}:{start:g}-{stop:g}:{step:g}",
                          "give START-STOP:STEP in nm with STOP >= START and STEP > 0, e.g. CdTeSe:660-840:20")
    peaks = start + step * np.arange(int(math.floor((stop - start) / step + 1e-9)) + 1)
    return [dots.make_probe(material, float(round(p, 6)), **overrides) for p in peaks]


def filter_grid(centres_nm, widths_nm, *, blocking_od: float | None = None) -> list:
    """Bandpass filters at every centre × width (nm), named in trade notation (``"700/30"``).

    Examples
    --------
    >>> [f.name for f in filter_grid([700, 710], [20, 40])]
    ['700/20', '700/40', '710/20', '710/40']
    """
    centres = np.atleast_1d(np.asarray(centres_nm, dtype=np.float64))
    widths = np.atleast_1d(np.asarray(widths_nm, dtype=np.float64))
    if centres.size == 0 or widths.size == 0 or not np.all(np.isfinite(centres)) or not np.all(np.isfinite(widths)):
        raise input_error("filter grid", f"centres {centres.tolist()}, widths {widths.tolist()}",
                          "give at least one finite centre and one finite width in nm")
    return [optics.parse_filter(f"{c:g}/{w:g}", blocking_od=blocking_od) for c in centres for w in widths]


def camera_for_filter(emission_filter, cameras: Sequence) -> Any:
    """The camera with the largest band-integrated QE × transmission ∫T(λ)QE(λ)dλ (first on ties).

    Examples
    --------
    >>> cams = [optics.camera("si-deep-depletion"), optics.camera("ingaas")]
    >>> camera_for_filter(optics.parse_filter("800/40"), cams).name, camera_for_filter(optics.parse_filter("1300/50"), cams).name
    ('si-deep-depletion', 'ingaas')
    """
    t = emission_filter.transmission(_ASSIGN_GRID_NM)
    scores = [float(np.trapezoid(t * cam.qe(_ASSIGN_GRID_NM), _ASSIGN_GRID_NM)) for cam in cameras]
    return cameras[int(np.argmax(scores))]


# --------------------------------------------------------------------------- compiled kernels


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
                if var < _VAR_FLOOR:
                    var = _VAR_FLOOR
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
                    if var < _VAR_FLOOR:
                        var = _VAR_FLOOR
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
        if var < _VAR_FLOOR:
            var = _VAR_FLOOR
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


def _check_int(name: str, value, low: int, high: int | None, fix: str) -> int:
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
    k = _check_int("k", k, 1, n_probe, f"choose 1 to {n_probe} probes per set (there are {n_probe} candidates)")
    n_ch = k if n_channels is None else _check_int(
        "n_channels", n_channels, k, None, f"give at least k = {k} channels (unmixing needs one per probe)")
    if n_ch > n_filt:
        raise input_error("candidate_filters", f"{n_filt} filters for {n_ch} channels",
                          f"give at least {n_ch} candidate filters or lower k / n_channels")
    top = _check_int("top", top, 1, None, "keep at least 1 combination")
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


def _fmt(v: float) -> str:
    return "inf" if not math.isfinite(v) else f"{v:.3g}"


@dataclass
class DesignCandidate:
    """One ranked combination: source, probes, filters (with their cameras) and its figures."""

    rank: int
    source: str
    source_nm: float
    irradiance_mw_per_cm2: float
    probes: tuple[str, ...]
    filters: tuple[str, ...]
    cameras: tuple[str, ...]
    worst_snr: float
    snr: tuple[float, ...]
    limiting_probe: str
    condition_number: float
    noise_amplification: tuple[float, ...]
    response_e_per_s_per_uM: np.ndarray = field(repr=False)  # (C, K)
    noise_var: np.ndarray = field(repr=False)  # (C,) (e-/s)^2
    saturated: bool = False

    @property
    def separable(self) -> bool:
        """Condition number below :data:`probeplan.channels.SEPARABLE_CONDITION_LIMIT` and SNR > 0."""
        return bool(self.condition_number < SEPARABLE_CONDITION_LIMIT and self.worst_snr > 0)

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready summary (inf written as None)."""
        def num(v: float) -> float | None:
            return float(v) if math.isfinite(v) else None

        return {
            "rank": self.rank, "source": self.source, "source_nm": self.source_nm,
            "irradiance_mw_per_cm2": self.irradiance_mw_per_cm2, "probes": list(self.probes),
            "filters": list(self.filters), "cameras": list(self.cameras), "worst_snr": self.worst_snr,
            "snr": [float(v) for v in self.snr], "limiting_probe": self.limiting_probe,
            "condition_number": num(self.condition_number), "separable": self.separable,
            "noise_amplification": [num(v) for v in self.noise_amplification],
            "response_e_per_s_per_uM": self.response_e_per_s_per_uM.tolist(), "saturated": self.saturated,
        }


@dataclass
class DesignResult:
    """Ranked combinations of an exhaustive design search, the tables it searched, counts and notes.

    ``response_e_per_s_per_uM`` and ``uptake_e_per_s`` have shape (S, P, F),
    ``background_e_per_s`` (S, F), ``read_noise_e`` (F,), indexed like
    ``sources``, ``probe_names`` and ``filter_names``.
    """

    candidates: list[DesignCandidate]
    k: int
    n_channels: int
    depth_mm: float
    exposure_s: float
    concentration_uM: float
    sources: list[dict[str, Any]]
    probe_names: list[str]
    filter_names: list[str]
    filter_cameras: list[str]
    response_e_per_s_per_uM: np.ndarray = field(repr=False)
    background_e_per_s: np.ndarray = field(repr=False)
    uptake_e_per_s: np.ndarray = field(repr=False)
    read_noise_e: np.ndarray = field(repr=False)
    total_combinations: int = 0
    evaluated: int = 0
    filter_sets_total: int = 0
    filter_sets_skipped: int = 0
    filter_sets_cut: int = 0
    precompute_s: float = 0.0
    search_s: float = 0.0
    notes: list[str] = field(default_factory=list)

    @property
    def pruned(self) -> int:
        """Combinations ruled out by the exact bound without evaluation."""
        return self.total_combinations - self.evaluated

    @property
    def best(self) -> DesignCandidate | None:
        """The winner, or None when there was nothing to rank."""
        return self.candidates[0] if self.candidates else None

    def explanation(self) -> str:
        """Plain-text account of why the winner wins, against each runner-up."""
        lines = [f"Exhaustive search: {self.total_combinations:,} combinations ({len(self.sources)} source(s) × "
                 f"probe sets of {self.k} × filter sets of {self.n_channels}); {self.evaluated:,} evaluated exactly, "
                 f"{self.pruned:,} ruled out by an upper bound that cannot miss the optimum."]
        best = self.best
        if best is None or best.worst_snr <= 0:
            lines.append("No combination separates the probes: every set has a probe with zero unmixed SNR "
                         "(probes that look the same in every channel, or a probe the source does not excite). "
                         "Widen the candidate peaks or filters.")
            return "\n".join(lines)
        others = ", ".join(f"{n} {_fmt(v)}" for n, v in zip(best.probes, best.snr, strict=True) if n != best.limiting_probe)
        amp = [v for v in best.noise_amplification]
        lines.append(
            f"Best: {best.source} at {best.irradiance_mw_per_cm2:.4g} mW/cm^2; probes {', '.join(best.probes)}; "
            f"filters {', '.join(f'{f} ({c})' for f, c in zip(best.filters, best.cameras, strict=True))}.")
        lines.append(
            f"  worst-probe unmixed SNR {best.worst_snr:.3g} at {self.depth_mm:g} mm, limited by {best.limiting_probe}"
            + (f" (others: {others})" if others else "")
            + f"; condition number {_fmt(best.condition_number)}"
            + (" (separable)" if best.separable else " (NOT reliably separable)")
            + f"; noise amplification {_fmt(min(amp))}-{_fmt(max(amp))}.")
        if best.worst_snr < ROSE_SNR:
            lines.append(f"  Even the best worst-probe SNR is below {ROSE_SNR:g} (Rose criterion, common practice): "
                         "consider a longer exposure, a higher concentration, binning, or fewer probes.")
        for cand in self.candidates[1:]:
            snrs = ", ".join(f"{n} {_fmt(v)}" for n, v in zip(cand.probes, cand.snr, strict=True))
            if best.worst_snr - cand.worst_snr <= _TIE_FRACTION * best.worst_snr:
                lines.append(f"  vs #{cand.rank}: the same worst SNR within {100 * _TIE_FRACTION:g} % "
                             f"({_differences(best, cand)}; limited by {cand.limiting_probe}; probe SNRs {snrs}): "
                             "the change does not touch the limiting probe, either choice serves.")
            else:
                lines.append(f"  vs #{cand.rank}: {_differences(best, cand)} costs {_cost(best.worst_snr, cand.worst_snr)} "
                             f"of worst SNR ({cand.worst_snr:.3g}, limited by {cand.limiting_probe}; probe SNRs {snrs}).")
        return "\n".join(lines)

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready summary (the precomputed tables are left out)."""
        return {
            "k": self.k, "n_channels": self.n_channels, "depth_mm": self.depth_mm, "exposure_s": self.exposure_s,
            "concentration_uM": self.concentration_uM, "sources": self.sources,
            "candidate_probes": self.probe_names, "candidate_filters": self.filter_names,
            "filter_cameras": self.filter_cameras,
            "candidates": [c.as_dict() for c in self.candidates],
            "counts": {"total_combinations": self.total_combinations, "evaluated": self.evaluated,
                       "pruned": self.pruned, "filter_sets_total": self.filter_sets_total,
                       "filter_sets_skipped": self.filter_sets_skipped, "filter_sets_cut": self.filter_sets_cut},
            "timing_s": {"precompute": self.precompute_s, "search": self.search_s},
            "explanation": self.explanation(), "notes": self.notes,
        }


def _cost(best: float, other: float) -> str:
    if best <= 0:
        return "no cost"
    return f"{best - other:.3g} ({100.0 * (best - other) / best:.2g} %)"


def _differences(a: DesignCandidate, b: DesignCandidate) -> str:
    parts = []
    if a.source != b.source:
        parts.append(f"source {a.source} -> {b.source}")
    for label, x, y in (("probe", a.probes, b.probes), ("filter", a.filters, b.filters)):
        gone = [v for v in x if v not in y]
        new = [v for v in y if v not in x]
        if gone or new:
            parts.append(f"{label} {', '.join(gone) or '-'} -> {', '.join(new) or '-'}")
    return "; ".join(parts) if parts else "same choice"


def _sources_checked(sources) -> list:
    if isinstance(sources, (optics.Laser, optics.LED)):
        sources = [sources]
    sources = list(sources)
    if not sources:
        raise input_error("sources", "no excitation source given", "give at least one Laser or LED")
    for s in sources:
        if not isinstance(s, (optics.Laser, optics.LED)):
            raise TypeError(f"sources: expected Laser or LED objects, got {type(s).__name__}")
    return sources


def _excited(probe, source) -> bool:
    """Whether the source is shorter than the probe's absorption edge (or a measured ε is given)."""
    if probe.extinction_at_excitation_per_M_cm is not None:
        return True
    return float(source.centre_nm) < probe.exciton_peak_nm - _EDGE_MARGIN_NM


def design(
    tissue: str | Tissue,
    candidate_probes: Sequence,
    candidate_filters: Sequence,
    *,
    sources,
    camera,
    lens,
    k: int,
    depth_mm: float,
    exposure_s: float,
    n_channels: int | None = None,
    irradiance_mw_per_cm2=None,
    illumination_s: float | None = None,
    target_size_mm: float = 2.0,
    concentration_uM: float = 1.0,
    uptake_ratio: float = 5.0,
    autofluorescence: Autofluorescence | None = None,
    top: int = DEFAULT_TOP,
    prune: bool = True,
    max_combinations: float = MAX_COMBINATIONS,
    progress: Callable[[int, int], None] | None = None,
) -> DesignResult:
    """Search every source × K candidate probes × C candidate filters for the best worst-probe unmixed SNR.

    Parameters
    ----------
    tissue : str or Tissue
        Tissue preset name or composition.
    candidate_probes : sequence of Probe
        From :func:`probeplan.dots.make_probe` or :func:`probe_series`.
    candidate_filters : sequence of Filter
        Emission filters (:func:`probeplan.optics.parse_filter`, :func:`filter_grid`).
    sources : Laser, LED or sequence of them
        Candidate excitation sources; one source lights every channel of a combination.
    camera : Camera or sequence of Camera
        One camera, or several: each filter then gets the camera of :func:`camera_for_filter`.
    lens : Lens
    k : int
        Probes to multiplex.
    depth_mm : float
        Target depth below the surface (mm).
    exposure_s : float
        Exposure per channel (s); the longest allowed is best (see module notes).
    n_channels : int, optional
        Filters per combination, ``k`` by default (``k + 1`` adds a spare channel).
    irradiance_mw_per_cm2 : float or sequence, optional
        Irradiance on the skin per source (mW/cm²); None uses each source's skin MPE
        (:func:`probeplan.safety.skin_mpe_mw_per_cm2`) for ``illumination_s``.
    illumination_s : float, optional
        How long the skin is lit in one session (s), for the MPE; None: every channel's
        exposure plus positioning, taken as at least 10 s (the long-exposure limit).
    target_size_mm, concentration_uM, uptake_ratio, autofluorescence
        As :func:`probeplan.channels.channel_report`.
    top : int
        Number of best combinations reported.
    prune : bool
        False evaluates every combination (for checks); the result is the same.
    max_combinations : float
        Refuse larger searches.
    progress : callable, optional
        ``progress(done, total)`` over (source, filter set) pairs.

    Returns
    -------
    DesignResult

    Raises
    ------
    InputError
        No candidates, ``k`` larger than the candidates, fewer filters than channels, a user
        irradiance above the skin MPE (refused: lower it, or ask the laser safety officer
        and pass the approved MPE-based value), bad physical values, a search too large.
    TypeError
        Wrong object types.

    Warns
    -----
    ProbeplanWarning
        Each distinct warning of the forward model (e.g. typical ε for unsized
        materials), once.

    Notes
    -----
    A probe that a source cannot excite (source at or beyond its absorption edge,
    no measured ε given) has zero response under that source; such combinations
    rank last.  Each candidate's SNR equals
    :func:`probeplan.channels.channel_report`'s ``unmixed_snr`` for the same probes
    and channels; condition number and noise amplification come from
    :mod:`probeplan.channels`.

    Examples
    --------
    >>> from probeplan import dots
    >>> probes = [dots.make_probe("CdTe", p) for p in (660, 700, 730)]
    >>> filters = [optics.parse_filter(f) for f in ("660/20", "700/20", "740/20", "780/40")]
    >>> res = design("soft tissue", probes, filters, sources=optics.Laser(532.0, 1.0),
    ...              camera=optics.camera("si-deep-depletion"), lens=optics.Lens(2.0, 0.1), k=2,
    ...              depth_mm=2.0, exposure_s=0.1, concentration_uM=0.1, top=2)
    >>> res.total_combinations, len(res.candidates)
    (18, 2)
    """
    tissue = tissue_preset(tissue) if isinstance(tissue, str) else tissue
    probes = list(candidate_probes)
    filters = list(candidate_filters)
    srcs = _sources_checked(sources)
    from probeplan.dots import Probe

    if not probes:
        raise input_error("candidate_probes", "none given", "give at least k candidate probes")
    if not filters:
        raise input_error("candidate_filters", "none given", "give candidate emission filters or a filter grid")
    for p in probes:
        if not isinstance(p, Probe):
            raise TypeError(f"candidate_probes: expected Probe objects, got {type(p).__name__}")
    for f in filters:
        if not isinstance(f, optics.Filter):
            raise TypeError(f"candidate_filters: expected Filter objects, got {type(f).__name__}")
    cams = [camera] if isinstance(camera, optics.Camera) else list(camera)
    if not cams or not all(isinstance(cm, optics.Camera) for cm in cams):
        raise TypeError("camera: expected a Camera or a sequence of Camera objects")
    if not isinstance(lens, optics.Lens):
        raise TypeError(f"lens: expected a Lens, got {type(lens).__name__}")
    k = _check_int("k", k, 1, None, "multiplex at least 1 probe")
    if k > len(probes):
        raise input_error("k", f"{k} probes to multiplex but only {len(probes)} candidate probes",
                          "give more candidate probes or a smaller k")
    n_ch = k if n_channels is None else _check_int("n_channels", n_channels, k, None,
                                                   f"give at least k = {k} channels (one per probe)")
    if n_ch > len(filters):
        raise input_error("candidate_filters", f"{len(filters)} candidate filters for {n_ch} channels",
                          f"give at least {n_ch} candidate filters or a smaller k")
    depth = _positive("depth_mm", depth_mm, allow_zero=True)
    t = _positive("exposure_s", exposure_s)
    conc = _positive("concentration_uM", concentration_uM)
    tbr = _positive("uptake_ratio", uptake_ratio)
    if tbr < 1:
        raise input_error("uptake_ratio", f"got {tbr:g}", "the target-to-background uptake ratio must be >= 1")
    _positive("target_size_mm", target_size_mm)
    if illumination_s is None:
        lit = max(safety.MPE_LONG_EXPOSURE_S, n_ch * t)
    else:
        lit = _positive("illumination_s", illumination_s)
    if lit > safety.MPE_MAX_EXPOSURE_S:
        raise input_error("illumination_s", f"{lit:g} s is beyond the skin table ({safety.MPE_MAX_EXPOSURE_S:g} s)",
                          "split the imaging into shorter sessions")
    n_combos = len(srcs) * math.comb(len(probes), k) * math.comb(len(filters), n_ch)
    if n_combos > max_combinations:
        raise input_error("search size", f"{n_combos:.3g} combinations (limit {max_combinations:.3g})",
                          "give fewer candidate probes or filters, or a smaller k")
    mpe = np.array([float(safety.skin_mpe_mw_per_cm2(float(s.centre_nm), lit)) for s in srcs])
    if irradiance_mw_per_cm2 is None:
        irr = mpe.copy()
    else:
        given = np.atleast_1d(np.asarray(irradiance_mw_per_cm2, dtype=np.float64)).ravel()
        if given.size not in (1, len(srcs)):
            raise input_error("irradiance_mw_per_cm2", f"{np.size(irradiance_mw_per_cm2)} values for {len(srcs)} sources",
                              "give one value for all sources or one per source")
        irr = np.broadcast_to(given, (len(srcs),)).copy()
        for i, s in enumerate(srcs):
            _positive("irradiance_mw_per_cm2", irr[i])
            if irr[i] > mpe[i] * (1 + 1e-12):
                raise input_error("irradiance_mw_per_cm2",
                                  f"{irr[i]:g} mW/cm^2 at {float(s.centre_nm):g} nm is above the skin MPE "
                                  f"{mpe[i]:.4g} mW/cm^2 for {lit:g} s of light",
                                  "lower it to the MPE or below (leave it unset to use the MPE)")

    start = time.perf_counter()
    filter_cams = [cams[0] if len(cams) == 1 else camera_for_filter(f, cams) for f in filters]
    n_s, n_p, n_f = len(srcs), len(probes), len(filters)
    resp = np.zeros((n_s, n_p, n_f))
    upt = np.zeros((n_s, n_p, n_f))
    back = np.zeros((n_s, n_f))
    notes: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for si, src in enumerate(srcs):
            excited = [pi for pi, p in enumerate(probes) if _excited(p, src)]
            for pi in sorted(set(range(n_p)) - set(excited)):
                notes.append(f"{probes[pi].name} is not excited by {src.name} (absorption edge about "
                             f"{probes[pi].exciton_peak_nm:.0f} nm): zero response under that source")
            for fi, filt in enumerate(filters):
                rates = background_rates(
                    tissue, [probes[pi] for pi in excited], source=src, irradiance_mw_per_cm2=irr[si],
                    emission_filter=filt, camera=filter_cams[fi], lens=lens,
                    background_concentration_uM=[conc / tbr] * len(excited), autofluorescence=autofluorescence)
                back[si, fi] = rates["autofluorescence"] + rates["leakage"] + rates["dark"]
                upt[si, excited, fi] = rates["uptake"]
                for pi in excited:
                    resp[si, pi, fi] = probe_rate_e_per_s(
                        tissue, probes[pi], source=src, irradiance_mw_per_cm2=irr[si], emission_filter=filt,
                        camera=filter_cams[fi], lens=lens, depth_mm=[depth], target_size_mm=target_size_mm,
                        concentration_uM=1.0)[0]
    seen: set[tuple[type, str]] = set()
    for w in caught:
        key = (w.category, str(w.message))
        if key not in seen:
            seen.add(key)
            notes.append(str(w.message))
            warnings.warn(str(w.message), w.category, stacklevel=2)
    read = np.array([cm.read_noise_per_binned_px_e for cm in filter_cams])
    precompute_s = time.perf_counter() - start

    out = exhaustive_search(resp, back, upt, read, k=k, n_channels=n_ch, exposure_s=t, concentration_uM=conc,
                            top=top, prune=prune, max_combinations=max_combinations, progress=progress)
    candidates = []
    for rank in range(out.worst_snr.size):
        s, pi, fi = int(out.source[rank]), out.probes[rank], out.filters[rank]
        m = resp[s][np.ix_(pi, fi)].T  # (C, K)
        var = (m.sum(axis=1) * conc + back[s, fi] + upt[s][np.ix_(pi, fi)].sum(axis=0)) / t + read[fi] ** 2 / t**2
        var = np.maximum(var, _VAR_FLOOR)
        snr = tuple(float(v) for v in out.snr[rank])
        full_well = np.array([filter_cams[f].full_well_e for f in fi])
        candidates.append(DesignCandidate(
            rank=rank + 1, source=srcs[s].name, source_nm=float(srcs[s].centre_nm),
            irradiance_mw_per_cm2=float(irr[s]), probes=tuple(probes[p].name for p in pi),
            filters=tuple(filters[f].name for f in fi), cameras=tuple(filter_cams[f].name for f in fi),
            worst_snr=float(out.worst_snr[rank]), snr=snr, limiting_probe=probes[pi[int(np.argmin(snr))]].name,
            condition_number=float(condition_number(m)),
            noise_amplification=tuple(float(v) for v in noise_amplification(m, var)),
            response_e_per_s_per_uM=m, noise_var=var,
            saturated=bool(np.any((m.sum(axis=1) * conc + back[s, fi] + upt[s][np.ix_(pi, fi)].sum(axis=0)) * t
                                  > full_well)),
        ))
    if candidates and candidates[0].saturated:
        notes.append("the best combination saturates a channel at this exposure: shorten the exposure or lower the "
                     "irradiance, then search again")
    notes.append(f"irradiance: {'skin MPE' if irradiance_mw_per_cm2 is None else 'user value'} per source for "
                 f"{lit:g} s of light on the skin (MPE written for human skin; the laser safety officer decides)")
    notes.append("autofluorescence is a parametric assumption; set it from an unlabelled control")
    return DesignResult(
        candidates=candidates, k=k, n_channels=n_ch, depth_mm=depth, exposure_s=t, concentration_uM=conc,
        sources=[{"name": s.name, "wavelength_nm": float(s.centre_nm), "irradiance_mw_per_cm2": float(irr[i]),
                  "skin_mpe_mw_per_cm2": float(mpe[i]), "illumination_s": lit} for i, s in enumerate(srcs)],
        probe_names=[p.name for p in probes], filter_names=[f.name for f in filters],
        filter_cameras=[cm.name for cm in filter_cams], response_e_per_s_per_uM=resp, background_e_per_s=back,
        uptake_e_per_s=upt, read_noise_e=read, total_combinations=out.total_combinations, evaluated=out.evaluated,
        filter_sets_total=out.filter_sets_total, filter_sets_skipped=out.filter_sets_skipped,
        filter_sets_cut=out.filter_sets_cut, precompute_s=precompute_s, search_s=out.search_s, notes=notes,
    )


def _positive(name: str, value: Any, *, allow_zero: bool = False) -> float:
    if isinstance(value, bool):
        raise TypeError(f"{name}: expected a number, got {value!r}")
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise TypeError(f"{name}: expected a number, got {value!r}") from None
    if not math.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        raise input_error(name, f"got {value!r}", "give a finite number " + (">= 0" if allow_zero else "> 0"))
    return v
