"""Light transport in tissue by steady-state diffusion theory with an extrapolated boundary.

Units: optical coefficients in cm⁻¹ (the field's convention); distances the user
gives or reads (depths, radial distances, FWHM) in mm.  Inside every function the
distances are converted once to cm with :data:`MM_PER_CM`; areal densities are
converted back to mm⁻² with :data:`MM2_PER_CM2`.  All functions take numpy
array-likes and broadcast them by numpy rules; nothing loops over elements in
Python.

The geometry is a homogeneous semi-infinite medium (tissue) of refractive index
``n`` relative to the outside medium (``n = n_tissue / n_outside``, 1.4 for tissue
in air by default) with its surface at depth 0.  The boundary is handled with the
extrapolated-boundary (image-source) method: the fluence is taken as zero on the
plane ``z = -z_b`` above the surface, ``z_b = 2 A D``, where ``A`` accounts for
internal reflection at the index-mismatched surface (Haskell et al. 1994).

Which expression is used for light leaving the surface
-------------------------------------------------------
Every "exitance" and "reflectance" here is the Fick's-law flux ``J = -D ∂φ/∂z`` at
the surface (Farrell, Patterson & Wilson 1992).  With the exact ``A``, Haskell's
combined expression ``R = φ (1 - R_φ)/4 + J (1 - R_j)/2`` reduces identically to
``J`` whenever the partial-current boundary condition ``φ = 2 A J`` holds, so the
two differ only through the extrapolated-boundary approximation itself.  The Fick
form is used because it integrates to the closed forms of Farrell et al. for the
total reflectance and the total escape.

Validity
--------
Diffusion theory holds far (several transport mean free paths ``1/(μa + μs′)``)
from sources and boundaries and for ``μa ≪ μs′``.  The functions here compute
everywhere, without warning; call :func:`diffusion_validity` to flag (and warn
about) shallow depths and high absorption.  ``docs/diffusion_vs_montecarlo.md``
shows how far the formulas depart from the Monte Carlo reference
(:mod:`probeplan.model.montecarlo`) near the surface.
"""

from __future__ import annotations

import functools
import math

import numpy as np

from probeplan.errors import ModelValidityWarning, input_error, warn_at_caller
from probeplan.units import MM_PER_CM  # noqa: F401

__all__ = [
    "MM_PER_CM",
    "MM2_PER_CM2",
    "VALIDITY_MIN_DEPTH_MFP",
    "VALIDITY_MAX_ABSORPTION_RATIO",
    "BOUNDARY_METHODS",
    "mu_eff",
    "diffusion_coefficient_cm",
    "effective_reflection",
    "boundary_factor",
    "extrapolated_boundary_cm",
    "diffuse_reflectance",
    "spatially_resolved_reflectance_per_mm2",
    "broad_beam_fluence",
    "point_source_exitance_per_mm2",
    "point_source_escape",
    "point_source_blur_fwhm_mm",
    "uniform_layer_escape_mm",
    "diffusion_validity",
    "TRANSPORT_MODELS",
    "DEFAULT_ANISOTROPY",
    "resolve_model",
]

#: Square millimetres per square centimetre (per-cm² densities → per-mm²).
MM2_PER_CM2 = MM_PER_CM**2
#: Depths shallower than this many transport mean free paths are flagged invalid.
VALIDITY_MIN_DEPTH_MFP = 1.0
#: ``μa / μs′`` above this ratio is flagged invalid (diffusion needs μa ≪ μs′).
VALIDITY_MAX_ABSORPTION_RATIO = 0.1
#: Transport models (``model=``), most accurate first; ``"auto"`` picks the first.
TRANSPORT_MODELS: dict[str, str] = {
    "mc_table": "diffusion theory corrected by shipped Monte Carlo tables (against Monte Carlo for mu_a/mu_s' "
    "0.001-0.5, g 0.8-0.95, n 1.33-1.45, depths 0.5-10 mm: escape, broad-beam fluence, on-axis exitance and "
    "blur FWHM within 3 %; probeplan.model.transport_tables)",
    "diffusion": "diffusion theory with the extrapolated boundary (Farrell, Patterson & Wilson 1992)",
}
#: Scattering anisotropy assumed when none is given (soft tissue in the red and NIR: common practice).
DEFAULT_ANISOTROPY = 0.9
#: Ways to compute the internal reflection of the boundary (``method=``).
BOUNDARY_METHODS: tuple[str, ...] = ("exact", "polynomial")

# Gauss-Legendre nodes for the Haskell integrals (integrand is smooth in the
# variable used, so 64 nodes give machine precision).
_QUAD_NODES, _QUAD_WEIGHTS = np.polynomial.legendre.leggauss(64)
_FWHM_NEWTON_ITERATIONS = 40
_FWHM_RELATIVE_TOLERANCE = 1e-10
_SMALL_ARGUMENT = 1e-8


# --------------------------------------------------------------------------- validation


def _as_float_array(value, name: str) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise TypeError(f"{name}: expected a number or an array of numbers, got {type(value).__name__}") from None
    return arr


def _first_bad(arr: np.ndarray, bad: np.ndarray) -> float:
    return float(arr[bad].flat[0])


def _coefficient(value, name: str, *, positive: bool = False) -> np.ndarray:
    arr = _as_float_array(value, name)
    finite = np.isfinite(arr)
    if not finite.all():
        raise input_error(name, f"got {_first_bad(arr, ~finite)!r}", "give finite optical coefficients in cm^-1 (no NaN or inf)")
    bad = arr <= 0 if positive else arr < 0
    if bad.any():
        need = "> 0" if positive else ">= 0"
        raise input_error(name, f"got {_first_bad(arr, bad)!r}, expected {need}", "give coefficients in cm^-1")
    return arr


def _depth_cm(value, name: str) -> np.ndarray:
    arr = _as_float_array(value, name)
    finite = np.isfinite(arr)
    if not finite.all():
        raise input_error(name, f"got {_first_bad(arr, ~finite)!r}", "give finite distances in mm (no NaN or inf)")
    if (arr < 0).any():
        raise input_error(
            name, f"got {_first_bad(arr, arr < 0)!r}, expected >= 0", "give distances in mm below/along the surface"
        )
    return arr / MM_PER_CM


def _refractive_index(value, name: str = "n") -> np.ndarray:
    arr = _as_float_array(value, name)
    bad = ~np.isfinite(arr) | (arr <= 0)
    if bad.any():
        raise input_error(
            name,
            f"got {_first_bad(arr, bad)!r}, expected a finite value > 0",
            "give the relative index n_tissue / n_outside (about 1.4 for tissue in air)",
        )
    return arr


def _check_method(method: str) -> str:
    if method not in BOUNDARY_METHODS:
        raise input_error("method", f"got {method!r}", f"choose one of {', '.join(map(repr, BOUNDARY_METHODS))}")
    return method


def _expm1_ratio(x: np.ndarray) -> np.ndarray:
    """``(1 - exp(-x)) / x`` for x >= 0, equal to 1 at x = 0, without cancellation."""
    safe = np.where(x > _SMALL_ARGUMENT, x, 1.0)
    return np.where(x > _SMALL_ARGUMENT, -np.expm1(-safe) / safe, 1.0 - 0.5 * x)


# --------------------------------------------------------------------------- basic quantities


def mu_eff(mu_a_per_cm, mu_s_prime_per_cm) -> np.ndarray:
    """Effective attenuation coefficient of diffuse light, cm⁻¹.

    Parameters
    ----------
    mu_a_per_cm : array_like
        Absorption coefficient μa, cm⁻¹, >= 0.
    mu_s_prime_per_cm : array_like
        Reduced scattering coefficient μs′ = μs (1 − g), cm⁻¹, > 0.

    Returns
    -------
    ndarray
        μeff = √(3 μa (μa + μs′)) in cm⁻¹, broadcast shape of the inputs.

    Raises
    ------
    InputError
        On NaN, inf, negative μa or non-positive μs′.

    Notes
    -----
    Diffuse fluence far from a source falls as exp(−μeff r); valid for μa ≪ μs′.

    References
    ----------
    .. [1] Farrell, Patterson & Wilson, Med. Phys. 19, 879 (1992), doi:10.1118/1.596777.

    Examples
    --------
    >>> round(float(mu_eff(0.1, 10.0)), 4)
    1.7407
    """
    mu_a = _coefficient(mu_a_per_cm, "mu_a_per_cm")
    mu_sp = _coefficient(mu_s_prime_per_cm, "mu_s_prime_per_cm", positive=True)
    return np.sqrt(3.0 * mu_a * (mu_a + mu_sp))


def diffusion_coefficient_cm(mu_a_per_cm, mu_s_prime_per_cm) -> np.ndarray:
    """Diffusion coefficient D = 1 / (3 (μa + μs′)), in cm.

    Parameters
    ----------
    mu_a_per_cm, mu_s_prime_per_cm : array_like
        μa (>= 0) and μs′ (> 0), cm⁻¹.

    Returns
    -------
    ndarray
        D in cm (the fluence-rate convention, D = 1/(3 μt′)).

    Raises
    ------
    InputError
        On NaN, inf, negative μa or non-positive μs′.

    References
    ----------
    .. [1] Farrell, Patterson & Wilson, Med. Phys. 19, 879 (1992), doi:10.1118/1.596777.

    Examples
    --------
    >>> round(float(diffusion_coefficient_cm(0.1, 9.9)), 6)
    0.033333
    """
    mu_a = _coefficient(mu_a_per_cm, "mu_a_per_cm")
    mu_sp = _coefficient(mu_s_prime_per_cm, "mu_s_prime_per_cm", positive=True)
    return 1.0 / (3.0 * (mu_a + mu_sp))


# --------------------------------------------------------------------------- boundary


def _fresnel_from_inside(n: np.ndarray, cos_t: np.ndarray) -> np.ndarray:
    """Unpolarised Fresnel reflectance for light inside (index n) reaching a boundary to index 1.

    Parametrised by the cosine of the transmitted (outside) angle ``cos_t``.
    """
    sin_t2 = 1.0 - cos_t**2
    cos_i = np.sqrt(np.maximum(1.0 - sin_t2 / n**2, 0.0))
    rs = (n * cos_i - cos_t) / (n * cos_i + cos_t)
    rp = (cos_i - n * cos_t) / (cos_i + n * cos_t)
    return 0.5 * (rs**2 + rp**2)


def _haskell_moments(n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """R_φ = ∫ 2 sinθ cosθ R_F dθ and R_j = ∫ 3 sinθ cos²θ R_F dθ over the inside hemisphere.

    With μ = cosθ inside, R_φ = ∫₀¹ 2 μ R_F dμ and R_j = ∫₀¹ 3 μ² R_F dμ.  For n > 1
    the directions beyond the critical angle (μ < μ_c) add μ_c² and μ_c³, and the
    rest is integrated in t = cos(transmitted angle), where the integrand is smooth
    (dμ = t / (n² μ) dt).  For n <= 1 there is no total reflection and the
    integrand is smooth in μ itself.
    """
    n = n[..., None]
    x = 0.5 * (_QUAD_NODES + 1.0)
    w = 0.5 * _QUAD_WEIGHTS
    # n > 1: integrate in t over [0, 1]
    n_hi = np.maximum(n, 1.0)
    mu_i = np.sqrt(1.0 - (1.0 - x**2) / n_hi**2)
    r_f = _fresnel_from_inside(n_hi, x)
    r_phi_hi = np.sum(w * 2.0 * x * r_f / n_hi**2, axis=-1)
    r_j_hi = np.sum(w * 3.0 * mu_i * x * r_f / n_hi**2, axis=-1)
    mu_c = np.sqrt(1.0 - 1.0 / n_hi[..., 0] ** 2)
    r_phi_hi += mu_c**2
    r_j_hi += mu_c**3
    # n <= 1: integrate in mu over [0, 1]
    n_lo = np.minimum(n, 1.0)
    cos_t = np.sqrt(1.0 - n_lo**2 * (1.0 - x**2))
    rs = (n_lo * x - cos_t) / (n_lo * x + cos_t)
    rp = (x - n_lo * cos_t) / (x + n_lo * cos_t)
    r_f_lo = 0.5 * (rs**2 + rp**2)
    r_phi_lo = np.sum(w * 2.0 * x * r_f_lo, axis=-1)
    r_j_lo = np.sum(w * 3.0 * x**2 * r_f_lo, axis=-1)
    above = n[..., 0] > 1.0
    return np.where(above, r_phi_hi, r_phi_lo), np.where(above, r_j_hi, r_j_lo)


@functools.lru_cache(maxsize=256)
def _r_eff_exact_scalar(n: float) -> float:
    r_phi, r_j = _haskell_moments(np.array([n]))
    return float(((r_phi + r_j) / (2.0 - r_phi + r_j))[0])


def _r_eff_exact(n: np.ndarray) -> np.ndarray:
    if n.size == 1:
        return np.full(n.shape, _r_eff_exact_scalar(float(n.flat[0])))
    unique, inverse = np.unique(n, return_inverse=True)
    r_phi, r_j = _haskell_moments(unique)
    return ((r_phi + r_j) / (2.0 - r_phi + r_j))[inverse].reshape(n.shape)


def effective_reflection(n, *, method: str = "exact") -> np.ndarray:
    """Effective reflection coefficient R_eff of the tissue surface for diffuse light.

    Parameters
    ----------
    n : array_like
        Relative refractive index n_tissue / n_outside, > 0 (``"polynomial"``: >= 1).
    method : {"exact", "polynomial"}
        ``"exact"``: Haskell et al. (1994) integrals of the Fresnel reflectance;
        ``"polynomial"``: the fit of Groenhuis et al. (1983) / Egan & Hilgeman.

    Returns
    -------
    ndarray
        R_eff, dimensionless, shape of ``n``.

    Raises
    ------
    InputError
        On n <= 0, NaN or inf, an unknown method, or n < 1 with ``"polynomial"``.

    Notes
    -----
    Exact: R_eff = (R_φ + R_j) / (2 − R_φ + R_j) with
    R_φ = ∫₀^{π/2} 2 sinθ cosθ R_F(θ) dθ and R_j = ∫₀^{π/2} 3 sinθ cos²θ R_F(θ) dθ,
    R_F the unpolarised Fresnel reflectance for light inside the tissue
    (1 beyond the critical angle).  Polynomial:
    r_id = −1.440 n⁻² + 0.710 n⁻¹ + 0.668 + 0.0636 n, fitted for n >= 1.

    References
    ----------
    .. [1] Haskell et al., J. Opt. Soc. Am. A 11, 2727 (1994), doi:10.1364/JOSAA.11.002727.
    .. [2] Groenhuis, Ferwerda & Ten Bosch, Appl. Opt. 22, 2456 (1983), doi:10.1364/AO.22.002456.

    Examples
    --------
    >>> round(float(effective_reflection(1.4)), 4)
    0.4935
    >>> round(float(effective_reflection(1.4, method="polynomial")), 4)
    0.5295
    """
    _check_method(method)
    n_arr = _refractive_index(n)
    if method == "polynomial":
        if (n_arr < 1).any():
            raise input_error(
                "n",
                f"got {_first_bad(n_arr, n_arr < 1)!r}, the polynomial fit holds for n >= 1",
                'use method="exact" for n < 1',
            )
        return -1.440 / n_arr**2 + 0.710 / n_arr + 0.668 + 0.0636 * n_arr
    return _r_eff_exact(n_arr)


def boundary_factor(n, *, method: str = "exact") -> np.ndarray:
    """Boundary factor A = (1 + R_eff) / (1 − R_eff) of the extrapolated boundary.

    Parameters
    ----------
    n : array_like
        Relative refractive index n_tissue / n_outside, > 0.
    method : {"exact", "polynomial"}
        How R_eff is computed; see :func:`effective_reflection`.

    Returns
    -------
    ndarray
        A, dimensionless (1 for an index-matched surface).

    Raises
    ------
    InputError
        As :func:`effective_reflection`.

    References
    ----------
    .. [1] Haskell et al., J. Opt. Soc. Am. A 11, 2727 (1994), doi:10.1364/JOSAA.11.002727.

    Examples
    --------
    >>> round(float(boundary_factor(1.33)), 3)
    2.515
    """
    r_eff = effective_reflection(n, method=method)
    return (1.0 + r_eff) / (1.0 - r_eff)


def extrapolated_boundary_cm(mu_a_per_cm, mu_s_prime_per_cm, n=1.4, *, method: str = "exact") -> np.ndarray:
    """Distance z_b = 2 A D above the surface where the diffuse fluence is taken as zero, cm.

    Parameters
    ----------
    mu_a_per_cm, mu_s_prime_per_cm : array_like
        μa (>= 0) and μs′ (> 0), cm⁻¹.
    n : array_like
        Relative refractive index n_tissue / n_outside.
    method : {"exact", "polynomial"}
        How A is computed; see :func:`boundary_factor`.

    Returns
    -------
    ndarray
        z_b in cm.

    Raises
    ------
    InputError
        On invalid coefficients, n or method.

    References
    ----------
    .. [1] Haskell et al., J. Opt. Soc. Am. A 11, 2727 (1994), doi:10.1364/JOSAA.11.002727.

    Examples
    --------
    >>> round(float(extrapolated_boundary_cm(0.0, 10.0, 1.0)), 6)
    0.066667
    """
    return 2.0 * boundary_factor(n, method=method) * diffusion_coefficient_cm(mu_a_per_cm, mu_s_prime_per_cm)


# --------------------------------------------------------------------------- reflectance


def diffuse_reflectance(mu_a_per_cm, mu_s_prime_per_cm, n=1.4, *, method: str = "polynomial") -> np.ndarray:
    """Total diffuse reflectance of a semi-infinite medium under a collimated beam (Farrell 1992).

    Parameters
    ----------
    mu_a_per_cm, mu_s_prime_per_cm : array_like
        μa (>= 0) and μs′ (> 0), cm⁻¹.
    n : array_like
        Relative refractive index n_tissue / n_outside (default 1.4, tissue in air).
    method : {"polynomial", "exact"}
        How the boundary factor A is computed (default ``"polynomial"``, as in
        Farrell et al.'s use of the Groenhuis fit); see :func:`boundary_factor`.

    Returns
    -------
    ndarray
        Rd, the diffusely reflected fraction of the light that entered the tissue
        (the specular reflection at the surface is not included).

    Raises
    ------
    InputError
        On invalid coefficients, n or method.

    Notes
    -----
    Rd = (a′/2) exp(−√(3(1 − a′))) [1 + exp(−(4/3) A √(3(1 − a′)))], a′ = μs′/(μa + μs′):
    the integral over the surface of the dipole R(ρ)
    (:func:`spatially_resolved_reflectance_per_mm2`) with the source placed one
    transport mean free path deep.  Accurate to a few per cent for a′ >= 0.99; it
    overestimates Rd at low albedo, where diffusion fails.

    References
    ----------
    .. [1] Farrell, Patterson & Wilson, Med. Phys. 19, 879 (1992), doi:10.1118/1.596777.

    Examples
    --------
    >>> round(float(diffuse_reflectance(0.1, 10.0, 1.4)), 4)
    0.6141
    """
    mu_a = _coefficient(mu_a_per_cm, "mu_a_per_cm")
    mu_sp = _coefficient(mu_s_prime_per_cm, "mu_s_prime_per_cm", positive=True)
    a_factor = boundary_factor(n, method=method)
    albedo = mu_sp / (mu_a + mu_sp)
    root = np.sqrt(3.0 * (1.0 - albedo))
    return 0.5 * albedo * np.exp(-root) * (1.0 + np.exp(-4.0 / 3.0 * a_factor * root))


def _dipole_flux_cm2(rho_cm, z_real_cm, z_image_cm, mu_eff_cm) -> np.ndarray:
    """Fick flux at the surface (per cm²) of a unit isotropic source at z_real and its image."""
    r1 = np.sqrt(z_real_cm**2 + rho_cm**2)
    r2 = np.sqrt(z_image_cm**2 + rho_cm**2)
    with np.errstate(divide="ignore", invalid="ignore"):
        term1 = z_real_cm * (mu_eff_cm + 1.0 / r1) * np.exp(-mu_eff_cm * r1) / r1**2
    term1 = np.where(r1 > 0, term1, 0.0)
    term2 = z_image_cm * (mu_eff_cm + 1.0 / r2) * np.exp(-mu_eff_cm * r2) / r2**2
    return (term1 + term2) / (4.0 * math.pi)


def spatially_resolved_reflectance_per_mm2(rho_mm, mu_a_per_cm, mu_s_prime_per_cm, n=1.4, *, method: str = "exact") -> np.ndarray:
    """Diffuse reflectance R(ρ) at distance ρ from a normally incident pencil beam, per mm².

    Parameters
    ----------
    rho_mm : array_like
        Radial distance from the entry point on the surface, mm, >= 0.
    mu_a_per_cm, mu_s_prime_per_cm : array_like
        μa (>= 0) and μs′ (> 0), cm⁻¹.
    n : array_like
        Relative refractive index n_tissue / n_outside.
    method : {"exact", "polynomial"}
        How the boundary factor A is computed.

    Returns
    -------
    ndarray
        Fraction of the light entering the tissue that leaves it per mm² of surface at ρ.

    Raises
    ------
    InputError
        On invalid distances, coefficients, n or method.

    Notes
    -----
    Farrell et al. (1992), Fick's-law flux of an isotropic source of strength a′ at
    z₀ = 1/(μa + μs′) and its negative image at −(z₀ + 2 z_b):

    R(ρ) = (a′/4π)[z₀(μeff + 1/r₁)e^{−μeff r₁}/r₁² + (z₀ + 2z_b)(μeff + 1/r₂)e^{−μeff r₂}/r₂²],
    r₁² = z₀² + ρ², r₂² = (z₀ + 2z_b)² + ρ².  Accurate beyond about one to two
    transport mean free paths from the beam; integrates to :func:`diffuse_reflectance`.

    References
    ----------
    .. [1] Farrell, Patterson & Wilson, Med. Phys. 19, 879 (1992), doi:10.1118/1.596777.

    Examples
    --------
    >>> r = spatially_resolved_reflectance_per_mm2([1.0, 5.0], 0.1, 10.0)
    >>> bool(r[0] > r[1] > 0)
    True
    """
    rho_cm = _depth_cm(rho_mm, "rho_mm")
    mu_a = _coefficient(mu_a_per_cm, "mu_a_per_cm")
    mu_sp = _coefficient(mu_s_prime_per_cm, "mu_s_prime_per_cm", positive=True)
    z_b = extrapolated_boundary_cm(mu_a, mu_sp, n, method=method)
    mu_t = mu_a + mu_sp
    z0 = 1.0 / mu_t
    albedo = mu_sp / mu_t
    flux = _dipole_flux_cm2(rho_cm, z0, z0 + 2.0 * z_b, np.sqrt(3.0 * mu_a * mu_t))
    return albedo * flux / MM2_PER_CM2


# --------------------------------------------------------------------------- excitation


def _broad_beam_fluence_diffusion(depth_mm, mu_a_per_cm, mu_s_prime_per_cm, n=1.4, *, method: str = "exact") -> np.ndarray:
    """Fluence rate at depth under a broad, normally incident collimated beam, per unit irradiance.

    Parameters
    ----------
    depth_mm : array_like
        Depth below the surface, mm, >= 0.
    mu_a_per_cm, mu_s_prime_per_cm : array_like
        μa (>= 0) and μs′ (> 0), cm⁻¹.
    n : array_like
        Relative refractive index n_tissue / n_outside.
    method : {"exact", "polynomial"}
        How the boundary factor A is computed.

    Returns
    -------
    ndarray
        φ(z)/E₀, dimensionless: collimated plus diffuse fluence rate per unit
        incident irradiance (multiply by the irradiance in mW/cm² to get mW/cm²).

    Raises
    ------
    InputError
        On invalid depths, coefficients, n or method.

    Notes
    -----
    The beam loses the specular fraction R_sp = ((n − 1)/(n + 1))² at the surface;
    E′ = (1 − R_sp) E₀ enters.  In the similarity (δ-Eddington) picture, where only
    μs′ is known, the unscattered part falls as φ_c = E′ exp(−μt′ z), μt′ = μa + μs′,
    and it feeds an isotropic diffuse source q(z) = μs′ φ_c(z).  The diffusion
    equation D φ″ − μa φ = −q with φ(−z_b) = 0 is solved with the plane-source Green's
    function and its negative image, G(z, z′) = [e^{−μ|z−z′|} − e^{−μ(z+z′+2z_b)}]/(2Dμ),
    μ = μeff, which integrates in closed form to

    φ_d(z) = μs′ E′ / (D (μt′ + μ)) · [z e^{−min(μ, μt′) z} f(|μt′ − μ| z) + z_b e^{−μz} f(2μz_b)],

    with f(x) = (1 − e^{−x})/x (f(0) = 1), written so that μa → 0 and μeff → μt′
    need no special case.  Deep in the tissue φ falls as exp(−μeff z); near the
    surface (z below about one transport mean free path) the diffusion part is
    only approximate (see :func:`diffusion_validity`).

    References
    ----------
    .. [1] Star, "Diffusion theory of light transport", ch. 6 in Welch & van Gemert (eds.),
       Optical-Thermal Response of Laser-Irradiated Tissue, Plenum, New York (1995).
    .. [2] Haskell et al., J. Opt. Soc. Am. A 11, 2727 (1994), doi:10.1364/JOSAA.11.002727.
    .. [3] Joseph, Wiscombe & Weinman, J. Atmos. Sci. 33, 2452 (1976) (δ-Eddington),
       doi:10.1175/1520-0469(1976)033<2452:TDEAFR>2.0.CO;2.

    Examples
    --------
    >>> phi = broad_beam_fluence([0.0, 2.0, 10.0], 0.1, 10.0, model="diffusion")
    >>> bool(phi[0] > 1.0 and phi[1] > phi[2])
    True
    """
    z = _depth_cm(depth_mm, "depth_mm")
    mu_a = _coefficient(mu_a_per_cm, "mu_a_per_cm")
    mu_sp = _coefficient(mu_s_prime_per_cm, "mu_s_prime_per_cm", positive=True)
    n_arr = _refractive_index(n)
    z_b = extrapolated_boundary_cm(mu_a, mu_sp, n_arr, method=method)
    mu_t = mu_a + mu_sp
    mu = np.sqrt(3.0 * mu_a * mu_t)
    diff_coef = 1.0 / (3.0 * mu_t)
    transmitted = 1.0 - ((n_arr - 1.0) / (n_arr + 1.0)) ** 2
    slow = np.minimum(mu, mu_t)
    diffuse = (
        mu_sp
        / (diff_coef * (mu_t + mu))
        * (z * np.exp(-slow * z) * _expm1_ratio(np.abs(mu_t - mu) * z) + z_b * np.exp(-mu * z) * _expm1_ratio(2.0 * mu * z_b))
    )
    return transmitted * (np.exp(-mu_t * z) + diffuse)


# --------------------------------------------------------------------------- emission


def _point_source_exitance_per_mm2_diffusion(
    rho_mm, depth_mm, mu_a_per_cm, mu_s_prime_per_cm, n=1.4, *, method: str = "exact"
) -> np.ndarray:
    """Surface exitance of an isotropic point source at depth, per unit source power, per mm².

    Parameters
    ----------
    rho_mm : array_like
        Radial distance on the surface from the point above the source, mm, >= 0.
    depth_mm : array_like
        Source depth, mm, >= 0.
    mu_a_per_cm, mu_s_prime_per_cm : array_like
        μa (>= 0) and μs′ (> 0) at the emission wavelength, cm⁻¹.
    n : array_like
        Relative refractive index n_tissue / n_outside.
    method : {"exact", "polynomial"}
        How the boundary factor A is computed.

    Returns
    -------
    ndarray
        Fraction of the source power leaving the surface per mm² at ρ.

    Raises
    ------
    InputError
        On invalid distances, coefficients, n or method.

    Notes
    -----
    Image-source solution with the extrapolated boundary; the exitance is the
    Fick's-law flux (see the module notes on why not Haskell's combined form):

    J(ρ) = (1/4π)[d(μeff + 1/r₁)e^{−μeff r₁}/r₁² + (d + 2z_b)(μeff + 1/r₂)e^{−μeff r₂}/r₂²],

    r₁² = d² + ρ², r₂² = (d + 2z_b)² + ρ².  At d = 0 the direct term is a
    point at ρ = 0 and is left out of the profile (it still counts in
    :func:`point_source_escape`).

    References
    ----------
    .. [1] Farrell, Patterson & Wilson, Med. Phys. 19, 879 (1992), doi:10.1118/1.596777.
    .. [2] Haskell et al., J. Opt. Soc. Am. A 11, 2727 (1994), doi:10.1364/JOSAA.11.002727.

    Examples
    --------
    >>> j = point_source_exitance_per_mm2([0.0, 3.0], 3.0, 0.1, 10.0, model="diffusion")
    >>> bool(j[0] > j[1] > 0)
    True
    """
    rho_cm = _depth_cm(rho_mm, "rho_mm")
    d = _depth_cm(depth_mm, "depth_mm")
    mu_a = _coefficient(mu_a_per_cm, "mu_a_per_cm")
    mu_sp = _coefficient(mu_s_prime_per_cm, "mu_s_prime_per_cm", positive=True)
    z_b = extrapolated_boundary_cm(mu_a, mu_sp, n, method=method)
    mu = np.sqrt(3.0 * mu_a * (mu_a + mu_sp))
    return _dipole_flux_cm2(rho_cm, d, d + 2.0 * z_b, mu) / MM2_PER_CM2


def _point_source_escape_diffusion(depth_mm, mu_a_per_cm, mu_s_prime_per_cm, n=1.4, *, method: str = "exact") -> np.ndarray:
    """Fraction of an isotropic point source's power that escapes through the surface.

    Parameters
    ----------
    depth_mm : array_like
        Source depth, mm, >= 0.
    mu_a_per_cm, mu_s_prime_per_cm : array_like
        μa (>= 0) and μs′ (> 0) at the emission wavelength, cm⁻¹.
    n : array_like
        Relative refractive index n_tissue / n_outside.
    method : {"exact", "polynomial"}
        How the boundary factor A is computed.

    Returns
    -------
    ndarray
        Escaping fraction, 0..1.

    Raises
    ------
    InputError
        On invalid depths, coefficients, n or method.

    Notes
    -----
    The Fick flux of a point source through a plane at distance z integrates to
    ½ exp(−μeff z), so the dipole of :func:`point_source_exitance_per_mm2` gives

    η(d) = ½ e^{−μeff d} (1 + e^{−2 μeff z_b}).

    Limits: with no absorption every photon eventually leaves a semi-infinite
    medium, and η = 1 at any depth; at d → 0 with absorption η → ½(1 + e^{−2μeff z_b}).

    References
    ----------
    .. [1] Farrell, Patterson & Wilson, Med. Phys. 19, 879 (1992), doi:10.1118/1.596777.

    Examples
    --------
    >>> float(point_source_escape(5.0, 0.0, 10.0, model="diffusion"))
    1.0
    >>> round(float(point_source_escape(2.0, 0.1, 10.0, model="diffusion")), 3)
    0.532
    """
    d = _depth_cm(depth_mm, "depth_mm")
    mu_a = _coefficient(mu_a_per_cm, "mu_a_per_cm")
    mu_sp = _coefficient(mu_s_prime_per_cm, "mu_s_prime_per_cm", positive=True)
    z_b = extrapolated_boundary_cm(mu_a, mu_sp, n, method=method)
    mu = np.sqrt(3.0 * mu_a * (mu_a + mu_sp))
    return 0.5 * np.exp(-mu * d) * (1.0 + np.exp(-2.0 * mu * z_b))


def _dipole_scaled(u, z1, z2, mu):
    """Dipole flux (×4π, ×e^{μ z1}) and its derivative with respect to u = ρ², per term."""
    r1 = np.sqrt(z1**2 + u)
    r2 = np.sqrt(z2**2 + u)
    e1 = np.exp(-mu * (r1 - z1))
    e2 = np.exp(-mu * (r2 - z1))
    inv1 = 1.0 / r1
    inv2 = 1.0 / r2
    value = z1 * e1 * inv1**2 * (mu + inv1) + z2 * e2 * inv2**2 * (mu + inv2)
    # dT/dr = -z e^{-μr}(μ²/r² + 3μ/r³ + 3/r⁴); dr/du = 1/(2r)
    d1 = -z1 * e1 * inv1**2 * (mu**2 + 3.0 * mu * inv1 + 3.0 * inv1**2) * 0.5 * inv1
    d2 = -z2 * e2 * inv2**2 * (mu**2 + 3.0 * mu * inv2 + 3.0 * inv2**2) * 0.5 * inv2
    return value, d1 + d2


def _point_source_blur_fwhm_mm_diffusion(depth_mm, mu_a_per_cm, mu_s_prime_per_cm, n=1.4, *, method: str = "exact") -> np.ndarray:
    """Full width at half maximum of the surface exitance profile of a point source at depth, mm.

    Parameters
    ----------
    depth_mm : array_like
        Source depth, mm, >= 0.
    mu_a_per_cm, mu_s_prime_per_cm : array_like
        μa (>= 0) and μs′ (> 0) at the emission wavelength, cm⁻¹.
    n : array_like
        Relative refractive index n_tissue / n_outside.
    method : {"exact", "polynomial"}
        How the boundary factor A is computed.

    Returns
    -------
    ndarray
        FWHM in mm of :func:`point_source_exitance_per_mm2` over ρ (0 at depth 0).

    Raises
    ------
    InputError
        On invalid depths, coefficients, n or method.

    Notes
    -----
    As a function of u = ρ² each dipole term is completely monotone, so J(u) is
    decreasing and log-convex.  Newton's method on log J(u) − log(J(0)/2), started
    at u = 0, therefore approaches the half-maximum point from below without
    overshooting; it runs vectorised over all elements to a relative tolerance
    of 1e-10 (typically 3–6 steps).  Without absorption and with an index-matched surface it tends to
    about 1.53 d for deep sources.

    References
    ----------
    .. [1] Farrell, Patterson & Wilson, Med. Phys. 19, 879 (1992), doi:10.1118/1.596777.

    Examples
    --------
    >>> f = point_source_blur_fwhm_mm([1.0, 5.0], 0.1, 10.0, model="diffusion")
    >>> bool(0 < f[0] < f[1])
    True
    """
    d = _depth_cm(depth_mm, "depth_mm")
    mu_a = _coefficient(mu_a_per_cm, "mu_a_per_cm")
    mu_sp = _coefficient(mu_s_prime_per_cm, "mu_s_prime_per_cm", positive=True)
    z_b = extrapolated_boundary_cm(mu_a, mu_sp, n, method=method)
    mu = np.sqrt(3.0 * mu_a * (mu_a + mu_sp))
    d, z_b, mu = np.broadcast_arrays(d, z_b, mu)
    shape = d.shape
    d, z_b, mu = (np.array(a, dtype=np.float64).ravel() for a in (d, z_b, mu))
    result = np.zeros(d.shape)
    pos = d > 0
    if pos.any():
        z1, mu1 = d[pos], mu[pos]
        z2 = z1 + 2.0 * z_b[pos]
        half, _ = _dipole_scaled(np.zeros_like(z1), z1, z2, mu1)
        log_target = np.log(0.5 * half)
        u = np.zeros_like(z1)
        active = np.arange(z1.size)
        for _ in range(_FWHM_NEWTON_ITERATIONS):
            ua, za = u[active], z1[active]
            value, slope = _dipole_scaled(ua, za, z2[active], mu1[active])
            # Newton on the convex, decreasing log J(u): from u = 0 every step stays left of the root.
            step = -(np.log(value) - log_target[active]) * value / slope
            u[active] = ua + step
            converged = np.abs(step) <= _FWHM_RELATIVE_TOLERANCE * np.maximum(ua + step, za**2)
            active = active[~converged]
            if active.size == 0:
                break
        result[pos] = 2.0 * np.sqrt(u)
    return (result * MM_PER_CM).reshape(shape)


def uniform_layer_escape_mm(mu_a_per_cm, mu_s_prime_per_cm, n=1.4, *, top_mm=0.0, bottom_mm=np.inf) -> np.ndarray:
    """Light escaping per mm² of surface from isotropic emission spread uniformly through a layer.

    Parameters
    ----------
    mu_a_per_cm, mu_s_prime_per_cm : array_like
        μa (>= 0) and μs′ (> 0) at the emission wavelength, cm⁻¹.
    n : array_like
        Relative refractive index n_tissue / n_outside.
    top_mm, bottom_mm : array_like
        Depths of the top and bottom of the emitting layer, mm,
        0 <= top < bottom (bottom may be ``inf``).

    Returns
    -------
    ndarray
        Escaping power per mm² of surface for an emitted power density of 1 per mm³,
        i.e. a length in mm.  ``inf`` for a non-absorbing layer of infinite depth.

    Raises
    ------
    InputError
        On invalid coefficients or n, negative or NaN depths, or bottom <= top.

    Notes
    -----
    The integral over depth of :func:`point_source_escape` (exact boundary factor):

    ∫_t^b η(z) dz = ½ (1 + e^{−2μeff z_b}) e^{−μeff t} (1 − e^{−μeff (b − t)}) / μeff,

    which tends to (b − t) without absorption.  Used for background from
    nonspecific probe uptake and for autofluorescence.

    References
    ----------
    .. [1] Farrell, Patterson & Wilson, Med. Phys. 19, 879 (1992), doi:10.1118/1.596777.

    Examples
    --------
    >>> round(float(uniform_layer_escape_mm(0.0, 10.0, top_mm=1.0, bottom_mm=3.0)), 6)
    2.0
    """
    mu_a = _coefficient(mu_a_per_cm, "mu_a_per_cm")
    mu_sp = _coefficient(mu_s_prime_per_cm, "mu_s_prime_per_cm", positive=True)
    top = _as_float_array(top_mm, "top_mm")
    bottom = _as_float_array(bottom_mm, "bottom_mm")
    bad_top = ~np.isfinite(top) | (top < 0)
    if bad_top.any():
        raise input_error("top_mm", f"got {_first_bad(top, bad_top)!r}", "give the layer top as a finite depth >= 0 in mm")
    top_b, bottom_b = np.broadcast_arrays(top, bottom)
    bad_bottom = np.isnan(bottom_b) | (bottom_b <= top_b)
    if bad_bottom.any():
        raise input_error(
            "bottom_mm",
            f"got {_first_bad(bottom_b, bad_bottom)!r} with top_mm {_first_bad(top_b, bad_bottom)!r}",
            "give a bottom deeper than the top",
        )
    z_b = extrapolated_boundary_cm(mu_a, mu_sp, n) * MM_PER_CM
    mu = np.sqrt(3.0 * mu_a * (mu_a + mu_sp)) / MM_PER_CM  # per mm
    thickness = bottom - top
    with np.errstate(divide="ignore", invalid="ignore"):
        infinite = np.where(mu > 0, 1.0 / mu, np.inf)
        finite = thickness * _expm1_ratio(mu * np.where(np.isfinite(thickness), thickness, 0.0))
        depth_integral = np.where(np.isinf(thickness), infinite, finite)
    return 0.5 * (1.0 + np.exp(-2.0 * mu * z_b)) * np.exp(-mu * top) * depth_integral


# --------------------------------------------------------------------------- model choice


def resolve_model(model: str) -> str:
    """Name of the transport model that ``model`` selects (``"auto"``: the most accurate shipped).

    Parameters
    ----------
    model : str
        ``"auto"`` or a key of :data:`TRANSPORT_MODELS`.

    Returns
    -------
    str
        A key of :data:`TRANSPORT_MODELS`.

    Raises
    ------
    InputError
        On an unknown name; the message lists the valid ones.

    Examples
    --------
    >>> resolve_model("auto")
    'mc_table'
    """
    if not isinstance(model, str) or (model != "auto" and model not in TRANSPORT_MODELS):
        valid = ", ".join(repr(m) for m in ("auto", *TRANSPORT_MODELS))
        raise input_error("model", f"got {model!r}", f"choose one of {valid}")
    return next(iter(TRANSPORT_MODELS)) if model == "auto" else model


def _anisotropy(g) -> float:
    if isinstance(g, bool) or not isinstance(g, int | float | np.floating | np.integer):
        raise TypeError(f"g: expected a number, got {type(g).__name__}")
    g = float(g)
    if not math.isfinite(g) or not -1.0 < g < 1.0:
        raise input_error("g", f"got {g!r}", "give the scattering anisotropy strictly between -1 and 1 (about 0.9 for tissue)")
    return g


def _scalar_n(n) -> float:
    arr = _refractive_index(n)
    if arr.size != 1:
        values = np.unique(arr)
        if values.size != 1:
            raise input_error("n", "got several refractive indices", 'give one n per call with model="mc_table"')
    return float(arr.flat[0])


def _reduced(mu_a_per_cm, mu_s_prime_per_cm, length_mm, name):
    mu_a = _coefficient(mu_a_per_cm, "mu_a_per_cm")
    mu_sp = _coefficient(mu_s_prime_per_cm, "mu_s_prime_per_cm", positive=True)
    length_cm = _depth_cm(length_mm, name)
    return mu_a / mu_sp, length_cm * mu_sp


def point_source_escape(depth_mm, mu_a_per_cm, mu_s_prime_per_cm, n=1.4, *, g=DEFAULT_ANISOTROPY,
                        model: str = "auto", method: str = "exact") -> np.ndarray:
    """Fraction of an isotropic point source's power that escapes through the surface.

    Parameters
    ----------
    depth_mm : array_like
        Source depth, mm, >= 0.
    mu_a_per_cm, mu_s_prime_per_cm : array_like
        μa (>= 0) and μs′ (> 0) at the emission wavelength, cm⁻¹.
    n : array_like
        Relative refractive index n_tissue / n_outside (one value with ``"mc_table"``).
    g : float
        Scattering anisotropy (used by ``"mc_table"``; diffusion depends on μs′ only).
    model : {"auto", "mc_table", "diffusion"}
        Transport model (:data:`TRANSPORT_MODELS`); ``"auto"`` is ``"mc_table"``.
    method : {"exact", "polynomial"}
        Boundary factor of the diffusion part (``"mc_table"`` needs ``"exact"``, the
        formula its tables were made against).

    Returns
    -------
    ndarray
        Escaping fraction, 0..1.

    Raises
    ------
    InputError
        On invalid depths, coefficients, n, g, model or method.

    Notes
    -----
    ``"diffusion"``: η(d) = ½ e^{−μeff d} (1 + e^{−2 μeff z_b}) (Farrell et al. 1992).
    ``"mc_table"``: that value × the Monte Carlo correction of
    :mod:`probeplan.model.transport_tables` at μa/μs′, d·μs′, g and n.

    References
    ----------
    .. [1] Farrell, Patterson & Wilson, Med. Phys. 19, 879 (1992), doi:10.1118/1.596777.
    .. [2] Sassaroli & Fantini, Phys. Med. Biol. 49, N255 (2004), doi:10.1088/0031-9155/49/14/N07.

    Examples
    --------
    >>> d = float(point_source_escape(3.0, 1.03, 5.53, model="diffusion"))
    >>> m = float(point_source_escape(3.0, 1.03, 5.53))
    >>> bool(m < d)
    True
    """
    chosen = _model_and_method(model, method)
    base = _point_source_escape_diffusion(depth_mm, mu_a_per_cm, mu_s_prime_per_cm, n, method=method)
    if chosen == "diffusion":
        return base
    ratio, z = _reduced(mu_a_per_cm, mu_s_prime_per_cm, depth_mm, "depth_mm")
    return base * _tables().correction("escape", ratio, z, _anisotropy(g), _scalar_n(n))


def point_source_exitance_per_mm2(rho_mm, depth_mm, mu_a_per_cm, mu_s_prime_per_cm, n=1.4, *,
                                  g=DEFAULT_ANISOTROPY, model: str = "auto", method: str = "exact") -> np.ndarray:
    """Surface exitance of an isotropic point source at depth, per unit source power, per mm².

    Parameters
    ----------
    rho_mm : array_like
        Radial distance on the surface from the point above the source, mm, >= 0.
    depth_mm : array_like
        Source depth, mm, >= 0.
    mu_a_per_cm, mu_s_prime_per_cm, n, g, model, method
        As in :func:`point_source_escape`.

    Returns
    -------
    ndarray
        Fraction of the source power leaving the surface per mm² at ρ.

    Raises
    ------
    InputError
        On invalid distances, coefficients, n, g, model or method.

    Notes
    -----
    ``"diffusion"``: the dipole (image-source) Fick flux of Farrell et al. (1992).
    ``"mc_table"``: the dipole profile stretched radially by the Monte Carlo FWHM
    ratio w and scaled by the Monte Carlo on-axis ratio C₀,
    J(ρ) = C₀ J_dipole(ρ / w), so that its peak and width match the Monte Carlo;
    its wings keep the dipole's shape (an approximation; the total under it is not
    the escape fraction, use :func:`point_source_escape` for that).

    References
    ----------
    .. [1] Farrell, Patterson & Wilson, Med. Phys. 19, 879 (1992), doi:10.1118/1.596777.

    Examples
    --------
    >>> j = point_source_exitance_per_mm2([0.0, 3.0], 3.0, 0.1, 10.0)
    >>> bool(j[0] > j[1] > 0)
    True
    """
    chosen = _model_and_method(model, method)
    if chosen == "diffusion":
        return _point_source_exitance_per_mm2_diffusion(rho_mm, depth_mm, mu_a_per_cm, mu_s_prime_per_cm, n,
                                                        method=method)
    ratio, z = _reduced(mu_a_per_cm, mu_s_prime_per_cm, depth_mm, "depth_mm")
    rho = _depth_cm(rho_mm, "rho_mm") * MM_PER_CM
    g_val, n_val = _anisotropy(g), _scalar_n(n)
    tables = _tables()
    width, peak = tables.corrections(("fwhm", "exitance0"), ratio, z, g_val, n_val)
    return peak * _point_source_exitance_per_mm2_diffusion(rho / width, depth_mm, mu_a_per_cm, mu_s_prime_per_cm,
                                                           n, method=method)


def point_source_blur_fwhm_mm(depth_mm, mu_a_per_cm, mu_s_prime_per_cm, n=1.4, *, g=DEFAULT_ANISOTROPY,
                              model: str = "auto", method: str = "exact") -> np.ndarray:
    """Full width at half maximum of the surface exitance profile of a point source at depth, mm.

    Parameters
    ----------
    depth_mm, mu_a_per_cm, mu_s_prime_per_cm, n, g, model, method
        As in :func:`point_source_escape`.

    Returns
    -------
    ndarray
        FWHM in mm (0 at depth 0).

    Raises
    ------
    InputError
        On invalid depths, coefficients, n, g, model or method.

    Notes
    -----
    ``"diffusion"``: the half-maximum radius of the dipole profile, found by Newton's
    method on log J(ρ²).  ``"mc_table"``: that width × the Monte Carlo FWHM ratio.

    References
    ----------
    .. [1] Farrell, Patterson & Wilson, Med. Phys. 19, 879 (1992), doi:10.1118/1.596777.

    Examples
    --------
    >>> f = point_source_blur_fwhm_mm([1.0, 5.0], 0.1, 10.0)
    >>> bool(0 < f[0] < f[1])
    True
    """
    chosen = _model_and_method(model, method)
    base = _point_source_blur_fwhm_mm_diffusion(depth_mm, mu_a_per_cm, mu_s_prime_per_cm, n, method=method)
    if chosen == "diffusion":
        return base
    ratio, z = _reduced(mu_a_per_cm, mu_s_prime_per_cm, depth_mm, "depth_mm")
    return base * _tables().correction("fwhm", ratio, z, _anisotropy(g), _scalar_n(n))


def broad_beam_fluence(depth_mm, mu_a_per_cm, mu_s_prime_per_cm, n=1.4, *, g=DEFAULT_ANISOTROPY,
                       model: str = "auto", method: str = "exact") -> np.ndarray:
    """Fluence rate at depth under a broad, normally incident collimated beam, per unit irradiance.

    Parameters
    ----------
    depth_mm : array_like
        Depth below the surface, mm, >= 0.
    mu_a_per_cm, mu_s_prime_per_cm, n, g, model, method
        As in :func:`point_source_escape`.

    Returns
    -------
    ndarray
        φ(z)/E₀, dimensionless, specular loss at the surface included.

    Raises
    ------
    InputError
        On invalid depths, coefficients, n, g, model or method.

    Notes
    -----
    ``"diffusion"``: collimated part e^{−μt′ z} plus the diffusion solution with the
    extrapolated boundary (δ-Eddington source, Star 1995).  ``"mc_table"``: that value
    × the Monte Carlo correction at μa/μs′, z·μs′, g and n (the Monte Carlo follows the
    real forward-peaked beam, so the correction also carries the unscattered light
    near the surface).

    References
    ----------
    .. [1] Star, "Diffusion theory of light transport", ch. 6 in Welch & van Gemert (eds.),
       Optical-Thermal Response of Laser-Irradiated Tissue, Plenum, New York (1995).

    Examples
    --------
    >>> phi = broad_beam_fluence([0.5, 2.0, 10.0], 0.1, 10.0)
    >>> bool(phi[0] > phi[1] > phi[2])
    True
    """
    chosen = _model_and_method(model, method)
    base = _broad_beam_fluence_diffusion(depth_mm, mu_a_per_cm, mu_s_prime_per_cm, n, method=method)
    if chosen == "diffusion":
        return base
    ratio, z = _reduced(mu_a_per_cm, mu_s_prime_per_cm, depth_mm, "depth_mm")
    return base * _tables().correction("broad_beam", ratio, z, _anisotropy(g), _scalar_n(n))


def _model_and_method(model: str, method: str) -> str:
    chosen = resolve_model(model)
    _check_method(method)
    if chosen == "mc_table" and method != "exact":
        raise input_error("method", f"got {method!r} with model 'mc_table'",
                          'use method="exact" (the tables correct that formula) or model="diffusion"')
    return chosen


def _tables():
    from probeplan.model import transport_tables

    return transport_tables


def diffusion_validity(depth_mm, mu_a_per_cm, mu_s_prime_per_cm, *, warn: bool = True) -> np.ndarray:
    """Flag where diffusion theory is expected to be accurate, warning about the rest.

    Parameters
    ----------
    depth_mm : array_like
        Depth of the source or of the point where the fluence is wanted, mm, >= 0.
    mu_a_per_cm, mu_s_prime_per_cm : array_like
        μa (>= 0) and μs′ (> 0), cm⁻¹.
    warn : bool
        Emit one :class:`~probeplan.errors.ModelValidityWarning` if any element is invalid.

    Returns
    -------
    ndarray of bool
        True where depth >= :data:`VALIDITY_MIN_DEPTH_MFP` transport mean free
        paths 1/(μa + μs′) and μa <= :data:`VALIDITY_MAX_ABSORPTION_RATIO` μs′.

    Raises
    ------
    InputError
        On invalid depths or coefficients.

    Warns
    -----
    ModelValidityWarning
        When any element is invalid and ``warn`` is true.

    Notes
    -----
    Thresholds (common practice, no single source): the diffusion approximation
    needs the light to have scattered several times (depth of at least one
    transport mean free path; agreement with Monte Carlo within about 10 % is
    reached at about two, see ``docs/diffusion_vs_montecarlo.md``) and scattering
    to dominate absorption (μa <= 0.1 μs′).

    References
    ----------
    .. [1] Farrell, Patterson & Wilson, Med. Phys. 19, 879 (1992), doi:10.1118/1.596777.

    Examples
    --------
    >>> diffusion_validity([2.0, 5.0], 0.1, 10.0).tolist()
    [True, True]
    """
    z = _depth_cm(depth_mm, "depth_mm")
    mu_a = _coefficient(mu_a_per_cm, "mu_a_per_cm")
    mu_sp = _coefficient(mu_s_prime_per_cm, "mu_s_prime_per_cm", positive=True)
    mfp_cm = 1.0 / (mu_a + mu_sp)
    deep = z >= VALIDITY_MIN_DEPTH_MFP * mfp_cm
    scattering = mu_a <= VALIDITY_MAX_ABSORPTION_RATIO * mu_sp
    valid = np.asarray(deep & scattering)
    if warn and not valid.all():
        parts = []
        shallow = ~np.broadcast_to(deep, valid.shape)
        absorbing = ~np.broadcast_to(scattering, valid.shape)
        if shallow.any():
            parts.append(f"{int(shallow.sum())} point(s) shallower than {VALIDITY_MIN_DEPTH_MFP:g} transport mean free path")
        if absorbing.any():
            parts.append(f"{int(absorbing.sum())} point(s) with mu_a > {VALIDITY_MAX_ABSORPTION_RATIO:g} mu_s'")
        warn_at_caller(
            "diffusion theory is inaccurate here: " + "; ".join(parts) + " (use probeplan.model.montecarlo to check)",
            ModelValidityWarning)
    return valid
