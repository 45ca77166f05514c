"""Compiled inner loops of the default transport model (diffusion × Monte Carlo correction tables).

The disc escape fraction of :func:`probeplan.model.fluorescence.disc_escape_fraction` with
``model="mc_table"`` is evaluated for every (slice depth, wavelength) pair of a depth curve:
hundreds of thousands of points, each needing three bilinear table look-ups and six
exponentials.  Written with numpy it makes some forty passes over arrays of that size; here
three compiled passes (numba, cached on disk) compute each point once, with numpy's vectorised
exponentials between them, the same formulas in the same order, so the two agree to rounding
(``tests/test_fluorescence_fast.py`` checks 1e-9 relative against the numpy path and against the
formula evaluated point by point).

Written by hand because no library evaluates this model; numba only compiles the loop.
The numpy path stays the reference and the fallback (inputs that vary with depth *and*
wavelength, as in layered tissue, or numba missing).
"""

from __future__ import annotations

import functools
import math

import numpy as np

__all__ = ["disc_escape_mc", "slices_on_fine_grid", "available"]


def _logs_kernel(d, mu, musp, i0w, tiw, esc_factor, table, slopes, z, cell, step, p0, p1, a):  # pragma: no cover
    # stage 1 of the staged loop: the exponents, a[p - p0, w] = (-mu d, ln C_escape, ln C_0, ln C_width)
    n_w = mu.shape[0]
    n_z = z.shape[0]
    n_q = table.shape[2]
    z_first = z[0]
    z_last = z[n_z - 1]
    for p in range(p0, p1):
        dp = d[p]
        row = p - p0
        for w in range(n_w):
            a[row, w, 0] = -mu[w] * dp
            zr = dp / 10.0 * musp[w]
            if zr <= z_first:
                iz = 0.0
            elif zr >= z_last:
                iz = n_z - 1.0
            else:
                lo_i = cell[int(zr / step)]
                while z[lo_i + 1] <= zr:
                    lo_i += 1
                iz = (zr - z[lo_i]) / (z[lo_i + 1] - z[lo_i]) + lo_i
            j0 = min(int(iz), n_z - 2)
            tj = iz - j0
            i0 = i0w[w]
            ti = tiw[w]
            beyond = max(zr - z_last, 0.0)
            for q in range(n_q):
                lo = table[i0, j0, q] * (1 - tj) + table[i0, j0 + 1, q] * tj
                hi = table[i0 + 1, j0, q] * (1 - tj) + table[i0 + 1, j0 + 1, q] * tj
                value = lo + (hi - lo) * ti
                if beyond > 0.0:
                    value = value + (slopes[i0, q] * (1 - ti) + slopes[i0 + 1, q] * ti) * beyond
                a[row, w, 1 + q] = value * esc_factor[w] if q == 0 else value


def _tails_kernel(r, d, mu, zb, p0, p1, a, b):  # pragma: no cover - compiled
    # stage 2: with a = exp(stage 1), the distances to the disc's rim, b[row, w] = (-mu R1, -mu R2, R1, R2)
    n_w = mu.shape[0]
    for p in range(p0, p1):
        dp = d[p]
        row = p - p0
        for w in range(n_w):
            d2 = dp + 2.0 * zb[w]
            rs = r[p] / a[row, w, 3]
            r1 = math.sqrt(dp * dp + rs * rs)
            r2 = math.sqrt(d2 * d2 + rs * rs)
            b[row, w, 0] = -mu[w] * r1
            b[row, w, 1] = -mu[w] * r2
            b[row, w, 2] = r1
            b[row, w, 3] = r2


def _combine_kernel(d, zb, image, whole, p0, p1, a, b, out):  # pragma: no cover - compiled
    # stage 3: with a = exp(stage 1) and b[..., :2] = exp(-mu R), the escape fraction
    n_w = zb.shape[0]
    for p in range(p0, p1):
        dp = d[p]
        row = p - p0
        for w in range(n_w):
            real = a[row, w, 0]
            total = 0.5 * (real + real * image[w])  # exp(-mu d2) = exp(-mu d) exp(-2 mu zb)
            escape = a[row, w, 1]
            if whole:
                out[p, w] = escape * total
                continue
            d2 = dp + 2.0 * zb[w]
            width = a[row, w, 3]
            r1 = b[row, w, 2]
            tail1 = dp * b[row, w, 0] / r1 if r1 > 0 else 0.0
            tail2 = d2 * b[row, w, 1] / b[row, w, 3]
            scaled = total - 0.5 * (tail1 + tail2)
            x = scaled / total if total > 0 else 1.0
            out[p, w] = scaled * (a[row, w, 2] * width**2 * (1.0 - x) + escape * x)


def _fine_kernel(frac, weight, inside, d_mu, idx, t, out):  # pragma: no cover - compiled
    # out[d, w] = sum_s weight[d, s] * lerp(frac[d, s, :], idx[w], t[w]) * exp(-d_mu[w] * inside[d, s])
    n_d, n_s, _ = frac.shape
    n_w = d_mu.shape[0]
    atten = np.empty((n_s, n_w))
    last = np.full(n_s, -1.0)
    for d in range(n_d):
        for s in range(n_s):
            ins = inside[d, s]
            # the path inside the target is the same slice after slice once the target is below the
            # skin (equal to 1e-12 relative: the exponential then agrees to far below 1e-9)
            if abs(ins - last[s]) > 1e-12 * abs(ins) or last[s] < 0.0:
                for w in range(n_w):
                    atten[s, w] = math.exp(-d_mu[w] * ins)
                last[s] = ins
            c = weight[d, s]
            for w in range(n_w):
                i = idx[w]
                f = frac[d, s, i] * (1.0 - t[w]) + frac[d, s, i + 1] * t[w]
                out[d, w] += c * f * atten[s, w]


@functools.lru_cache(maxsize=1)
def _compiled():
    try:
        import numba
    except ImportError:  # pragma: no cover - numba is a dependency; the numpy path remains
        return None
    jit = numba.njit(cache=True, nogil=True, error_model="numpy")
    return {"fine": jit(_fine_kernel), "logs": jit(_logs_kernel), "tails": jit(_tails_kernel),
            "combine": jit(_combine_kernel)}


def available() -> bool:
    """True when the compiled loop can run (numba importable)."""
    return _compiled() is not None


def disc_escape_mc(radius_mm, depth_mm, mu_eff_per_mm, z_b_mm, mu_s_prime_per_cm, ratio, g: float, n: float):
    """The ``"mc_table"`` disc escape fraction, shape (P, W), from per-point and per-wavelength inputs.

    Parameters
    ----------
    radius_mm, depth_mm : ndarray (P,)
        Disc radius (all finite, or all ``inf`` for the whole surface) and source depth, mm.
    mu_eff_per_mm, z_b_mm, mu_s_prime_per_cm, ratio : ndarray (W,)
        μeff (mm⁻¹), extrapolated boundary (mm), μs′ (cm⁻¹) and μa/μs′ at each wavelength.
    g, n : float
        Anisotropy and refractive index (table axes).

    Returns
    -------
    ndarray (P, W), or None when the compiled loop is not available.
    """
    from probeplan.model import transport_tables as tt

    compiled = _compiled()
    if compiled is None:
        return None
    whole = bool(np.all(np.isinf(radius_mm)))
    quantities = ("escape",) if whole else ("escape", "exitance0", "fwhm")
    table, slopes = tt._stacked(quantities, float(g), float(n))
    t = tt._tables()
    ratios, z = t["ratios"], t["z"]
    r = np.asarray(ratio, dtype=np.float64)
    # the ratio's cell and weight, exactly as transport_tables.corrections finds them
    ik = np.interp(np.log(np.clip(r, ratios[0], ratios[-1])), tt._log_ratios(), np.arange(ratios.size))
    i0 = np.minimum(ik.astype(np.intp), ratios.size - 2)
    ti = ik - i0
    below = r < ratios[0]
    factor = np.where(below, np.sqrt(np.clip(r, 0.0, None) / ratios[0]), 1.0)
    d = np.ascontiguousarray(depth_mm, dtype=np.float64)
    rad = np.ascontiguousarray(np.broadcast_to(np.asarray(radius_mm, dtype=np.float64), d.shape))
    mu = np.ascontiguousarray(mu_eff_per_mm, dtype=np.float64)
    zb = np.ascontiguousarray(z_b_mm, dtype=np.float64)
    cell, step = _depth_cells()
    args = (rad, d, mu, zb, np.exp(-2.0 * mu * zb), np.ascontiguousarray(mu_s_prime_per_cm, dtype=np.float64),
            np.ascontiguousarray(i0, dtype=np.int64), np.ascontiguousarray(ti), np.ascontiguousarray(factor), table,
            np.ascontiguousarray(slopes), z, cell, step, whole)
    out = np.empty((d.size, r.size))
    logs, tails, combine = compiled["logs"], compiled["tails"], compiled["combine"]
    musp, i0c, tic, fac, slc = args[5], args[6], args[7], args[8], args[10]
    image = args[4]
    n_w = r.size
    rows = max(1, _STAGE_POINTS // max(n_w, 1))

    def run(p0: int, p1: int) -> None:
        # in blocks of rows small enough to stay in cache; the exponentials by numpy (vectorised)
        for q0 in range(p0, p1, rows):
            q1 = min(q0 + rows, p1)
            a = np.empty((q1 - q0, n_w, 2 if whole else 4))
            logs(d, mu, musp, i0c, tic, fac, table, slc, z, cell, step, q0, q1, a)
            np.exp(a, out=a)
            b = np.empty((q1 - q0, n_w, 4))
            if not whole:
                tails(rad, d, mu, zb, q0, q1, a, b)
                np.exp(b[..., :2], out=b[..., :2])
            combine(d, zb, image, whole, q0, q1, a, b, out)

    _in_threads(run, d.size, d.size * r.size)
    return out


#: Points per block of the staged loop (buffers of a few hundred kB).
_STAGE_POINTS = 8192


@functools.lru_cache(maxsize=1)
def _depth_cells() -> tuple[np.ndarray, float]:
    """For k = 0, 1, ...: the cell i of the tables' depth grid with z[i] <= k·step, step half the finest cell."""
    from probeplan.model import transport_tables as tt

    z = tt._tables()["z"]
    step = float(np.min(np.diff(z))) / 2.0
    starts = np.arange(int(z[-1] / step) + 2) * step
    cell = np.clip(np.searchsorted(z, starts, side="right") - 1, 0, z.size - 2).astype(np.int64)
    return cell, step


#: Points per thread below which the compiled loop runs in the calling thread alone.
_POINTS_PER_THREAD = 100_000


def _in_threads(run, n_rows: int, n_points: int) -> None:
    """Run ``run(p0, p1)`` over row ranges in a few threads (the compiled loop releases the GIL)."""
    import os
    from concurrent.futures import ThreadPoolExecutor

    n = max(1, min(os.cpu_count() or 1, 4, n_points // _POINTS_PER_THREAD, n_rows))
    if n == 1:
        run(0, n_rows)
        return
    bounds = np.linspace(0, n_rows, n + 1).astype(int)
    with ThreadPoolExecutor(n) as pool:
        for f in [pool.submit(run, int(a), int(b)) for a, b in zip(bounds[:-1], bounds[1:], strict=True)]:
            f.result()


def slices_on_fine_grid(frac, weight, inside_cm, d_mu_per_cm, coarse_nm, fine_nm):
    """Σ over slices of weight × (frac interpolated onto the fine grid) × exp(−Δμ·ℓ), shape (D, W).

    ``frac`` (D, S, Wc) on ``coarse_nm``; ``weight`` and ``inside_cm`` (D, S); ``d_mu_per_cm``
    (W,) on ``fine_nm`` (inside the coarse grid).  The linear interpolation is
    :func:`probeplan.model.fluorescence._interp_last`'s.  None when the compiled loop is not
    available.
    """
    compiled = _compiled()
    if compiled is None:
        return None
    i = np.clip(np.searchsorted(coarse_nm, fine_nm, side="right") - 1, 0, coarse_nm.size - 2)
    t = (fine_nm - coarse_nm[i]) / (coarse_nm[i + 1] - coarse_nm[i])
    out = np.zeros((frac.shape[0], fine_nm.size))
    compiled["fine"](np.ascontiguousarray(frac, dtype=np.float64), np.ascontiguousarray(weight, dtype=np.float64),
                np.ascontiguousarray(inside_cm, dtype=np.float64), np.ascontiguousarray(d_mu_per_cm, dtype=np.float64),
                np.ascontiguousarray(i, dtype=np.int64), np.ascontiguousarray(t, dtype=np.float64), out)
    return out
