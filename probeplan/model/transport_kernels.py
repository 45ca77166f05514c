"""Compiled inner loops of the default transport model (diffusion × Monte Carlo correction tables).

The disc escape fraction of :func:`probeplan.model.fluorescence.disc_escape_fraction` with
``model="mc_table"`` is evaluated for every (slice depth, wavelength) pair of a depth curve:
hundreds of thousands of points, each needing three table look-ups (linear in depth, the tables first
interpolated once to each wavelength's absorption ratio) and six exponentials.  Written with numpy it makes some forty passes over arrays of that size; here
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


def _logs_kernel(d, mu, musp, esc_factor, table_w, slopes_w, z, cell, step, p0, p1, a):  # pragma: no cover
    # stage 1 of the staged loop: the exponents, a[p - p0, w] = (-mu d, ln C_escape, ln C_0, ln C_width);
    # table_w[w] is the tables already interpolated to wavelength w's absorption ratio (W, Z, Q)
    n_w = mu.shape[0]
    n_z = z.shape[0]
    n_q = table_w.shape[2]
    z_first = z[0]
    z_last = z[n_z - 1]
    for w in range(n_w):
        scale = musp[w] / 10.0
        mw = mu[w]
        for p in range(p0, p1):
            dp = d[p]
            row = p - p0
            a[row, w, 0] = -mw * dp
            zr = dp * scale
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
            beyond = max(zr - z_last, 0.0)
            for q in range(n_q):
                value = table_w[w, j0, q] * (1 - tj) + table_w[w, j0 + 1, q] * tj
                if beyond > 0.0:
                    value = value + slopes_w[w, q] * beyond
                a[row, w, 1 + q] = value * esc_factor[w] if q == 0 else value


def _tails_kernel(r, d, mu, zb, p0, p1, a, b):  # pragma: no cover - compiled
    # stage 2: with a = exp(stage 1), the distances to the disc's rim, b[:, row, w] = (-mu R1, -mu R2, R1, R2)
    n_w = mu.shape[0]
    for p in range(p0, p1):
        dp = d[p]
        row = p - p0
        for w in range(n_w):
            d2 = dp + 2.0 * zb[w]
            rs = r[p] / a[row, w, 3]
            r1 = math.sqrt(dp * dp + rs * rs)
            r2 = math.sqrt(d2 * d2 + rs * rs)
            b[0, row, w] = -mu[w] * r1
            b[1, row, w] = -mu[w] * r2
            b[2, row, w] = r1
            b[3, row, w] = r2


def _combine_kernel(d, zb, image, whole, p0, p1, a, b, out):  # pragma: no cover - compiled
    # stage 3: with a = exp(stage 1) and b[:2] = exp(-mu R), the escape fraction
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
            r1 = b[2, row, w]
            tail1 = dp * b[0, row, w] / r1 if r1 > 0 else 0.0
            tail2 = d2 * b[1, row, w] / b[3, row, w]
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
    # the tables interpolated once per wavelength to its absorption ratio (linear in ln ratio), (W, Z, Q)
    t_w = ti[:, None, None]
    table_w = np.ascontiguousarray(table[i0] * (1 - t_w) + table[i0 + 1] * t_w)
    slopes_w = np.ascontiguousarray(slopes[i0] * (1 - ti[:, None]) + slopes[i0 + 1] * ti[:, None])
    musp = np.ascontiguousarray(mu_s_prime_per_cm, dtype=np.float64)
    fac = np.ascontiguousarray(factor)
    image = np.exp(-2.0 * mu * zb)
    out = np.empty((d.size, r.size))
    logs, tails, combine = compiled["logs"], compiled["tails"], compiled["combine"]
    n_w = r.size
    rows = max(1, _STAGE_POINTS // max(n_w, 1))

    def run(p0: int, p1: int) -> None:
        # in blocks of rows small enough to stay in cache; the exponentials by numpy (vectorised)
        for q0 in range(p0, p1, rows):
            q1 = min(q0 + rows, p1)
            a = np.empty((q1 - q0, n_w, 2 if whole else 4))
            logs(d, mu, musp, fac, table_w, slopes_w, z, cell, step, q0, q1, a)
            np.exp(a, out=a)
            b = np.empty((4, q1 - q0, n_w))
            if not whole:
                tails(rad, d, mu, zb, q0, q1, a, b)
                np.exp(b[:2], out=b[:2])  # contiguous
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


#: Points per thread below which the compiled loop runs in the calling thread alone (measured: a
#: 300 000-point curve runs in 60 % of the time on two threads).
_POINTS_PER_THREAD = 40_000
#: Most threads the compiled loop uses.
_MAX_THREADS = 4


@functools.lru_cache(maxsize=1)
def _pool():
    """One thread pool for the compiled loop and its size, kept for the process (starting threads per
    call costs more than a small curve's loop).  Its threads sleep when idle."""
    import os
    from concurrent.futures import ThreadPoolExecutor

    size = max(1, min(os.cpu_count() or 1, _MAX_THREADS))
    return ThreadPoolExecutor(size, thread_name_prefix="probeplan-transport"), size


def _in_threads(run, n_rows: int, n_points: int) -> None:
    """Run ``run(p0, p1)`` over row ranges in a few threads (the compiled loop releases the GIL)."""
    pool, size = _pool()
    n = max(1, min(size, n_points // _POINTS_PER_THREAD, n_rows))
    if n == 1:
        run(0, n_rows)
        return
    bounds = np.linspace(0, n_rows, n + 1).astype(int)
    futures = [pool.submit(run, int(a), int(b)) for a, b in zip(bounds[1:-1], bounds[2:], strict=True)]
    run(0, int(bounds[1]))  # the calling thread takes the first range
    for f in futures:
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
