"""Photon-packet Monte Carlo of light transport in layered tissue: the reference for :mod:`probeplan.model.transport`.

Units: optical coefficients in cm⁻¹ (as everywhere in probeplan); thicknesses,
depths and radial distances in mm.  Coefficients are converted once to mm⁻¹ with
:data:`MM_PER_CM`; radial profiles come out per mm².

The algorithm is the weighted-packet scheme of Wang, Jacques & Zheng (1995):

* a packet starts with weight 1 (a normally incident pencil beam loses the
  specular reflection ``R_sp`` first; an isotropic point source starts inside);
* step lengths are drawn as ``s = -ln(ξ) / μt``; a step that would cross a layer
  boundary stops there and carries the unused optical depth into the next layer;
* at every interaction the fraction ``μa/μt`` of the weight is deposited
  (absorbed) and the packet scatters by the Henyey–Greenstein phase function;
* at a boundary between different refractive indices the packet is reflected with
  the unpolarised Fresnel probability (all or none) or refracted by Snell's law;
  packets that leave the top surface count as reflectance (escape), those that leave
  the bottom of a finite stack as transmission;
* a packet whose weight falls below :data:`ROULETTE_THRESHOLD` survives Russian
  roulette with probability :data:`ROULETTE_SURVIVAL` (weight divided by it).

Three engines run the same algorithm:

``"numpy"``
    all live packets advanced together as arrays, one step per loop turn;
``"numba"``
    the per-packet loop compiled with numba (``cache=True``), batches in threads;
``"python"``
    the same per-packet loop run as plain Python (slow; for cross-checks and the
    speed ratio in the benchmark).  With the same seed it follows exactly the same
    random stream as ``"numba"``, so the two agree to rounding.

Statistical errors: the packets are split into :data:`N_BATCHES` batches and every
tally's standard error is the spread of the batch means (batch-means method).
Results are reproducible for a given ``seed``, ``n_photons`` and ``engine``.
"""

from __future__ import annotations

import math
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np

from probeplan.errors import input_error
from probeplan.units import MM_PER_CM  # noqa: F401

__all__ = [
    "MM_PER_CM",
    "ENGINES",
    "N_BATCHES",
    "ROULETTE_THRESHOLD",
    "ROULETTE_SURVIVAL",
    "Layer",
    "McResult",
    "simulate_slab",
    "simulate_point_source",
    "radial_profile_peak_and_fwhm",
]

#: The available engines (``engine=``).
ENGINES: tuple[str, ...] = ("numpy", "numba", "python")
#: Number of batches used for the standard errors (fewer if there are fewer packets).
N_BATCHES = 16
#: Packets lighter than this play Russian roulette (Wang et al. 1995 use 1e-4).
ROULETTE_THRESHOLD = 1e-4
#: Survival probability in Russian roulette (Wang et al. 1995 use 0.1).
ROULETTE_SURVIVAL = 0.1
_NUMPY_CHUNK = 1 << 16
_COS_ZERO = 1.0 - 1e-12
_COS_90D = 1e-6
_POLAR_LIMIT = 0.99999


# =========================================================================== inputs


@dataclass(frozen=True)
class Layer:
    """One homogeneous tissue layer.

    Parameters
    ----------
    thickness_mm : float
        Thickness in mm, > 0; ``math.inf`` for a semi-infinite last layer.
    mu_a_per_cm : float
        Absorption coefficient, cm⁻¹, >= 0.
    mu_s_per_cm : float
        Scattering coefficient (not reduced), cm⁻¹, >= 0.
    g : float
        Henyey–Greenstein anisotropy, -1 < g < 1.
    n : float
        Refractive index, > 0.

    Examples
    --------
    >>> round(Layer(1.0, 0.1, 100.0, 0.9, 1.4).mu_s_prime_per_cm, 9)
    10.0
    """

    thickness_mm: float
    mu_a_per_cm: float
    mu_s_per_cm: float
    g: float = 0.0
    n: float = 1.4

    def __post_init__(self) -> None:
        for name in ("thickness_mm", "mu_a_per_cm", "mu_s_per_cm", "g", "n"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int | float | np.floating | np.integer):
                raise TypeError(f"Layer.{name}: expected a number, got {type(value).__name__}")
            object.__setattr__(self, name, float(value))
        if math.isnan(self.thickness_mm) or self.thickness_mm <= 0:
            raise input_error(
                "Layer.thickness_mm", f"got {self.thickness_mm!r}", "give a thickness > 0 mm (inf for the last layer)"
            )
        for name in ("mu_a_per_cm", "mu_s_per_cm"):
            value = getattr(self, name)
            if not math.isfinite(value) or value < 0:
                raise input_error(f"Layer.{name}", f"got {value!r}", "give a finite coefficient >= 0 in cm^-1")
        if not -1.0 < self.g < 1.0:
            raise input_error("Layer.g", f"got {self.g!r}", "give an anisotropy strictly between -1 and 1")
        if not math.isfinite(self.n) or self.n <= 0:
            raise input_error("Layer.n", f"got {self.n!r}", "give a refractive index > 0 (about 1.4 for tissue)")

    @property
    def mu_s_prime_per_cm(self) -> float:
        """Reduced scattering coefficient μs (1 − g), cm⁻¹."""
        return self.mu_s_per_cm * (1.0 - self.g)


@dataclass(frozen=True, eq=False)
class McResult:
    """Tallies of one Monte Carlo run, each with its standard error (``*_std``).

    Attributes
    ----------
    reflectance, reflectance_std : float
        Fraction of the launched power leaving the top surface, excluding the specular
        reflection of the incident beam (for a point source: the escaping fraction).
    specular : float
        Specular reflection of the incident pencil beam at the top surface (0 for a point source).
    transmission, transmission_std : float
        Fraction leaving the bottom of a finite stack (unscattered light included).
    absorbed, absorbed_std : ndarray, shape (n_layers,)
        Fraction absorbed in each layer.
    rho_edges_mm : ndarray, shape (n_rho + 1,)
        Radial bin edges on the top surface, mm.
    radial_reflectance_per_mm2, radial_reflectance_per_mm2_std : ndarray, shape (n_rho,)
        Power leaving the top surface per mm² in each radial bin (for a point source: its exitance).
    depth_edges_mm : ndarray, shape (n_depth + 1,)
        Depth bin edges, mm (empty when no depth tally was asked for).
    absorbed_by_depth, absorbed_by_depth_std : ndarray, shape (n_depth,)
        Fraction absorbed in each depth bin (over the whole plane).
    fluence, fluence_std : ndarray, shape (n_depth,)
        Absorbed power per bin divided by μa and bin thickness: for a pencil beam this
        is the fluence rate per unit irradiance φ/E₀ of a broad beam (by translation
        invariance).  NaN in bins where μa = 0 or a bin spans layers of different μa.
    n_photons : int
        Packets launched.
    n_interactions : int
        Interaction (absorption-and-scattering) events simulated.
    n_batches : int
        Batches used for the standard errors.
    engine : str
        Engine that ran.
    seed : int
        Seed of the random streams.
    """

    reflectance: float
    reflectance_std: float
    specular: float
    transmission: float
    transmission_std: float
    absorbed: np.ndarray
    absorbed_std: np.ndarray
    rho_edges_mm: np.ndarray
    radial_reflectance_per_mm2: np.ndarray
    radial_reflectance_per_mm2_std: np.ndarray
    depth_edges_mm: np.ndarray
    absorbed_by_depth: np.ndarray
    absorbed_by_depth_std: np.ndarray
    fluence: np.ndarray
    fluence_std: np.ndarray
    n_photons: int
    n_interactions: int
    n_batches: int
    engine: str
    seed: int
    notes: tuple[str, ...] = field(default=())

    @property
    def escape(self) -> float:
        """Alias of :attr:`reflectance` for a point source: the fraction leaving the top surface."""
        return self.reflectance

    @property
    def escape_std(self) -> float:
        """Standard error of :attr:`escape`."""
        return self.reflectance_std

    @property
    def rho_mm(self) -> np.ndarray:
        """Radial bin centres, mm."""
        return 0.5 * (self.rho_edges_mm[1:] + self.rho_edges_mm[:-1])

    @property
    def depth_mm(self) -> np.ndarray:
        """Depth bin centres, mm."""
        return 0.5 * (self.depth_edges_mm[1:] + self.depth_edges_mm[:-1])


@dataclass(frozen=True)
class _Stack:
    z_top: np.ndarray
    z_bottom: np.ndarray
    mu_a: np.ndarray  # per mm
    mu_s: np.ndarray  # per mm
    g: np.ndarray
    n: np.ndarray
    n_above: float
    n_below: float


def _build_stack(layers, n_outside) -> _Stack:
    if isinstance(layers, Layer):
        layers = [layers]
    layers = list(layers)
    if not layers:
        raise input_error("layers", "got an empty list", "give at least one Layer")
    for i, layer in enumerate(layers):
        if not isinstance(layer, Layer):
            raise TypeError(f"layers[{i}]: expected a Layer, got {type(layer).__name__}")
        if i < len(layers) - 1 and math.isinf(layer.thickness_mm):
            raise input_error(
                f"layers[{i}].thickness_mm", "got inf before the last layer", "only the last layer may be semi-infinite"
            )
    last = layers[-1]
    if math.isinf(last.thickness_mm) and last.mu_a_per_cm <= 0:
        raise input_error(
            f"layers[{len(layers) - 1}].mu_a_per_cm",
            "got 0 in a semi-infinite layer (packets could wander without end)",
            "give a small absorption or a finite thickness",
        )
    if math.isinf(last.thickness_mm) and last.mu_s_per_cm + last.mu_a_per_cm <= 0:
        raise input_error(f"layers[{len(layers) - 1}]", "a semi-infinite layer needs mu_a + mu_s > 0", "give coefficients")
    if not isinstance(n_outside, int | float | np.floating | np.integer) or not math.isfinite(n_outside) or n_outside <= 0:
        raise input_error("n_outside", f"got {n_outside!r}", "give the refractive index outside the tissue, > 0 (1.0 for air)")
    thickness = np.array([layer.thickness_mm for layer in layers])
    z_bottom = np.cumsum(thickness)
    z_top = np.concatenate([[0.0], z_bottom[:-1]])
    return _Stack(
        z_top=z_top,
        z_bottom=z_bottom,
        mu_a=np.array([layer.mu_a_per_cm for layer in layers]) / MM_PER_CM,
        mu_s=np.array([layer.mu_s_per_cm for layer in layers]) / MM_PER_CM,
        g=np.array([layer.g for layer in layers]),
        n=np.array([layer.n for layer in layers]),
        n_above=float(n_outside),
        n_below=float(n_outside),
    )


def _edges(value, name: str, default) -> np.ndarray:
    if value is None:
        value = default
    try:
        edges = np.asarray(value, dtype=np.float64).ravel()
    except (TypeError, ValueError):
        raise TypeError(f"{name}: expected an array of bin edges in mm, got {type(value).__name__}") from None
    if edges.size == 0:
        return edges
    if edges.size < 2 or not np.all(np.isfinite(edges)) or edges[0] < 0 or np.any(np.diff(edges) <= 0):
        raise input_error(name, f"got {edges!r}", "give at least two finite, increasing edges >= 0 in mm")
    return edges


def _check_common(n_photons, seed, engine) -> None:
    if isinstance(n_photons, bool) or not isinstance(n_photons, int | np.integer):
        raise TypeError(f"n_photons: expected an integer, got {type(n_photons).__name__}")
    if n_photons < 1:
        raise input_error("n_photons", f"got {n_photons!r}", "give a positive number of photon packets")
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        raise input_error("seed", f"got {seed!r}", "give a non-negative integer seed")
    if engine not in ENGINES:
        raise input_error("engine", f"got {engine!r}", f"choose one of {', '.join(map(repr, ENGINES))}")


# =========================================================================== physics shared by engines


def _fresnel_scalar(n1: float, n2: float, cos_i: float) -> tuple[float, float]:
    """Unpolarised Fresnel reflectance and cos(transmitted angle) for incidence cos_i from n1 into n2."""
    if n1 == n2:
        return 0.0, cos_i
    if cos_i > _COS_ZERO:
        r = (n2 - n1) / (n2 + n1)
        return r * r, cos_i
    sin_i = math.sqrt(1.0 - cos_i * cos_i)
    sin_t = n1 * sin_i / n2
    if sin_t >= 1.0:
        return 1.0, 0.0
    if cos_i < _COS_90D:
        return 1.0, 0.0
    cos_t = math.sqrt(1.0 - sin_t * sin_t)
    rs = (n1 * cos_i - n2 * cos_t) / (n1 * cos_i + n2 * cos_t)
    rp = (n2 * cos_i - n1 * cos_t) / (n2 * cos_i + n1 * cos_t)
    return 0.5 * (rs * rs + rp * rp), cos_t


def _scatter(ux: float, uy: float, uz: float, g: float, xi: float, psi: float) -> tuple[float, float, float]:
    """The direction after one Henyey–Greenstein scattering of direction (ux, uy, uz).

    ``xi`` (uniform in [0, 1)) samples the polar deflection, ``psi`` is the azimuth (rad); the
    rotation is the standard one of Wang, Jacques & Zheng (MCML, 1995), with the near-polar case
    taken directly.  Shared by this Monte Carlo and the white one (written in numba's subset).
    """
    if g == 0.0:
        cos_s = 2.0 * xi - 1.0
    else:
        tmp = (1.0 - g * g) / (1.0 - g + 2.0 * g * xi)
        cos_s = (1.0 + g * g - tmp * tmp) / (2.0 * g)
        cos_s = min(1.0, max(-1.0, cos_s))
    sin_s = math.sqrt(1.0 - cos_s * cos_s)
    cos_p = math.cos(psi)
    sin_p = math.sin(psi)
    if abs(uz) > _POLAR_LIMIT:
        return sin_s * cos_p, sin_s * sin_p, (cos_s if uz > 0.0 else -cos_s)
    root = math.sqrt(1.0 - uz * uz)
    new_ux = sin_s * (ux * uz * cos_p - uy * sin_p) / root + ux * cos_s
    new_uy = sin_s * (uy * uz * cos_p + ux * sin_p) / root + uy * cos_s
    return new_ux, new_uy, -sin_s * cos_p * root + uz * cos_s


def _bin_index(edges: np.ndarray, value: float) -> int:
    """Index of the bin holding value, or -1 if outside the edges."""
    if edges.size < 2 or value < edges[0] or value >= edges[-1]:
        return -1
    return int(np.searchsorted(edges, value, side="right")) - 1


def _packet_loop(
    rng,
    n_packets,
    point_source,
    source_z,
    start_weight,
    z_top,
    z_bottom,
    mu_a,
    mu_s,
    g_layer,
    n_layer,
    n_above,
    n_below,
    rho_edges,
    depth_edges,
    scalars,
    absorbed,
    radial,
    by_depth,
):
    """Advance ``n_packets`` packets one at a time; add their tallies to the output arrays.

    ``scalars`` receives [reflected weight, transmitted weight, interactions].
    Written in the subset of Python that numba compiles; run as is by engine="python".
    """
    n_layers = z_top.shape[0]
    interactions = 0
    two_pi = 2.0 * math.pi
    for _ in range(n_packets):
        x = 0.0
        y = 0.0
        if point_source:
            z = source_z
            uz = 2.0 * rng.random() - 1.0
            phi = two_pi * rng.random()
            sin_t = math.sqrt(max(0.0, 1.0 - uz * uz))
            ux = sin_t * math.cos(phi)
            uy = sin_t * math.sin(phi)
            layer = 0
            while layer < n_layers - 1 and z >= z_bottom[layer]:
                layer += 1
        else:
            z = 0.0
            ux = 0.0
            uy = 0.0
            uz = 1.0
            layer = 0
        w = start_weight
        s_left = 0.0
        while True:
            if s_left == 0.0:
                s_left = -math.log(1.0 - rng.random())
            mu_t = mu_a[layer] + mu_s[layer]
            if uz > 0.0:
                d_boundary = (z_bottom[layer] - z) / uz
            elif uz < 0.0:
                d_boundary = (z_top[layer] - z) / uz
            else:
                d_boundary = math.inf
            step = s_left / mu_t if mu_t > 0.0 else math.inf
            if step >= d_boundary:
                if math.isinf(d_boundary):
                    break  # a packet gliding along a clear layer: lost (probability zero)
                x += d_boundary * ux
                y += d_boundary * uy
                if mu_t > 0.0:
                    s_left = max(s_left - d_boundary * mu_t, 0.0)
                down = uz > 0.0
                if down:
                    z = z_bottom[layer]
                    neighbour = layer + 1
                else:
                    z = z_top[layer]
                    neighbour = layer - 1
                n1 = n_layer[layer]
                if neighbour < 0:
                    n2 = n_above
                elif neighbour >= n_layers:
                    n2 = n_below
                else:
                    n2 = n_layer[neighbour]
                reflect, cos_t = _fresnel_scalar(n1, n2, abs(uz))
                if reflect > 0.0 and (reflect >= 1.0 or rng.random() <= reflect):
                    uz = -uz
                elif neighbour < 0:
                    scalars[0] += w
                    k = _bin_index(rho_edges, math.sqrt(x * x + y * y))
                    if k >= 0:
                        radial[k] += w
                    break
                elif neighbour >= n_layers:
                    scalars[1] += w
                    break
                else:
                    ratio = n1 / n2
                    ux *= ratio
                    uy *= ratio
                    uz = cos_t if down else -cos_t
                    layer = neighbour
                continue
            # interaction inside the layer
            x += step * ux
            y += step * uy
            z += step * uz
            s_left = 0.0
            deposit = w * mu_a[layer] / mu_t
            w -= deposit
            absorbed[layer] += deposit
            k = _bin_index(depth_edges, z)
            if k >= 0:
                by_depth[k] += deposit
            interactions += 1
            ux, uy, uz = _scatter(ux, uy, uz, g_layer[layer], rng.random(), two_pi * rng.random())
            if w < ROULETTE_THRESHOLD:
                if w == 0.0 or rng.random() > ROULETTE_SURVIVAL:
                    break
                w /= ROULETTE_SURVIVAL
    scalars[2] += interactions


_NUMBA_LOOP = None


def _numba_loop():
    """Compile (once, cached on disk) the per-packet loop with numba."""
    global _NUMBA_LOOP
    if _NUMBA_LOOP is None:
        import numba

        fresnel = numba.njit(cache=True, nogil=True)(_fresnel_scalar)
        bin_index = numba.njit(cache=True, nogil=True)(_bin_index)
        scatter = numba.njit(cache=True, nogil=True)(_scatter)
        globals_ = dict(_packet_loop.__globals__, _fresnel_scalar=fresnel, _bin_index=bin_index, _scatter=scatter)
        loop = type(_packet_loop)(_packet_loop.__code__, globals_, "_packet_loop_compiled")
        _NUMBA_LOOP = numba.njit(cache=True, nogil=True)(loop)
    return _NUMBA_LOOP


# =========================================================================== engines


def _batch_sizes(n_photons: int, n_batches: int) -> np.ndarray:
    base, extra = divmod(n_photons, n_batches)
    return np.array([base + (1 if i < extra else 0) for i in range(n_batches)], dtype=np.int64)


def _run_loop_engine(engine, stack, n_photons, n_batches, seed, point, source_z, w0, rho_edges, depth_edges, progress):
    sizes = _batch_sizes(n_photons, n_batches)
    n_layers = stack.z_top.size
    scalars = np.zeros((n_batches, 3))
    absorbed = np.zeros((n_batches, n_layers))
    radial = np.zeros((n_batches, max(rho_edges.size - 1, 0)))
    by_depth = np.zeros((n_batches, max(depth_edges.size - 1, 0)))
    streams = [np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(n_batches)]
    loop = _numba_loop() if engine == "numba" else _packet_loop

    def run(b: int) -> int:
        loop(
            streams[b], int(sizes[b]), point, source_z, w0,
            stack.z_top, stack.z_bottom, stack.mu_a, stack.mu_s, stack.g, stack.n,
            stack.n_above, stack.n_below, rho_edges, depth_edges,
            scalars[b], absorbed[b], radial[b], by_depth[b],
        )  # fmt: skip
        return b

    bar = _progress_bar(progress, n_batches, engine)
    if engine == "numba" and n_batches > 1:
        workers = min(n_batches, os.cpu_count() or 1)
        with ThreadPoolExecutor(max_workers=workers) as pool:
            for _ in pool.map(run, range(n_batches)):
                bar.update(1)
    else:
        for b in range(n_batches):
            run(b)
            bar.update(1)
    bar.close()
    return sizes, scalars, absorbed, radial, by_depth


def _run_numpy_engine(stack, n_photons, n_batches, seed, point, source_z, w0, rho_edges, depth_edges, progress):
    rng = np.random.default_rng(seed)
    n_layers = stack.z_top.size
    n_rho = max(rho_edges.size - 1, 0)
    n_depth = max(depth_edges.size - 1, 0)
    scalars = np.zeros((n_batches, 3))
    absorbed = np.zeros(n_batches * n_layers)
    radial = np.zeros(n_batches * n_rho)
    by_depth = np.zeros(n_batches * n_depth)
    n_above_layers = np.concatenate([[stack.n_above], stack.n, [stack.n_below]])
    mu_t_layer = stack.mu_a + stack.mu_s
    with np.errstate(divide="ignore", invalid="ignore"):
        albedo_loss = np.where(mu_t_layer > 0, stack.mu_a / mu_t_layer, 0.0)
    starts = range(0, n_photons, _NUMPY_CHUNK)
    bar = _progress_bar(progress, len(starts), "numpy")
    for start in starts:
        m = min(_NUMPY_CHUNK, n_photons - start)
        batch = (np.arange(start, start + m) % n_batches).astype(np.int64)
        x = np.zeros(m)
        y = np.zeros(m)
        if point:
            z = np.full(m, source_z)
            uz = 2.0 * rng.random(m) - 1.0
            phi = 2.0 * np.pi * rng.random(m)
            sin_t = np.sqrt(np.maximum(0.0, 1.0 - uz**2))
            ux, uy = sin_t * np.cos(phi), sin_t * np.sin(phi)
            layer = np.minimum(np.searchsorted(stack.z_bottom, source_z, side="right"), n_layers - 1)
            layer = np.full(m, layer, dtype=np.int64)
        else:
            z = np.zeros(m)
            ux = np.zeros(m)
            uy = np.zeros(m)
            uz = np.ones(m)
            layer = np.zeros(m, dtype=np.int64)
        w = np.full(m, w0)
        s_left = np.zeros(m)
        while batch.size:
            fresh = s_left == 0.0
            s_left[fresh] = -np.log1p(-rng.random(int(fresh.sum())))
            mu_t = mu_t_layer[layer]
            with np.errstate(divide="ignore", invalid="ignore"):
                d_boundary = np.where(
                    uz > 0, (stack.z_bottom[layer] - z) / uz, np.where(uz < 0, (stack.z_top[layer] - z) / uz, np.inf)
                )
                step = np.where(mu_t > 0, s_left / mu_t, np.inf)
            hit = step >= d_boundary
            alive = np.ones(batch.size, dtype=bool)
            alive[hit & np.isinf(d_boundary)] = False
            hit &= alive

            # ---- packets reaching a boundary
            h = np.flatnonzero(hit)
            if h.size:
                db = d_boundary[h]
                x[h] += db * ux[h]
                y[h] += db * uy[h]
                s_left[h] = np.where(mu_t[h] > 0, np.maximum(s_left[h] - db * mu_t[h], 0.0), s_left[h])
                down = uz[h] > 0
                lay = layer[h]
                z[h] = np.where(down, stack.z_bottom[lay], stack.z_top[lay])
                neighbour = np.where(down, lay + 1, lay - 1)
                n1 = stack.n[lay]
                n2 = n_above_layers[neighbour + 1]
                reflect, cos_t = _fresnel_array(n1, n2, np.abs(uz[h]))
                draw = (reflect > 0) & (reflect < 1)
                reflected = reflect >= 1
                reflected[draw] = rng.random(int(draw.sum())) <= reflect[draw]
                uz[h[reflected]] *= -1.0
                through = ~reflected
                out_top = through & (neighbour < 0)
                out_bottom = through & (neighbour >= n_layers)
                inside = through & ~out_top & ~out_bottom
                if out_top.any():
                    idx = h[out_top]
                    np.add.at(scalars[:, 0], batch[idx], w[idx])
                    if n_rho:
                        k = np.searchsorted(rho_edges, np.hypot(x[idx], y[idx]), side="right") - 1
                        ok = (k >= 0) & (k < n_rho)
                        radial += np.bincount(batch[idx][ok] * n_rho + k[ok], w[idx][ok], n_batches * n_rho)
                    alive[idx] = False
                if out_bottom.any():
                    idx = h[out_bottom]
                    np.add.at(scalars[:, 1], batch[idx], w[idx])
                    alive[idx] = False
                if inside.any():
                    idx = h[inside]
                    ratio = n1[inside] / n2[inside]
                    ux[idx] *= ratio
                    uy[idx] *= ratio
                    uz[idx] = np.where(down[inside], cos_t[inside], -cos_t[inside])
                    layer[idx] = neighbour[inside]

            # ---- interactions inside a layer
            i = np.flatnonzero(~hit & alive)
            if i.size:
                st = step[i]
                x[i] += st * ux[i]
                y[i] += st * uy[i]
                z[i] += st * uz[i]
                s_left[i] = 0.0
                lay = layer[i]
                deposit = w[i] * albedo_loss[lay]
                w[i] -= deposit
                absorbed += np.bincount(batch[i] * n_layers + lay, deposit, n_batches * n_layers)
                if n_depth:
                    k = np.searchsorted(depth_edges, z[i], side="right") - 1
                    ok = (k >= 0) & (k < n_depth)
                    by_depth += np.bincount(batch[i][ok] * n_depth + k[ok], deposit[ok], n_batches * n_depth)
                scalars[:, 2] += np.bincount(batch[i], minlength=n_batches)
                ux[i], uy[i], uz[i] = _scatter_array(rng, ux[i], uy[i], uz[i], stack.g[lay])
                light = np.flatnonzero(w[i] < ROULETTE_THRESHOLD)
                if light.size:
                    j = i[light]
                    survive = (w[j] > 0) & (rng.random(j.size) <= ROULETTE_SURVIVAL)
                    w[j] = np.where(survive, w[j] / ROULETTE_SURVIVAL, 0.0)
                    alive[j[~survive]] = False

            if not alive.all():
                keep = np.flatnonzero(alive)
                x, y, z, ux, uy, uz, w, s_left, layer, batch = (a[keep] for a in (x, y, z, ux, uy, uz, w, s_left, layer, batch))
        bar.update(1)
    bar.close()
    sizes = _batch_sizes(n_photons, n_batches)
    return (
        sizes,
        scalars,
        absorbed.reshape(n_batches, n_layers),
        radial.reshape(n_batches, n_rho),
        by_depth.reshape(n_batches, n_depth),
    )


def _fresnel_array(n1, n2, cos_i):
    """Vectorised :func:`_fresnel_scalar`."""
    sin_i = np.sqrt(np.maximum(0.0, 1.0 - cos_i**2))
    sin_t = n1 * sin_i / n2
    total = (sin_t >= 1.0) | (cos_i < _COS_90D)
    cos_t = np.sqrt(np.maximum(0.0, 1.0 - np.minimum(sin_t, 1.0) ** 2))
    with np.errstate(divide="ignore", invalid="ignore"):
        rs = (n1 * cos_i - n2 * cos_t) / (n1 * cos_i + n2 * cos_t)
        rp = (n2 * cos_i - n1 * cos_t) / (n2 * cos_i + n1 * cos_t)
    reflect = 0.5 * (rs**2 + rp**2)
    normal = cos_i > _COS_ZERO
    reflect = np.where(normal, ((n2 - n1) / (n2 + n1)) ** 2, reflect)
    cos_t = np.where(normal, cos_i, cos_t)
    reflect = np.where(total & ~normal, 1.0, reflect)
    cos_t = np.where(total & ~normal, 0.0, cos_t)
    matched = n1 == n2
    return np.where(matched, 0.0, reflect), np.where(matched, cos_i, cos_t)


def _scatter_array(rng, ux, uy, uz, g):
    """New directions after Henyey–Greenstein scattering (vectorised)."""
    xi = rng.random(ux.size)
    with np.errstate(divide="ignore", invalid="ignore"):
        tmp = (1.0 - g**2) / (1.0 - g + 2.0 * g * xi)
        cos_hg = np.clip((1.0 + g**2 - tmp**2) / (2.0 * g), -1.0, 1.0)
    cos_s = np.where(g == 0.0, 2.0 * xi - 1.0, cos_hg)
    sin_s = np.sqrt(1.0 - cos_s**2)
    psi = 2.0 * np.pi * rng.random(ux.size)
    cos_p, sin_p = np.cos(psi), np.sin(psi)
    polar = np.abs(uz) > _POLAR_LIMIT
    root = np.sqrt(np.maximum(1.0 - uz**2, 0.0))
    safe = np.where(polar, 1.0, root)
    new_ux = np.where(polar, sin_s * cos_p, sin_s * (ux * uz * cos_p - uy * sin_p) / safe + ux * cos_s)
    new_uy = np.where(polar, sin_s * sin_p, sin_s * (uy * uz * cos_p + ux * sin_p) / safe + uy * cos_s)
    new_uz = np.where(polar, np.where(uz > 0, cos_s, -cos_s), -sin_s * cos_p * root + uz * cos_s)
    return new_ux, new_uy, new_uz


class _NoBar:
    def update(self, n: int) -> None:
        pass

    def close(self) -> None:
        pass


def _progress_bar(progress: bool, total: int, engine: str):
    if not progress:
        return _NoBar()
    from tqdm import tqdm

    return tqdm(total=total, desc=f"Monte Carlo ({engine})", unit="batch" if engine != "numpy" else "chunk")


# =========================================================================== statistics and results


def _mean_and_error(per_batch: np.ndarray, sizes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Pooled mean per packet and its batch-means standard error along axis 0."""
    total = sizes.sum()
    mean = per_batch.sum(axis=0) / total
    nb = sizes.size
    if nb < 2:
        return mean, np.full_like(mean, np.nan)
    frac = (sizes / total).reshape((-1,) + (1,) * (per_batch.ndim - 1))
    batch_means = per_batch / sizes.reshape(frac.shape)
    var = nb / (nb - 1) * np.sum(frac**2 * (batch_means - mean) ** 2, axis=0)
    return mean, np.sqrt(var)


def _simulate(layers, n_photons, *, point, depth_mm, n_outside, seed, rho_bins_mm, depth_bins_mm, engine, progress):
    _check_common(n_photons, seed, engine)
    stack = _build_stack(layers, n_outside)
    rho_edges = _edges(rho_bins_mm, "rho_bins_mm", np.linspace(0.0, 10.0, 51))
    depth_edges = _edges(depth_bins_mm, "depth_bins_mm", np.empty(0))
    n_batches = int(min(N_BATCHES, n_photons))
    if point:
        specular = 0.0
        w0 = 1.0
    else:
        r = (stack.n[0] - stack.n_above) / (stack.n[0] + stack.n_above)
        specular = r * r
        w0 = 1.0 - specular
    args = (stack, int(n_photons), n_batches, int(seed), point, float(depth_mm), w0, rho_edges, depth_edges, progress)
    if engine == "numpy":
        sizes, scalars, absorbed, radial, by_depth = _run_numpy_engine(*args)
    else:
        sizes, scalars, absorbed, radial, by_depth = _run_loop_engine(engine, *args)

    refl, refl_se = _mean_and_error(scalars[:, 0], sizes)
    trans, trans_se = _mean_and_error(scalars[:, 1], sizes)
    abs_mean, abs_se = _mean_and_error(absorbed, sizes)
    area = np.pi * (rho_edges[1:] ** 2 - rho_edges[:-1] ** 2)
    rad_mean, rad_se = _mean_and_error(radial, sizes)
    dep_mean, dep_se = _mean_and_error(by_depth, sizes)
    notes = []
    if depth_edges.size:
        lay_top = np.clip(np.searchsorted(stack.z_bottom, depth_edges[:-1], side="right"), 0, stack.z_top.size - 1)
        lay_bot = np.clip(
            np.searchsorted(stack.z_bottom, np.nextafter(depth_edges[1:], 0), side="right"), 0, stack.z_top.size - 1
        )
        mu_a_cm = stack.mu_a[lay_top] * MM_PER_CM
        usable = (lay_top == lay_bot) & (mu_a_cm > 0)
        dz_cm = np.diff(depth_edges) / MM_PER_CM
        with np.errstate(divide="ignore", invalid="ignore"):
            fluence = np.where(usable, dep_mean / (mu_a_cm * dz_cm), np.nan)
            fluence_se = np.where(usable, dep_se / (mu_a_cm * dz_cm), np.nan)
        if point:
            notes.append("fluence by depth is the broad-beam equivalent only for a pencil beam; ignore it for a point source")
    else:
        fluence = fluence_se = np.empty(0)
    return McResult(
        reflectance=float(refl),
        reflectance_std=float(refl_se),
        specular=float(specular),
        transmission=float(trans),
        transmission_std=float(trans_se),
        absorbed=abs_mean,
        absorbed_std=abs_se,
        rho_edges_mm=rho_edges,
        radial_reflectance_per_mm2=rad_mean / area if area.size else rad_mean,
        radial_reflectance_per_mm2_std=rad_se / area if area.size else rad_se,
        depth_edges_mm=depth_edges,
        absorbed_by_depth=dep_mean,
        absorbed_by_depth_std=dep_se,
        fluence=fluence,
        fluence_std=fluence_se,
        n_photons=int(n_photons),
        n_interactions=int(scalars[:, 2].sum()),
        n_batches=n_batches,
        engine=engine,
        seed=int(seed),
        notes=tuple(notes),
    )


def simulate_slab(
    layers,
    n_photons: int,
    *,
    n_outside: float = 1.0,
    seed: int = 0,
    rho_bins_mm=None,
    depth_bins_mm=None,
    engine: str = "numpy",
    progress: bool = False,
) -> McResult:
    """Monte Carlo of a pencil beam normally incident on a layered slab (or semi-infinite medium).

    Parameters
    ----------
    layers : Layer or sequence of Layer
        Layers from the surface down; only the last may have ``thickness_mm=inf``
        (it then needs μa > 0).
    n_photons : int
        Number of photon packets.
    n_outside : float
        Refractive index above and below the stack (1.0 for air).
    seed : int
        Seed of the random streams (numpy ``Generator``; reproducible per engine).
    rho_bins_mm : array_like, optional
        Radial bin edges on the top surface, mm (default 0 to 10 mm in 0.2 mm steps;
        an empty sequence switches the radial tally off).
    depth_bins_mm : array_like, optional
        Depth bin edges for the absorbed-power / fluence tally, mm (default: none).
    engine : {"numpy", "numba", "python"}
        How to run (see the module notes); "numba" is the fastest, "python" the slowest.
    progress : bool
        Show a tqdm progress bar (off by default).

    Returns
    -------
    McResult
        Tallies with standard errors.

    Raises
    ------
    InputError
        On bad layers, counts, seeds, bins, n_outside or engine.
    TypeError
        On arguments of the wrong type.

    Notes
    -----
    Energy is conserved in expectation: specular + reflectance + transmission +
    Σ absorbed = 1 (Russian roulette is unbiased).

    References
    ----------
    .. [1] Wang, Jacques & Zheng, Comput. Methods Programs Biomed. 47, 131 (1995),
       doi:10.1016/0169-2607(95)01640-F.
    .. [2] Prahl, Keijzer, Jacques & Welch, SPIE Institute Series IS 5, 102 (1989) (weighted packets,
       roulette; no DOI).

    Examples
    --------
    >>> res = simulate_slab([Layer(0.2, 10.0, 90.0, 0.75, 1.0)], 2000, seed=1)
    >>> total = res.specular + res.reflectance + res.transmission + res.absorbed.sum()
    >>> bool(abs(total - 1.0) < 0.05)
    True
    """
    return _simulate(
        layers, n_photons, point=False, depth_mm=0.0, n_outside=n_outside, seed=seed,
        rho_bins_mm=rho_bins_mm, depth_bins_mm=depth_bins_mm, engine=engine, progress=progress,
    )  # fmt: skip


def simulate_point_source(
    layers,
    depth_mm: float,
    n_photons: int,
    *,
    n_outside: float = 1.0,
    seed: int = 0,
    rho_bins_mm=None,
    depth_bins_mm=None,
    engine: str = "numpy",
    progress: bool = False,
) -> McResult:
    """Monte Carlo of an isotropic point source at a depth inside a layered slab.

    Parameters
    ----------
    layers : Layer or sequence of Layer
        Layers from the surface down (see :func:`simulate_slab`).
    depth_mm : float
        Source depth below the surface, mm, >= 0 and inside the stack.
    n_photons : int
        Number of photon packets (each starts with weight 1).
    n_outside, seed, rho_bins_mm, depth_bins_mm, engine, progress
        As in :func:`simulate_slab`.

    Returns
    -------
    McResult
        ``escape`` (= ``reflectance``): fraction of the source power leaving the top
        surface; ``radial_reflectance_per_mm2``: its exitance profile per mm² around the
        point above the source; ``transmission`` and ``absorbed`` as for a slab.

    Raises
    ------
    InputError
        On a depth outside the stack or the errors of :func:`simulate_slab`.

    References
    ----------
    .. [1] Wang, Jacques & Zheng, Comput. Methods Programs Biomed. 47, 131 (1995),
       doi:10.1016/0169-2607(95)01640-F.

    Examples
    --------
    >>> res = simulate_point_source([Layer(math.inf, 0.1, 10.0, 0.0, 1.4)], 3.0, 500, seed=2)
    >>> bool(0.2 < res.escape < 0.8)
    True
    """
    if isinstance(depth_mm, bool) or not isinstance(depth_mm, int | float | np.floating | np.integer):
        raise TypeError(f"depth_mm: expected a number, got {type(depth_mm).__name__}")
    layers = [layers] if isinstance(layers, Layer) else list(layers)
    stack_depth = float(_build_stack(layers, n_outside).z_bottom[-1])
    if not math.isfinite(depth_mm) or depth_mm < 0 or depth_mm >= stack_depth:
        raise input_error(
            "depth_mm", f"got {depth_mm!r} for a stack {stack_depth:g} mm deep", "give a depth >= 0 inside the stack"
        )
    return _simulate(
        layers, n_photons, point=True, depth_mm=float(depth_mm), n_outside=n_outside, seed=seed,
        rho_bins_mm=rho_bins_mm, depth_bins_mm=depth_bins_mm, engine=engine, progress=progress,
    )  # fmt: skip


def radial_profile_peak_and_fwhm(rho, j, rel, *, draws: int = 0, seed: int = 0) -> tuple[float, float, float, float]:
    """On-axis value and FWHM of a binned radial exitance profile, with no transport model involved.

    ln J is fitted (least squares weighted by 1/relative error) with a cubic in ρ² over the
    bins out to 1.3 times a first estimate of the half-maximum radius (the first bin below half
    the mean of the first three); J(0) is the fit at ρ = 0 and the FWHM twice the radius where
    the fit falls to half of it.  Fitting near the axis keeps the estimate clear of the knee a
    shallow source's profile shows where ρ = d tan θc (the edge of the light escaping without
    scattering).  The package's transport tables (``tools/make_transport_tables.py``) and their
    Monte Carlo reference (``tests/data/make_transport_reference.py``) both use it, so that both
    mean the same by "FWHM".

    Parameters
    ----------
    rho, j, rel : array_like
        Bin centres, the profile in them and its relative standard errors.
    draws : int
        With draws > 0, the standard errors are the spread over that many draws of the fitted
        coefficients from their covariance (seeded by ``seed``); otherwise they are inf.

    Returns
    -------
    (J(0), FWHM, its standard error, the FWHM's standard error); NaN (and inf) when the profile
    has no half maximum or fewer than six bins inside the fit.

    Examples
    --------
    >>> rho = np.linspace(0.025, 3.0, 60)
    >>> j0, fwhm, _, _ = radial_profile_peak_and_fwhm(rho, np.exp(-rho**2), np.full(60, 0.01))
    >>> round(j0, 6), round(fwhm, 4), round(2 * math.sqrt(math.log(2)), 4)  # a Gaussian's FWHM
    (1.0, 1.6651, 1.6651)
    """
    rho, j, rel = (np.asarray(v, dtype=np.float64) for v in (rho, j, rel))
    below = np.flatnonzero(j < 0.5 * j[:3].mean())
    if not below.size:
        return math.nan, math.nan, math.inf, math.inf
    first = float(rho[below[0]])
    use = (rho < 1.3 * first) & (j > 0) & np.isfinite(rel)
    if use.sum() < 6:
        return math.nan, math.nan, math.inf, math.inf
    u = rho[use] ** 2 / first**2
    a = np.vstack([np.ones_like(u), u, u**2, u**3]).T
    w = 1.0 / np.maximum(rel[use], 1e-3)
    coef, *_ = np.linalg.lstsq(a * w[:, None], np.log(j[use]) * w, rcond=None)
    grid = np.linspace(0.0, 1.3 * first, 2001)
    x = grid**2 / first**2

    def half(c):
        ln = c[0] + c[1] * x + c[2] * x**2 + c[3] * x**3
        b = np.flatnonzero(ln < c[0] - math.log(2.0))
        if not b.size:
            return math.nan
        b = b[0]
        return 2.0 * float(np.interp(c[0] - math.log(2.0), [ln[b], ln[b - 1]], [grid[b], grid[b - 1]]))

    peak = float(np.exp(coef[0]))
    if not draws:
        return peak, half(coef), math.inf, math.inf
    cov = np.linalg.pinv((a * w[:, None]).T @ (a * w[:, None]))
    sample = np.random.default_rng(seed).multivariate_normal(coef, cov, size=draws)
    return peak, half(coef), math.sqrt(cov[0, 0]) * peak, float(np.nanstd([half(c) for c in sample]))
