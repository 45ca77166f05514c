"""Monte Carlo correction tables for diffusion theory: transport that holds where μa is not ≪ μs′.

Diffusion theory (:mod:`probeplan.model.transport`) is fast and right far from
sources and boundaries when absorption is small against scattering.  In NIR-II,
μa/μs′ reaches 0.1–0.5 and diffusion overestimates the escape from a source at a
few millimetres by 20–40 %.  This module multiplies each diffusion quantity by a
correction factor C = (Monte Carlo)/(diffusion), tabulated once from the package's
own Monte Carlo and shipped in ``probeplan/data/transport_tables.npz``:

* escape fraction of an isotropic point source at depth d;
* its on-axis exitance J(ρ = 0, d);
* the FWHM of its exitance profile;
* the fluence at depth z under a broad collimated beam.

Why this form (a "hybrid" of diffusion and tabulated Monte Carlo)
------------------------------------------------------------------
* **One white run per (g, n) serves every absorption.**  The tables come from a
  non-absorbing ("white") Monte Carlo in which each packet's reduced path length
  is recorded and absorption is applied afterwards as exp(−μa L) (microscopic
  Beer–Lambert law; Sassaroli & Fantini 2004, Alerstam et al. 2008).  Lengths
  scale with 1/μs′, so the tables are indexed by μa/μs′ and the reduced depth
  d·μs′ only, plus the anisotropy g and the refractive index n (similarity in
  reduced units; it is not assumed across g: g and n are table axes).
  See :mod:`probeplan.model.montecarlo_white`.
* **The ratio to diffusion is smooth and of order one.**  Interpolating it,
  rather than the Monte Carlo values themselves, keeps the tables small and the
  interpolation error far below the 5 % target, and the answer falls back to
  diffusion where diffusion is right (C → 1 for μa/μs′ → 0 at depth).
* **Deep in the medium** both fall exponentially, with slightly different decay
  constants when μa/μs′ is large (diffusion's μeff is not the exact transport
  eigenvalue; see e.g. Star 1995).  Beyond the last table cell whose Monte Carlo
  standard error is below 5 %, ln C is continued linearly: for the escape and the
  on-axis exitance with the slope μeff − k, k the exact decay constant of the similar
  isotropic medium (Case & Zweifel 1967); the broad-beam correction and the FWHM
  ratio are held at their last kept values.
* **On-axis exitance and FWHM** are estimated near the axis of the tabulated radial
  profiles (a weighted cubic in ρ² of ln J), alike for the Monte Carlo and for the
  bin-averaged diffusion profile, so that the knee a shallow source's profile shows
  at ρ = d tan θc (the edge of the light escaping unscattered) does not bias them.
* δ-P1 (Carp, Prahl & Venugopalan 2004) improves the broad-beam fluence near the
  surface but keeps diffusion's μeff for the decay and was not used: it does not
  reach 5 % for the escape at μa/μs′ near 0.5.

Ranges: μa/μs′ 0.005–0.6, g 0.8–0.95, n 1.33–1.45 (linear interpolation in g and
n, in log μa/μs′ and in reduced depth); outside them the nearest table edge is
used and :func:`out_of_range` reports it.  Below μa/μs′ = 0.005 the correction at
0.005 is used (for the escape, ln C is brought to 0 at μa = 0 as √(μa/μs′), the exact
limit: nothing is absorbed, everything escapes): there diffusion itself is within a
few per cent and the correction is close to 1 (checked against Monte Carlo at 0.001
in the tests).  Accuracy against live Monte Carlo runs:
``docs/transport_models.md`` and ``tests/test_transport_tables.py``.

References
----------
.. [1] Sassaroli & Fantini, Phys. Med. Biol. 49, N255 (2004), doi:10.1088/0031-9155/49/14/N07.
.. [2] Alerstam, Andersson-Engels & Svensson, J. Biomed. Opt. 13, 041304 (2008), doi:10.1117/1.2950319.
.. [3] Carp, Prahl & Venugopalan, J. Biomed. Opt. 9, 632 (2004), doi:10.1117/1.1695412.
.. [4] Star, "Diffusion theory of light transport", ch. 6 in Welch & van Gemert (eds.),
   Optical-Thermal Response of Laser-Irradiated Tissue, Plenum, New York (1995).
.. [5] Case & Zweifel, Linear Transport Theory, Addison-Wesley, Reading MA (1967), ch. 4.
"""

from __future__ import annotations

import functools
from importlib import resources

import numpy as np

__all__ = ["QUANTITIES", "TABLE_RANGES", "correction", "corrections", "out_of_range", "table_info"]

#: Corrected quantities, as named in the shipped tables.
QUANTITIES: tuple[str, ...] = ("escape", "exitance0", "fwhm", "broad_beam")
_DEPTH_AXIS = {"escape": "z", "broad_beam": "z", "exitance0": "z2", "fwhm": "z2"}


@functools.lru_cache(maxsize=1)
def _tables() -> dict[str, np.ndarray]:
    with resources.files("probeplan.data").joinpath("transport_tables.npz").open("rb") as fh:
        with np.load(fh) as data:
            return {key: np.array(data[key]) for key in data.files}


def table_info() -> dict[str, object]:
    """Provenance and axes of the shipped tables (copies)."""
    t = _tables()
    return {
        "provenance": str(t["provenance"]),
        "g": t["g_grid"].copy(),
        "n": t["n_grid"].copy(),
        "mu_a_over_mu_s_prime": t["ratios"].copy(),
        "reduced_depth": t["z"].copy(),
    }


def _ranges() -> dict[str, tuple[float, float]]:
    t = _tables()
    return {
        "g": (float(t["g_grid"][0]), float(t["g_grid"][-1])),
        "n": (float(t["n_grid"][0]), float(t["n_grid"][-1])),
        "mu_a_over_mu_s_prime": (float(t["ratios"][0]), float(t["ratios"][-1])),
    }


class _Ranges:
    def __getitem__(self, key):
        return _ranges()[key]

    def items(self):
        return _ranges().items()


#: Ranges covered by the tables: {"g": (lo, hi), "n": (lo, hi), "mu_a_over_mu_s_prime": (lo, hi)}.
TABLE_RANGES = _Ranges()


def _weights(grid: np.ndarray, value: float) -> tuple[int, int, float]:
    value = min(max(value, float(grid[0])), float(grid[-1]))
    i = int(np.clip(np.searchsorted(grid, value, side="right") - 1, 0, grid.size - 2))
    t = (value - grid[i]) / (grid[i + 1] - grid[i])
    return i, i + 1, float(t)


@functools.lru_cache(maxsize=1)
def _on_common_grid() -> dict[str, np.ndarray]:
    """ln C of every quantity on the 1-D depth grid ``z`` (the radial-profile ones are resampled).

    Beyond the radial tables' last depth, ln C₀ continues with its stored slope and the
    width ratio stays at its last value (as in :func:`correction`).
    """
    t = _tables()
    z, z2 = t["z"], t["z2"]
    out = {}
    for q in QUANTITIES:
        log_c = np.log(t[q].astype(np.float64))
        if _DEPTH_AXIS[q] == "z2":
            resampled = np.empty(log_c.shape[:-1] + (z.size,))
            for idx in np.ndindex(log_c.shape[:-1]):
                resampled[idx] = np.interp(z, z2, log_c[idx])
            if q + "_slope" in t:
                resampled += t[q + "_slope"][..., None] * np.maximum(z - z2[-1], 0.0)
            log_c = resampled
        out[q] = log_c
    return out


@functools.lru_cache(maxsize=64)
def _stacked(quantities: tuple[str, ...], g: float, n: float) -> tuple[np.ndarray, np.ndarray]:
    """ln C of several quantities at one g, n on the common grid, shape (K, Z, Q), and tail slopes (K, Q)."""
    t = _tables()
    grid = _on_common_grid()
    gi0, gi1, tg = _weights(t["g_grid"], g)
    ni0, ni1, tn = _weights(t["n_grid"], n)

    def mix(a: np.ndarray) -> np.ndarray:
        return ((1 - tg) * ((1 - tn) * a[gi0, ni0] + tn * a[gi0, ni1])
                + tg * ((1 - tn) * a[gi1, ni0] + tn * a[gi1, ni1]))

    table = np.stack([mix(grid[q]) for q in quantities], axis=-1)  # (K, Z, Q)
    slopes = np.stack([mix(t[q + "_slope"]) if q + "_slope" in t else np.zeros(t["ratios"].size)
                       for q in quantities], axis=-1)
    return np.ascontiguousarray(table), slopes


def corrections(quantities: tuple[str, ...], ratio, reduced_depth, g: float, n: float) -> tuple[np.ndarray, ...]:
    """Several correction factors at once (one index computation); see :func:`correction`.

    Examples
    --------
    >>> esc, peak = corrections(("escape", "exitance0"), 0.2, 3.0, 0.9, 1.4)
    >>> bool(esc < 1.0 and peak < 1.0)
    True
    """
    t = _tables()
    for q in quantities:
        if q not in QUANTITIES:
            raise ValueError(f"quantity: got {q!r}, expected one of {QUANTITIES}")
    table, slopes = _stacked(tuple(quantities), float(g), float(n))
    ratios, z = t["ratios"], t["z"]
    # The ratio's cell and weight are found on the ratio as given, before it is broadcast against
    # the depths: the model's μa/μs′ varies with wavelength only, (1, …, W) against (D, …, W) depths.
    r = np.asarray(ratio, dtype=np.float64)
    d = np.asarray(reduced_depth, dtype=np.float64)
    shape = np.broadcast_shapes(r.shape, d.shape)
    ik = np.interp(np.log(np.clip(r, ratios[0], ratios[-1])), _log_ratios(), np.arange(ratios.size))
    iz = np.interp(d, z, np.arange(z.size))
    n_k, n_z, n_q = table.shape
    i0 = np.minimum(ik.astype(np.intp), n_k - 2)
    j0 = np.minimum(iz.astype(np.intp), n_z - 2)
    ti = ik - i0
    tj = iz - j0
    base = i0 * n_z + j0  # flat index of the lower corner; 1-D takes are the fastest numpy gather
    beyond = np.maximum(d - z[-1], 0.0)
    deep = bool(np.any(beyond > 0))
    out = []
    for q_index in range(n_q):
        flat = table[:, :, q_index].ravel()
        lo = flat.take(base) * (1 - tj) + flat.take(base + 1) * tj
        hi = flat.take(base + n_z) * (1 - tj) + flat.take(base + n_z + 1) * tj
        value = lo + (hi - lo) * ti
        if deep:
            sl = slopes[:, q_index]
            value = value + (sl.take(i0) * (1 - ti) + sl.take(i0 + 1) * ti) * beyond
        out.append(np.broadcast_to(value, shape))
    result = []
    for q, value in zip(quantities, out, strict=True):
        if q == "escape":
            below_grid = r < ratios[0]
            if np.any(below_grid):
                value = np.where(below_grid, value * np.sqrt(np.clip(r, 0.0, None) / ratios[0]), value)
        result.append(np.exp(value))
    return tuple(result)


@functools.lru_cache(maxsize=1)
def _log_ratios() -> np.ndarray:
    return np.log(_tables()["ratios"])


def correction(quantity: str, ratio, reduced_depth, g: float, n: float) -> np.ndarray:
    """Correction factor C = Monte Carlo / diffusion for one quantity.

    Parameters
    ----------
    quantity : {"escape", "exitance0", "fwhm", "broad_beam"}
        Which quantity (see the module notes).
    ratio : array_like
        μa/μs′ (clipped to the table's range; see :func:`out_of_range`).
    reduced_depth : array_like
        Depth × μs′ (dimensionless), >= 0.
    g, n : float
        Anisotropy and refractive index (clipped to the table's range).

    Returns
    -------
    ndarray
        C, broadcast shape of ``ratio`` and ``reduced_depth``.

    Examples
    --------
    >>> c = correction("escape", 0.001, 10.0, 0.9, 1.4)
    >>> bool(abs(float(c) - 1.0) < 0.03)
    True
    """
    if quantity not in QUANTITIES:
        raise ValueError(f"quantity: got {quantity!r}, expected one of {QUANTITIES}")
    return corrections((quantity,), ratio, reduced_depth, g, n)[0]


def out_of_range(ratio, g, n) -> list[str]:
    """Plain-words list of the inputs outside the tables' ranges (empty when all are inside)."""
    problems = []
    lim = _ranges()
    for name, value in (("mu_a/mu_s'", ratio), ("g", g), ("n", n)):
        key = "mu_a_over_mu_s_prime" if name == "mu_a/mu_s'" else name
        lo, hi = lim[key]
        arr = np.asarray(value, dtype=np.float64)
        # below the smallest mu_a/mu_s' diffusion holds and the edge correction (close to 1) is used on purpose
        low = arr.min() < lo * (1 - 1e-9) and name != "mu_a/mu_s'"
        if arr.size and (low or arr.max() > hi * (1 + 1e-9)):
            problems.append(f"{name} up to {arr.max():.3g} (tables cover {lo:g}..{hi:g})")
    return problems
