"""Generate the shipped Monte Carlo transport tables (probeplan/data/transport_tables.npz).

Stage 1 (``simulate``, about 3 minutes on two cores): white Monte Carlo runs
(:mod:`probeplan.model.montecarlo_white`) of a semi-infinite medium for every
anisotropy g in G_GRID and refractive index n in N_GRID, with a diffuse point
source (escape and exitance by reciprocity) and a collimated pencil beam (broad-beam
fluence).  The radial tally's bins grow with depth (ρ′ = s (z′ + S_OFFSET)) and are fine
near the surface, where a shallow source's profile is a fraction of a reduced length wide.  The raw tallies (batch means and standard errors) go to RAW, outside the
package.

Stage 2 (``reduce``, seconds): divide each Monte Carlo quantity by the diffusion
formula of :mod:`probeplan.model.transport` averaged over the same bins (for the radial
profiles: the same near-axis estimate of J(0) and of the FWHM applied to both), and write
the correction tables with their standard errors.

    python3 tools/make_transport_tables.py simulate   # writes build/transport_raw.npz
    python3 tools/make_transport_tables.py reduce     # writes probeplan/data/transport_tables.npz
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
RAW = ROOT / "build" / "transport_raw.npz"
OUT = ROOT / "probeplan" / "data" / "transport_tables.npz"

SEED = 20261203
G_GRID = (0.8, 0.9, 0.95)
N_GRID = (1.33, 1.45)
#: Packets per run at each g (collisions per reduced length grow as 1/(1 - g)).
PACKETS = {0.8: 240_000, 0.9: 120_000, 0.95: 60_000}
RATIOS = np.array([0.005, 0.01, 0.02, 0.035, 0.05, 0.075, 0.1, 0.15, 0.2, 0.3, 0.4, 0.5, 0.6])
#: Packets are dropped beyond this reduced path: exp(-0.005 * 1000) < 0.7 % of a packet's weight is left
#: for the smallest ratio on the grid.
MAX_REDUCED_PATH = 1000.0
Z_EDGES = np.concatenate([np.arange(0.0, 2.0, 0.05), np.arange(2.0, 10.0, 0.2), np.arange(10.0, 30.001, 1.0)])
Z2_EDGES = np.concatenate([np.arange(0.05, 1.0, 0.05), np.arange(1.0, 3.0, 0.25), np.arange(3.0, 6.0, 0.5),
                           np.arange(6.0, 12.0, 1.0), np.arange(12.0, 20.001, 2.0)])
S_EDGES = np.linspace(0.0, 2.5, 101)
S_OFFSET = 0.1
N_BATCHES = 8


def simulate() -> None:
    from probeplan.model.montecarlo_white import simulate_white

    out: dict[str, np.ndarray] = {}
    for g in G_GRID:
        for n in N_GRID:
            for source in ("diffuse", "collimated"):
                t0 = time.time()
                res = simulate_white(source, g, n, PACKETS[g], ratios=RATIOS, z_edges=Z_EDGES, z2_edges=Z2_EDGES,
                                     s_edges=S_EDGES, s_offset=S_OFFSET, max_reduced_path=MAX_REDUCED_PATH,
                                     n_batches=N_BATCHES, seed=SEED + int(1000 * g) + int(100 * n), workers=2)
                key = f"{source}_g{g}_n{n}"
                nb = N_BATCHES
                out[key + "_fluence"] = res.fluence.mean(0)
                out[key + "_fluence_se"] = res.fluence.std(0, ddof=1) / np.sqrt(nb)
                if source == "diffuse":
                    out[key + "_fluence2d"] = res.fluence_2d.mean(0)
                    out[key + "_fluence2d_se"] = res.fluence_2d.std(0, ddof=1) / np.sqrt(nb)
                print(f"{key}: {PACKETS[g]} packets, {res.interactions:.3g} collisions, {time.time() - t0:.0f} s",
                      flush=True)
    RAW.parent.mkdir(exist_ok=True)
    np.savez_compressed(RAW, ratios=RATIOS, z_edges=Z_EDGES, z2_edges=Z2_EDGES, s_edges=S_EDGES,
                        s_offset=S_OFFSET, g_grid=np.array(G_GRID), n_grid=np.array(N_GRID), **out)


# --------------------------------------------------------------------------- stage 2

#: Gauss-Legendre nodes on [0, 1] for bin averages of the diffusion formulas.
_GX, _GW = np.polynomial.legendre.leggauss(4)
_GX, _GW = 0.5 * (_GX + 1.0), 0.5 * _GW
#: A table cell is kept where its relative standard error is below this; deeper cells are extrapolated.
MAX_RELATIVE_SE = 0.05
#: Reduced scattering used to evaluate the diffusion formulas (1 /mm, so mm = reduced units).
_MUSP = 10.0


def _bin_average_1d(func, edges, ratio):
    lo, hi = edges[:-1], edges[1:]
    z = lo[:, None] + (hi - lo)[:, None] * _GX[None, :]
    return np.sum(func(z, ratio) * _GW, axis=-1)


def _tail_fill(log_c, log_se, z, min_points=4, slope=None):
    """Smooth ln C where the Monte Carlo is precise; continue it linearly below.

    Cells from the surface down are kept while their relative standard error is below
    MAX_RELATIVE_SE; a cubic smoothing spline weighted by 1/σ (smoothing factor = number
    of cells, i.e. χ² ≈ 1 per cell) averages the Monte Carlo noise across cells.  Deep in
    the medium both Monte Carlo and diffusion fall exponentially, so ln C continues as a
    straight line with ``slope`` (default: the slope of a weighted line fit over the last 2
    reduced units kept).  Returns the filled column, the last kept index and the fitted slope.
    """
    from scipy.interpolate import UnivariateSpline

    good = np.isfinite(log_c) & (log_se < MAX_RELATIVE_SE)
    bad = np.flatnonzero(~good)
    last = (bad[0] - 1) if bad.size else z.size - 1
    last = max(last, min_points - 1)
    keep = slice(0, last + 1)
    se = np.maximum(np.nan_to_num(log_se[keep], nan=1.0, posinf=1.0), 1e-4)
    y = np.nan_to_num(log_c[keep], nan=0.0)
    if last + 1 > 4:
        smooth = UnivariateSpline(z[keep], y, w=1.0 / se, s=float(last + 1), k=3)(z[keep])
    else:
        smooth = y
    sel = np.flatnonzero(z[keep] >= z[last] - 2.0)
    if sel.size < min_points:
        sel = np.arange(max(0, last - min_points + 1), last + 1)
    fitted, _ = np.polyfit(z[sel], y[sel], 1, w=1.0 / se[sel])
    used = fitted if slope is None else slope
    out = np.empty_like(log_c)
    out[keep] = smooth
    out[last + 1:] = smooth[-1] + used * (z[last + 1:] - z[last])
    return out, last, fitted


def asymptotic_slope(ratio: float) -> float:
    """d ln C / d z′ deep in the medium: diffusion's μeff′ minus the exact transport decay constant.

    The decay constant k of the fluence far from sources and boundaries is the root of
    (a/(2κ)) ln((1 + κ)/(1 − κ)) = 1 (κ = k/μt, a the single-scattering albedo) for isotropic
    scattering (Case & Zweifel 1967, ch. 4); by similarity the reduced medium (μs′, isotropic,
    a′ = μs′/(μa + μs′)) stands for the anisotropic one.  Both in units of μs′.
    """
    from scipy.optimize import brentq

    albedo = 1.0 / (1.0 + ratio)
    kappa = brentq(lambda k: albedo / (2.0 * k) * np.log((1.0 + k) / (1.0 - k)) - 1.0, 1e-12, 1.0 - 1e-15)
    return float(np.sqrt(3.0 * ratio * (1.0 + ratio)) - kappa * (1.0 + ratio))


def reduce() -> None:
    from probeplan.model import transport

    raw = np.load(RAW)
    ratios, z_edges, z2_edges, s_edges = raw["ratios"], raw["z_edges"], raw["z2_edges"], raw["s_edges"]
    s_offset = float(raw["s_offset"])
    zc = 0.5 * (z_edges[1:] + z_edges[:-1])
    z2c = 0.5 * (z2_edges[1:] + z2_edges[:-1])
    G, N, K = len(G_GRID), len(N_GRID), ratios.size
    tables = {name: np.zeros((G, N, K, zc.size)) for name in ("escape", "broad_beam")}
    tables.update({name: np.zeros((G, N, K, z2c.size)) for name in ("exitance0", "fwhm")})
    errors = {name: np.zeros_like(t) for name, t in tables.items()}
    slopes = {name: np.zeros((G, N, K)) for name in ("escape", "broad_beam", "exitance0")}
    kept = {name: np.zeros((G, N, K), dtype=int) for name in ("escape", "broad_beam", "exitance0", "fwhm")}
    fitted_slopes = {name: np.zeros((G, N, K)) for name in ("escape", "broad_beam", "exitance0")}
    for i, g in enumerate(G_GRID):
        for j, n in enumerate(N_GRID):
            four_n2 = 4.0 * n * n
            for k, a in enumerate(ratios):
                mua = a * _MUSP
                # 1-D: escape (reciprocity) and broad-beam fluence
                for name, source, func, scale in (
                    ("escape", "diffuse", lambda z, r: transport.point_source_escape(z, mua, _MUSP, n, model="diffusion"), four_n2),
                    ("broad_beam", "collimated", lambda z, r: transport.broad_beam_fluence(z, mua, _MUSP, n, model="diffusion"), 1.0),
                ):
                    key = f"{source}_g{g}_n{n}"
                    mc = raw[key + "_fluence"][:, k] / scale
                    se = raw[key + "_fluence_se"][:, k] / scale
                    diff = _bin_average_1d(func, z_edges, a)
                    with np.errstate(divide="ignore", invalid="ignore"):
                        log_c = np.log(mc / diff)
                        log_se = se / mc
                    # escape: the asymptotic slope; broad beam: held at the last kept value (its Monte Carlo has
                    # not reached the asymptotic decay within the kept depths, see docs/transport_models.md)
                    tail = asymptotic_slope(a) if name == "escape" else 0.0
                    filled, last, fitted = _tail_fill(log_c, log_se, zc, slope=tail)
                    tables[name][i, j, k] = np.exp(filled)
                    errors[name][i, j, k] = np.where(np.arange(zc.size) <= last, log_se, np.nan)
                    slopes[name][i, j, k] = tail
                    fitted_slopes[name][i, j, k] = fitted
                    kept[name][i, j, k] = last
                # 2-D: on-axis exitance and FWHM from the radial profiles
                key = f"diffuse_g{g}_n{n}"
                j_mc = raw[key + "_fluence2d"][:, :, k] / four_n2
                j_se = raw[key + "_fluence2d_se"][:, :, k] / four_n2
                c0, c0_se, ratio_w, width_se = _profile_corrections(j_mc, j_se, z2_edges, s_edges, s_offset, mua, n)
                log_c0 = np.log(c0)
                filled, last, fitted = _tail_fill(log_c0, c0_se / c0, z2c, min_points=3, slope=asymptotic_slope(a))
                tables["exitance0"][i, j, k] = np.exp(filled)
                errors["exitance0"][i, j, k] = np.where(np.arange(z2c.size) <= last, c0_se / c0, np.nan)
                slopes["exitance0"][i, j, k] = asymptotic_slope(a)
                fitted_slopes["exitance0"][i, j, k] = fitted
                kept["exitance0"][i, j, k] = last
                # the width ratio: smoothed like the others, then held at its last kept value below
                w_log = np.log(ratio_w[: last + 1])
                w_se = np.maximum(width_se[: last + 1] / ratio_w[: last + 1], 1e-3)
                w_fill, _, _ = _tail_fill(np.concatenate([w_log, np.full(z2c.size - last - 1, np.nan)]),
                                          np.concatenate([w_se, np.full(z2c.size - last - 1, np.inf)]), z2c, min_points=3)
                w = np.exp(w_fill)
                w[last + 1:] = w[last]
                tables["fwhm"][i, j, k] = w
                errors["fwhm"][i, j, k] = np.where(np.arange(z2c.size) <= last, width_se / ratio_w, np.nan)
                kept["fwhm"][i, j, k] = last
                print(f"g={g} n={n} a={a}: escape kept to z'={zc[kept['escape'][i, j, k]]:.2f}, "
                      f"broad beam to {zc[kept['broad_beam'][i, j, k]]:.2f}, exitance to {z2c[last]:.2f}; "
                      f"tail slope {asymptotic_slope(a):.4f}, fitted "
                      + ", ".join(f"{fitted_slopes[q][i, j, k]:.4f}" for q in fitted_slopes), flush=True)
    provenance = (
        "probeplan Monte Carlo transport tables: ratio of white Monte Carlo (probeplan.model.montecarlo_white, "
        "Henyey-Greenstein, Fresnel boundary to air) to diffusion theory (probeplan.model.transport, exact boundary "
        f"factor) in a semi-infinite medium. Generated by tools/make_transport_tables.py, seed {SEED}, "
        f"packets per run {PACKETS}, {N_BATCHES} batches, max reduced path {MAX_REDUCED_PATH}. "
        "Axes: g, n, mu_a/mu_s', reduced depth (depth x mu_s'). ln(ratio) is smoothed (cubic spline, "
        f"weights 1/sigma) over the cells with relative standard error < {MAX_RELATIVE_SE}; deeper cells continue "
        "ln(ratio) linearly with the stored slope: for escape and exitance diffusion's mu_eff minus the exact "
        "transport decay constant of the similar isotropic medium (Case & Zweifel 1967); 0 for the broad beam. "
        "On-axis exitance and FWHM: a weighted cubic fit in rho^2 of ln J near the axis (to 1.3 x the half-maximum "
        "radius), applied alike to the Monte Carlo and to the bin-averaged diffusion profile."
    )
    np.savez_compressed(
        OUT, provenance=np.array(provenance), g_grid=np.array(G_GRID), n_grid=np.array(N_GRID), ratios=ratios,
        z=zc, z2=z2c, **{f"{k}": v.astype(np.float32) for k, v in tables.items()},
        **{f"{k}_se": v.astype(np.float32) for k, v in errors.items()},
        **{f"{k}_slope": v for k, v in slopes.items()},
        **{f"{k}_slope_fitted": v for k, v in fitted_slopes.items()},
        **{f"{k}_kept": v for k, v in kept.items()},
    )
    print("wrote", OUT)


def _profile_corrections(j_mc, j_se, z2_edges, s_edges, s_offset, mua, n):
    """On-axis exitance ratio (MC / diffusion), its error, and the FWHM ratio, per 2-D depth bin.

    The same estimator (:func:`probeplan.model.montecarlo.radial_profile_peak_and_fwhm`, the reference's
    own) is applied to the Monte Carlo profile and to the
    diffusion profile averaged over the same cells with the same weights, so that the binning's bias
    cancels in the ratio; the ratio then multiplies diffusion's point values at run time.
    """
    from probeplan.model import transport
    from probeplan.model.montecarlo import radial_profile_peak_and_fwhm as estimate

    nz = z2_edges.size - 1
    c0 = np.full(nz, np.nan)
    c0_se = np.full(nz, np.inf)
    wr = np.full(nz, np.nan)
    wr_se = np.full(nz, np.inf)
    s_lo, s_hi = s_edges[:-1], s_edges[1:]
    sq = s_lo[:, None] + (s_hi - s_lo)[:, None] * _GX[None, :]  # (S, 4)
    for iz in range(nz):
        z0, z1 = z2_edges[iz], z2_edges[iz + 1]
        zq = z0 + (z1 - z0) * _GX
        zc = 0.5 * (z0 + z1)
        # bin averages of the diffusion exitance, weight s (z + c)^2 ds dz
        rho = sq[:, :, None] * (zq[None, None, :] + s_offset)  # (S, 4s, 4z)
        jd = transport.point_source_exitance_per_mm2(rho, zq[None, None, :], mua, _MUSP, n, model="diffusion")
        wgt = _GW[None, :, None] * _GW[None, None, :] * sq[:, :, None] * (zq[None, None, :] + s_offset) ** 2
        jd_avg = np.sum(jd * wgt, axis=(1, 2)) / np.sum(wgt, axis=(1, 2))
        rho_c = 0.5 * (s_lo + s_hi) * (zc + s_offset)
        with np.errstate(divide="ignore", invalid="ignore"):
            rel = np.where(j_mc[iz] > 0, j_se[iz] / j_mc[iz], np.inf)
        j0, f, j0_se, f_se = estimate(rho_c, j_mc[iz], rel, draws=48, seed=iz)
        j0_d, f_d, _, _ = estimate(rho_c, jd_avg, rel)
        if not (np.isfinite(j0) and np.isfinite(f) and np.isfinite(f_d)):
            continue
        c0[iz] = j0 / j0_d
        c0_se[iz] = j0_se / j0_d
        wr[iz] = f / f_d
        wr_se[iz] = f_se / f_d
    return c0, c0_se, wr, wr_se


if __name__ == "__main__":
    stage = sys.argv[1] if len(sys.argv) > 1 else "reduce"
    if stage == "simulate":
        simulate()
    else:
        reduce()
