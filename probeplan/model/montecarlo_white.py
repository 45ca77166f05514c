""""White" Monte Carlo of a semi-infinite medium: one run serves every absorption.

The packets of :mod:`probeplan.model.montecarlo` lose weight to absorption as they
go; here the medium does not absorb at all.  Each packet carries its reduced path
length L′ = μs′·L, and every tally it adds to is weighted by exp(−(μa/μs′)·L′) for
each absorption ratio on a grid: by the microscopic Beer–Lambert law a packet that
travelled a path L in a medium of absorption μa survives with probability
exp(−μa L), and the trajectories themselves do not depend on μa when μs is held
fixed (Sassaroli & Fantini 2004; Alerstam, Andersson-Engels & Svensson 2008).  One
run at a given anisotropy g and refractive index n thus gives the answer for every
μa/μs′ at once, and all lengths scale with 1/μs′ (similarity in reduced units:
depth × μs′, radius × μs′).

Two sources are launched at the surface, both from air (index 1) into tissue of
index n:

``"diffuse"``
    a Lambertian (cosine-weighted) point source at the surface origin, weight
    1 − R_F(θ) after Fresnel reflection at its angle.  By reciprocity the fluence
    it makes at a point A inside the tissue, divided by 4n², is the exitance at the
    origin from an isotropic point source at A (per unit power); integrated over
    the plane, the fluence at depth d under a broad diffuse irradiance, divided by
    4n², is the fraction of an isotropic point source at depth d that escapes
    (check: without absorption the radiance is isotropic, n²E/π, so φ = 4n²E and
    every packet escapes).  Reciprocity of radiative transfer with the n² factor:
    Case & Zweifel (1967) §2; the check is run live in the tests against
    :func:`probeplan.model.montecarlo.simulate_point_source`.
``"collimated"``
    a normally incident pencil beam, weight 1 − R_sp: integrated over the plane it is
    the fluence under a broad collimated beam per unit irradiance.

Fluence is scored with the collision estimator (φ = collision density / μs for a
non-absorbing medium).  Packets are followed until they leave the surface or their
reduced path exceeds ``max_reduced_path`` (the weight left, exp(−(μa/μs′) L′max),
is then negligible for every ratio on the grid).  Units: everything inside is in
reduced lengths (1/μs′); the tallies are dimensionless fluence per unit irradiance
(1-D) or fluence per unit source power in units of μs′² (2-D).

This module is the generator of the shipped transport tables
(``tools/make_transport_tables.py``); the runtime model reads the tables and never
runs it.

References
----------
.. [1] Sassaroli & Fantini, Phys. Med. Biol. 49, N255 (2004), doi:10.1088/0031-9155/49/14/N07.
.. [2] Alerstam, Andersson-Engels & Svensson, J. Biomed. Opt. 13, 041304 (2008), doi:10.1117/1.2950319.
.. [3] Case & Zweifel, Linear Transport Theory, Addison-Wesley (1967).
.. [4] Wang, Jacques & Zheng, Comput. Methods Programs Biomed. 47, 131 (1995),
   doi:10.1016/0169-2607(95)01640-F.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from probeplan.errors import input_error
from probeplan.model.montecarlo import _fresnel_scalar, _scatter

__all__ = ["SOURCES", "WhiteTallies", "simulate_white"]

#: Sources the white run can launch.
SOURCES: tuple[str, ...] = ("diffuse", "collimated")
#: Skip a tally term whose absorption weight is below exp(-_MAX_OPTICAL_PATH).
_MAX_OPTICAL_PATH = 40.0


def _walk(rng, n_packets, diffuse, g, n, ratios, max_path, z_edges, z2_edges, s_edges, s_offset, tally_z, tally_zs, counts):
    """Follow ``n_packets`` packets; add collision weights to ``tally_z`` (Z, K) and ``tally_zs`` (Z2, S, K).

    Lengths are in units of 1/μs (μs = 1) while walking and converted to reduced
    units (× (1 − g)) for every tally.  Written in the subset of Python numba compiles.
    """
    reduce = 1.0 - g
    n_k = ratios.shape[0]
    n_z = z_edges.shape[0] - 1
    n_z2 = z2_edges.shape[0] - 1
    n_s = s_edges.shape[0] - 1
    z_top = z_edges[n_z]
    z2_top = z2_edges[n_z2]
    s_top = s_edges[n_s]
    ds = s_edges[1] - s_edges[0]
    two_pi = 2.0 * math.pi
    interactions = 0
    wk = np.empty(n_k)
    for _ in range(n_packets):
        x = 0.0
        y = 0.0
        z = 0.0
        if diffuse:
            cos_air = math.sqrt(rng.random())
            refl, cos_in = _fresnel_scalar(1.0, n, cos_air)
            w = 1.0 - refl
            sin_in = math.sqrt(max(0.0, 1.0 - cos_in * cos_in))
            phi = two_pi * rng.random()
            ux = sin_in * math.cos(phi)
            uy = sin_in * math.sin(phi)
            uz = cos_in
        else:
            r = (n - 1.0) / (n + 1.0)
            w = 1.0 - r * r
            ux = 0.0
            uy = 0.0
            uz = 1.0
        path = 0.0
        while True:
            step = -math.log(1.0 - rng.random())
            if uz < 0.0 and z + step * uz <= 0.0:
                # reaches the surface: Fresnel reflection or escape
                d = -z / uz
                x += d * ux
                y += d * uy
                z = 0.0
                path += d
                refl, cos_t = _fresnel_scalar(n, 1.0, -uz)
                if refl >= 1.0 or rng.random() <= refl:
                    uz = -uz
                    # continue the unused part of the step after reflection (memoryless: draw afresh)
                    continue
                break
            x += step * ux
            y += step * uy
            z += step * uz
            path += step
            interactions += 1
            red_path = path * reduce
            if red_path > max_path:
                break
            zr = z * reduce
            # absorption weights for every ratio on the grid (ratios ascending)
            last = n_k
            for k in range(n_k):
                arg = ratios[k] * red_path
                if arg > _MAX_OPTICAL_PATH:
                    last = k
                    break
                wk[k] = w * math.exp(-arg)
            if z_edges[0] <= zr < z_top:
                iz = np.searchsorted(z_edges, zr, side="right") - 1
                for k in range(last):
                    tally_z[iz, k] += wk[k]
                counts[0, iz] += 1
            if diffuse and zr < z2_top and zr >= z2_edges[0]:
                rr = math.sqrt(x * x + y * y) * reduce
                s = rr / (zr + s_offset)
                if s < s_top:
                    iz2 = np.searchsorted(z2_edges, zr, side="right") - 1
                    js = int(s / ds)
                    if js >= n_s:
                        js = n_s - 1
                    for k in range(last):
                        tally_zs[iz2, js, k] += wk[k]
            # Henyey-Greenstein scattering (the packet Monte Carlo's own step)
            ux, uy, uz = _scatter(ux, uy, uz, g, rng.random(), two_pi * rng.random())
    counts[1, 0] += interactions


_COMPILED = None


def _compiled_walk():
    """Compile the walk once with numba (cached on disk)."""
    global _COMPILED
    if _COMPILED is None:
        import numba

        fresnel = numba.njit(cache=True, nogil=True)(_fresnel_scalar)
        scatter = numba.njit(cache=True, nogil=True)(_scatter)
        globals_ = dict(_walk.__globals__, _fresnel_scalar=fresnel, _scatter=scatter)
        loop = type(_walk)(_walk.__code__, globals_, "_walk_compiled")
        _COMPILED = numba.njit(cache=True, nogil=True)(loop)
    return _COMPILED


@dataclass(frozen=True, eq=False)
class WhiteTallies:
    """Tallies of one white run, per batch (axis 0), in reduced units.

    Attributes
    ----------
    ratios : ndarray (K,)
        μa/μs′ grid.
    z_edges : ndarray (Z + 1,)
        Reduced depth bin edges (depth × μs′) of the plane-integrated fluence.
    fluence : ndarray (B, Z, K)
        Fluence per unit irradiance averaged over each depth bin, per batch.
    z2_edges, s_edges : ndarray
        Reduced depth bins and radial bins of s = ρ′/(z′ + s_offset) of the 2-D tally.
    s_offset : float
        Offset (reduced) in the radial coordinate of the 2-D tally.
    fluence_2d : ndarray (B, Z2, S, K)
        Fluence per unit source power × 1/μs′² averaged over each (z, s) bin ("diffuse" only).
    n_photons, interactions : int
        Packets launched, collisions simulated.
    """

    source: str
    g: float
    n: float
    ratios: np.ndarray
    max_reduced_path: float
    z_edges: np.ndarray
    fluence: np.ndarray
    z2_edges: np.ndarray
    s_edges: np.ndarray
    s_offset: float
    fluence_2d: np.ndarray
    n_photons: int
    interactions: int
    seed: int


def _bin_volumes_2d(z2_edges: np.ndarray, s_edges: np.ndarray, s_offset: float) -> np.ndarray:
    """Volume of {z in [z0, z1], ρ/(z + c) in [s0, s1]}: π (s1² − s0²) ((z1 + c)³ − (z0 + c)³) / 3."""
    zc = z2_edges + s_offset
    dz3 = (zc[1:] ** 3 - zc[:-1] ** 3) / 3.0
    ds2 = s_edges[1:] ** 2 - s_edges[:-1] ** 2
    return math.pi * dz3[:, None] * ds2[None, :]


def simulate_white(
    source: str,
    g: float,
    n: float,
    n_photons: int,
    *,
    ratios,
    z_edges,
    z2_edges=None,
    s_edges=None,
    s_offset: float = 1.0,
    max_reduced_path: float = 5000.0,
    n_batches: int = 8,
    seed: int = 0,
    workers: int = 1,
) -> WhiteTallies:
    """Run the white Monte Carlo for one anisotropy and refractive index.

    Parameters
    ----------
    source : {"diffuse", "collimated"}
        Lambertian point source or normal pencil beam at the surface (see the module notes).
    g : float
        Henyey–Greenstein anisotropy, 0 < g < 1.
    n : float
        Refractive index of the medium (outside: 1).
    n_photons : int
        Packets in all batches together.
    ratios : array_like
        Ascending grid of μa/μs′ to score.
    z_edges : array_like
        Reduced depth bin edges for the plane-integrated fluence.
    z2_edges, s_edges : array_like, optional
        Reduced depth bins and bins of s = ρ′/(z′ + s_offset) (uniform) of the 2-D tally
        (``"diffuse"`` only).
    s_offset : float
        Offset of the radial coordinate, reduced units.
    max_reduced_path : float
        Packets are dropped beyond this reduced path length.
    n_batches : int
        Independent batches (own random streams) for the standard errors.
    seed : int
        Seed of the batches' streams (``numpy.random.SeedSequence(seed).spawn``).
    workers : int
        Threads running batches at once.

    Returns
    -------
    WhiteTallies

    Examples
    --------
    >>> t = simulate_white("collimated", 0.9, 1.4, 400, ratios=[0.1], z_edges=[0.0, 0.5, 1.0], n_batches=2)
    >>> t.fluence.shape
    (2, 2, 1)
    """
    if source not in SOURCES:
        raise input_error("source", f"got {source!r}", f"choose one of {', '.join(map(repr, SOURCES))}")
    if not 0.0 < g < 1.0:
        raise input_error("g", f"got {g!r}", "give an anisotropy strictly between 0 and 1")
    ratios = np.asarray(ratios, dtype=np.float64)
    if ratios.ndim != 1 or ratios.size == 0 or np.any(np.diff(ratios) <= 0) or ratios[0] < 0:
        raise input_error("ratios", f"got {ratios!r}", "give an ascending grid of mu_a/mu_s' >= 0")
    z_edges = np.asarray(z_edges, dtype=np.float64)
    z2_edges = np.asarray([0.0, 1.0] if z2_edges is None else z2_edges, dtype=np.float64)
    s_edges = np.asarray([0.0, 1.0] if s_edges is None else s_edges, dtype=np.float64)
    sizes = np.full(n_batches, n_photons // n_batches, dtype=np.int64)
    sizes[: n_photons % n_batches] += 1
    streams = [np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(n_batches)]
    k = ratios.size
    tz = np.zeros((n_batches, z_edges.size - 1, k))
    tzs = np.zeros((n_batches, z2_edges.size - 1, s_edges.size - 1, k))
    counts = np.zeros((n_batches, 2, z_edges.size - 1), dtype=np.int64)
    walk = _compiled_walk()

    def run(b: int) -> None:
        walk(streams[b], int(sizes[b]), source == "diffuse", float(g), float(n), ratios, float(max_reduced_path),
             z_edges, z2_edges, s_edges, float(s_offset), tz[b], tzs[b], counts[b])

    if workers > 1:
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=workers) as pool:
            list(pool.map(run, range(n_batches)))
    else:
        for b in range(n_batches):
            run(b)
    # collision estimator: fluence = collision weight / (μs × volume); in reduced units μs = 1/(1 − g)
    reduce = 1.0 - g
    per = sizes[:, None, None].astype(np.float64)
    fluence = tz * reduce / np.diff(z_edges)[None, :, None] / per
    volumes = _bin_volumes_2d(z2_edges, s_edges, s_offset)
    fluence_2d = tzs * reduce / volumes[None, :, :, None] / per[..., None]
    return WhiteTallies(
        source=source, g=float(g), n=float(n), ratios=ratios, max_reduced_path=float(max_reduced_path),
        z_edges=z_edges, fluence=fluence, z2_edges=z2_edges, s_edges=s_edges, s_offset=float(s_offset),
        fluence_2d=fluence_2d, n_photons=int(n_photons), interactions=int(counts[:, 1, 0].sum()), seed=int(seed),
    )
