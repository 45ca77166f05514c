"""Mie theory for phantom scatterers: spheres in a liquid, and the refractive indices of their materials.

The scattering efficiency Q_sca and anisotropy g of one homogeneous sphere come
from the Lorenz–Mie series in the form of Bohren & Huffman (1983, ch. 4 and
appendix A): the coefficients a_n, b_n are built from the Riccati–Bessel
functions ψ_n(x) = x·j_n(x) and ξ_n(x) = x·(j_n(x) + i·y_n(x)) (scipy's
spherical Bessel functions) and the logarithmic derivative D_n(mx) by downward
recurrence, summed to n_stop = x + 4x^(1/3) + 2 terms (Wiscombe 1980).  Written
here because scipy has no Mie routine and a run-time dependency on a Mie
package for one series is heavier than the series; the tests check it against
miepython.

A suspension of N spheres per volume of radius r at volume fraction f scatters
μs = N·Q_sca·πr² = 3·f·Q_sca/(4r) and μs′ = μs·(1 − g) (independent scattering:
valid for dilute suspensions; above a volume fraction of about 0.1 dependent
scattering lowers μs′ and a :class:`~probeplan.errors.ModelValidityWarning` is
given; common practice, no single threshold).

Refractive indices (wavelength in µm inside the formulas):

- polystyrene: Cauchy form of Ma et al. (2003),
  n = 1.5725 + 0.0031080/λ² + 0.00034779/λ⁴, measured 370–1610 nm;
- fused silica: Sellmeier form of Malitson (1965), 210–3710 nm;
- rutile TiO₂ (ordinary ray): Sellmeier form of DeVore (1951),
  n² = 5.913 + 0.2441/(λ² − 0.0803), measured 430–1530 nm (from memory: check loosely);
- water: 1.33 by default (``n_medium``); common practice for the NIR.

References
----------
C. F. Bohren, D. R. Huffman, Absorption and Scattering of Light by Small Particles (Wiley, 1983),
doi:10.1002/9783527618156.
W. J. Wiscombe, Appl. Opt. 19, 1505 (1980), doi:10.1364/AO.19.001505.
X. Ma et al., Phys. Med. Biol. 48, 4165 (2003), doi:10.1088/0031-9155/48/24/013.
I. H. Malitson, J. Opt. Soc. Am. 55, 1205 (1965), doi:10.1364/JOSA.55.001205.
J. R. DeVore, J. Opt. Soc. Am. 41, 416 (1951), doi:10.1364/JOSA.41.000416.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import spherical_jn, spherical_yn

from probeplan.errors import ModelValidityWarning, input_error, positive_number, warn_at_caller
from probeplan.units import NM_PER_UM, UM_PER_CM  # noqa: F401

__all__ = [
    "mie_efficiencies",
    "sphere_reduced_scattering_per_cm",
    "sphere_scattering_per_cm",
    "refractive_index",
    "SPHERE_MATERIALS",
    "DEPENDENT_SCATTERING_FRACTION",
]

#: Volume fraction above which independent scattering overestimates μs′ (common practice).
DEPENDENT_SCATTERING_FRACTION = 0.1


def _polystyrene(wl_um):
    """Ma et al. 2003, Cauchy fit, 370–1610 nm."""
    return 1.5725 + 0.0031080 / wl_um**2 + 0.00034779 / wl_um**4


def _silica(wl_um):
    """Malitson 1965, fused silica Sellmeier, 210–3710 nm."""
    l2 = wl_um**2
    return np.sqrt(1.0 + 0.6961663 * l2 / (l2 - 0.0684043**2) + 0.4079426 * l2 / (l2 - 0.1162414**2)
                   + 0.8974794 * l2 / (l2 - 9.896161**2))


def _rutile(wl_um):
    """DeVore 1951, rutile ordinary ray, 430–1530 nm (from memory)."""
    return np.sqrt(5.913 + 0.2441 / (wl_um**2 - 0.0803))


#: Sphere materials: (index formula of λ in µm, valid range nm, density g/cm³, source).
SPHERE_MATERIALS = {
    "polystyrene": (_polystyrene, (370.0, 1610.0), 1.05, "Ma et al., Phys. Med. Biol. 48, 4165 (2003)"),
    "silica": (_silica, (210.0, 3710.0), 2.0, "Malitson, J. Opt. Soc. Am. 55, 1205 (1965); density of "
               "colloidal silica about 2.0 g/cm3 (typical, varies with porosity)"),
    "tio2": (_rutile, (430.0, 1530.0), 4.23, "DeVore, J. Opt. Soc. Am. 41, 416 (1951), rutile ordinary ray "
             "(from memory); density of rutile 4.23 g/cm3"),
}


def refractive_index(material: str, wavelength_nm) -> np.ndarray:
    """Refractive index of a sphere material at ``wavelength_nm`` (see the module notes for sources).

    Outside the formula's measured range a :class:`~probeplan.errors.ModelValidityWarning` is given.

    Examples
    --------
    >>> round(float(refractive_index("polystyrene", 589.0)), 4)
    1.5843
    >>> round(float(refractive_index("silica", 589.0)), 4)
    1.4584
    """
    key = str(material).lower()
    if key not in SPHERE_MATERIALS:
        raise input_error("material", f"unknown sphere material {material!r}",
                          f"choose one of {', '.join(SPHERE_MATERIALS)}")
    formula, (lo, hi), _, source = SPHERE_MATERIALS[key]
    wl = np.asarray(wavelength_nm, dtype=np.float64)
    if not np.all(np.isfinite(wl)) or np.any(wl <= 0):
        raise input_error("wavelength_nm", f"got {wavelength_nm!r}", "give wavelengths in nm > 0")
    if np.any(wl < lo) or np.any(wl > hi):
        warn_at_caller(f"{key} refractive index extrapolated outside {lo:g}-{hi:g} nm ({source})",
                      ModelValidityWarning)
    return formula(wl / NM_PER_UM)


def _efficiencies_one(m: complex, x: float) -> tuple[float, float]:
    """Q_sca and g for relative index ``m`` and size parameter ``x`` (Bohren & Huffman, BHMIE)."""
    n_stop = int(math.ceil(x + 4.0 * x ** (1.0 / 3.0) + 2.0))
    n = np.arange(1, n_stop + 1)
    mx = m * x
    # logarithmic derivative D_n(mx) by downward recurrence (stable for any m)
    n_start = int(max(n_stop, abs(mx))) + 16
    d = np.zeros(n_start + 1, dtype=np.complex128)
    for k in range(n_start, 0, -1):
        d[k - 1] = k / mx - 1.0 / (d[k] + k / mx)
    dn = d[1: n_stop + 1]
    orders = np.arange(0, n_stop + 1)
    psi = x * spherical_jn(orders, x)
    xi = psi + 1j * x * spherical_yn(orders, x)
    psi_n, psi_m1 = psi[1:], psi[:-1]
    xi_n, xi_m1 = xi[1:], xi[:-1]
    ta = dn / m + n / x
    tb = m * dn + n / x
    a = (ta * psi_n - psi_m1) / (ta * xi_n - xi_m1)
    b = (tb * psi_n - psi_m1) / (tb * xi_n - xi_m1)
    qsca = 2.0 / x**2 * float(np.sum((2 * n + 1) * (np.abs(a) ** 2 + np.abs(b) ** 2)))
    cross = np.sum(n[:-1] * (n[:-1] + 2) / (n[:-1] + 1) * np.real(a[:-1] * np.conj(a[1:]) + b[:-1] * np.conj(b[1:])))
    same = np.sum((2 * n + 1) / (n * (n + 1)) * np.real(a * np.conj(b)))
    g = 4.0 / (x**2 * qsca) * float(cross + same) if qsca > 0 else 0.0
    return qsca, g


def mie_efficiencies(n_particle, diameter_um, wavelength_nm, *, n_medium: float = 1.33) -> tuple[np.ndarray, np.ndarray]:
    """Scattering efficiency Q_sca and anisotropy g of a sphere in a medium.

    Parameters
    ----------
    n_particle : complex or array_like
        Refractive index of the sphere (imaginary part >= 0 for absorption).
    diameter_um : float or array_like
        Sphere diameter (µm).
    wavelength_nm : float or array_like
        Vacuum wavelength (nm).  The three inputs broadcast.
    n_medium : float
        Refractive index of the surrounding liquid.

    Returns
    -------
    qsca, g : ndarray
        Arrays of the broadcast shape.

    Examples
    --------
    >>> q, g = mie_efficiencies(1.5, 1.0, 633.0, n_medium=1.0)
    >>> round(float(q), 3) > 2.0
    True
    """
    n_med = positive_number("n_medium", n_medium)
    m, d, wl = np.broadcast_arrays(np.asarray(n_particle, dtype=np.complex128),
                                   np.asarray(diameter_um, dtype=np.float64), np.asarray(wavelength_nm, dtype=np.float64))
    if not np.all(np.isfinite(d)) or np.any(d <= 0):
        raise input_error("diameter_um", f"got {diameter_um!r}", "give sphere diameters in µm > 0")
    if not np.all(np.isfinite(wl)) or np.any(wl <= 0):
        raise input_error("wavelength_nm", f"got {wavelength_nm!r}", "give wavelengths in nm > 0")
    if np.any(m.real <= 0) or np.any(m.imag < 0):
        raise input_error("n_particle", f"got {n_particle!r}", "give a refractive index with real part > 0, imaginary >= 0")
    qsca = np.empty(m.shape)
    g = np.empty(m.shape)
    for idx in np.ndindex(m.shape):
        x = math.pi * d[idx] * NM_PER_UM * n_med / wl[idx]
        qsca[idx], g[idx] = _efficiencies_one(complex(m[idx]) / n_med, x)
    return qsca, g


def sphere_scattering_per_cm(diameter_um, volume_fraction, wavelength_nm, *, n_particle, n_medium: float = 1.33):
    """Scattering coefficient μs (cm⁻¹) and anisotropy g of a dilute suspension of spheres.

    ``n_particle`` is a complex number, an array broadcasting with ``wavelength_nm``,
    or a material name of :data:`SPHERE_MATERIALS` (index from its published formula).
    """
    f = positive_number("volume_fraction", volume_fraction, allow_zero=True)
    if f >= 1:
        raise input_error("volume_fraction", f"got {f:g}", "give the spheres' volume fraction, below 1")
    if f > DEPENDENT_SCATTERING_FRACTION:
        warn_at_caller(f"volume fraction {f:g} is above {DEPENDENT_SCATTERING_FRACTION:g}: dependent scattering makes "
                      "the independent-scattering μs′ too high", ModelValidityWarning)
    n_p = refractive_index(n_particle, wavelength_nm) if isinstance(n_particle, str) else n_particle
    qsca, g = mie_efficiencies(n_p, diameter_um, wavelength_nm, n_medium=n_medium)
    radius_cm = np.asarray(diameter_um, dtype=np.float64) / 2.0 / UM_PER_CM
    return 3.0 * f * qsca / (4.0 * radius_cm), g


def sphere_reduced_scattering_per_cm(diameter_um, volume_fraction, wavelength_nm, *, n_particle, n_medium: float = 1.33):
    """Reduced scattering coefficient μs′ (cm⁻¹) of a dilute suspension of spheres, by Mie theory.

    Parameters
    ----------
    diameter_um : float or array_like
        Sphere diameter (µm).
    volume_fraction : float
        Volume of spheres per volume of suspension (0–1); independent scattering is assumed.
    wavelength_nm : float or array_like
        Vacuum wavelength (nm); broadcasts with ``diameter_um``.
    n_particle : complex, array_like or str
        Refractive index of the spheres, or a material name: ``"polystyrene"``
        (Ma et al. 2003), ``"silica"`` (Malitson 1965), ``"tio2"`` (rutile, DeVore 1951).
    n_medium : float
        Refractive index of the liquid (1.33, water).

    Returns
    -------
    ndarray
        μs′ = 3·f·Q_sca·(1 − g)/(4r) in cm⁻¹, of the broadcast shape.

    References
    ----------
    Bohren & Huffman (1983), doi:10.1002/9783527618156; see the module notes.

    Examples
    --------
    >>> round(float(sphere_reduced_scattering_per_cm(1.0, 0.001, 800.0, n_particle="polystyrene")), 2)
    2.54
    """
    mu_s, g = sphere_scattering_per_cm(diameter_um, volume_fraction, wavelength_nm, n_particle=n_particle,
                                       n_medium=n_medium)
    return mu_s * (1.0 - g)
