"""Linear unmixing of image stacks: abundances, their standard errors and residuals.

Model per pixel: ``y = M a + n`` with ``y`` the ``C`` channel values (counts, after dark
subtraction and flat-field division), ``M`` the ``(C, K)`` reference spectra and ``a``
the ``K`` abundances.  Methods (``method=``):

``"nnls"``
    exact non-negative least squares (:mod:`probeplan.unmixing.nnls`; Lawson & Hanson 1974,
    Bro & De Jong 1997); the default.
``"ls"``
    ordinary (unconstrained) least squares ``a = (MᵀM)⁻¹Mᵀy``.
``"wls"``
    Poisson-weighted least squares ``a = (MᵀWM)⁻¹MᵀWy``, ``W = diag(1/var_c)`` with the
    noise model below (unconstrained).

Noise model (counts, per channel and pixel): with ``s = y_raw − dark``, camera gain ``g``
(e⁻/count, default 1) and read noise ``σ_r`` (e⁻ rms, default 0),
``var = (max(s, floor)/g + (σ_r/g)²) / flat²`` — shot noise of the detected electrons plus
read noise, carried through the flat-field division; ``floor`` (default 1 count) keeps
weights finite where the signal is zero.  The observed counts stand in for the expected
counts.  Standard errors: ``ls`` and ``nnls`` use the exact covariance of the linear
estimator, ``A V Aᵀ`` with ``A = (M_PᵀM_P)⁻¹M_Pᵀ`` (the sandwich form); for ``nnls`` ``P`` is
the pixel's passive set (components > 0), and components held at zero get the standard
error of the unconstrained estimate (a conservative stand-in: how far from zero the
unconstrained estimate could scatter).  ``wls`` uses ``(MᵀWM)⁻¹``.

Saturated pixels (any channel ``>= saturation``; default: the dtype's maximum for integer
stacks, none for float stacks) and pixels with a NaN channel give NaN and are counted.
"""

from __future__ import annotations

import functools
import math
import os
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from probeplan.errors import ModelValidityWarning, input_error, warn_at_caller
from probeplan.unmixing.nnls import STATUS_CONSTRAINED, STATUS_NAN, STATUS_SATURATED, lstsq_pixels, nnls_pixels

__all__ = [
    "DEPTH_COMPARISON_CAUTION",
    "open_map_writers",
    "METHODS",
    "CONDITION_WARN",
    "OFFSET_NAME",
    "UnmixResult",
    "design_matrix",
    "check_references",
    "default_saturation",
    "unmix",
    "unmix_stack",
    "QcAccumulator",
    "unmix_block",
    "FileResult",
    "output_paths",
    "unmix_file",
    "DEFAULT_MEMORY_MB",
]

METHODS = ("nnls", "ls", "wls")
#: Written with every unmixing result and shown in the reports: abundances hold at the references' depth.
DEPTH_COMPARISON_CAUTION = (
    "Abundances (and uM from a calibration) hold for targets at the depth and in the tissue of the reference "
    "spectra or phantom: deeper light is attenuated and its spectrum shifted differently for each probe, so "
    "abundances of two probes, or of one probe at different depths, drift apart with depth (tens of per cent "
    "over several mm; see probeplan depth). Compare targets at similar depths, or correct with the depth model."
)

#: Condition number (columns scaled to unit length) above which a ModelValidityWarning is given.
CONDITION_WARN = 1e3
#: Below this ratio of smallest to largest singular value the references are rank-deficient.
_RANK_TOL = 1e-10
#: Name of the constant offset component.
OFFSET_NAME = "offset"
_PIXELS_PER_CHUNK = 1 << 18


@dataclass
class UnmixResult:
    """Result of :func:`unmix_stack`.

    Attributes
    ----------
    abundances : ndarray, shape (K, ...)
    standard_error : ndarray, shape (K, ...)
    residual_rms : ndarray, shape (...)
        Root mean square over channels of ``y − M a`` (counts).
    status : ndarray of uint8, shape (...)
        0 no constraint active, 1 a constraint active, 2 invalid input (NaN, +inf or -inf in a
        channel), 3 saturated.
    component_names : list of str
    qc : dict
    """

    abundances: np.ndarray
    standard_error: np.ndarray
    residual_rms: np.ndarray
    status: np.ndarray
    component_names: list[str]
    qc: dict = field(default_factory=dict)


def design_matrix(references, *, n_channels: int | None = None, offset: bool = False,
                  component_names: Sequence[str] | None = None) -> tuple[np.ndarray, list[str]]:
    """The ``(C, K)`` design matrix and component names, validated.

    Parameters
    ----------
    references : array_like (C, K) or ReferenceSpectra
    n_channels : int, optional
        The stack's channel count, checked against ``C``.
    offset : bool
        Append a constant column of ones (abundance = a constant offset in counts per channel).
    component_names : sequence of str, optional
        Names for a plain array (default ``component_1``...).

    Raises
    ------
    InputError
        Channel count mismatch, more components than channels, NaN/negative values,
        rank-deficient (collinear) references.

    Examples
    --------
    >>> M, names = design_matrix([[1.0, 0.0], [0.0, 1.0], [1.0, 1.0]], offset=True)
    >>> M.shape, names
    ((3, 3), ['component_1', 'component_2', 'offset'])
    """
    if hasattr(references, "matrix") and hasattr(references, "component_names"):
        M = np.array(references.matrix, dtype=np.float64)
        names = list(references.component_names)
        where = str(getattr(references, "source", "references"))
    else:
        M = np.array(references, dtype=np.float64)
        if M.ndim == 1:
            M = M[:, None]
        where = "references"
        n_cols = M.shape[1] if M.ndim == 2 else 0
        names = list(component_names) if component_names is not None else [f"component_{k + 1}" for k in range(n_cols)]
    if M.ndim != 2 or M.shape[1] == 0:
        raise input_error(where, f"shape {M.shape}, expected (channels, components)", "give one column per component")
    if n_channels is not None and M.shape[0] != n_channels:
        raise input_error(where, f"{M.shape[0]} channels but the stack has {n_channels}",
                          "give one reference row per stack channel (check --channel-axis)")
    if offset:
        if OFFSET_NAME in names:
            raise input_error(where, f"a component is already named {OFFSET_NAME!r}", "rename it or leave out the offset component")
        M = np.hstack([M, np.ones((M.shape[0], 1))])
        names.append(OFFSET_NAME)
    check_references(M, names, where=where)
    return M, names


def check_references(matrix, names: Sequence[str] | None = None, *, where: str = "references") -> float:
    """Refuse unusable reference matrices; warn on nearly collinear ones; return the condition number.

    The condition number is that of ``M`` with columns scaled to unit length (independent
    of each spectrum's scale).  Noise amplification of unmixing grows with it (Neher &
    Neher 2004, doi:10.1111/j.1365-2818.2004.01262.x).

    Raises
    ------
    InputError
        NaN/inf or negative entries, an all-zero column, more components than channels, or
        rank deficiency (naming the collinear components).

    Warns
    -----
    ModelValidityWarning
        Condition number above :data:`CONDITION_WARN`.

    Examples
    --------
    >>> round(check_references([[1.0, 0.0], [0.0, 1.0]]), 6)
    1.0
    """
    M = np.asarray(matrix, dtype=np.float64)
    C, K = M.shape
    names = list(names) if names is not None else [f"component_{k + 1}" for k in range(K)]
    if not np.isfinite(M).all():
        k = int(np.argwhere(~np.isfinite(M))[0, 1])
        raise input_error(where, f"component {names[k]!r} has a NaN or infinite value", "give finite spectra")
    if (M < 0).any():
        k = int(np.argwhere(M < 0)[0, 1])
        raise input_error(where, f"component {names[k]!r} has a negative value", "reference spectra must be >= 0")
    if K > C:
        raise input_error(where, f"{K} components ({', '.join(names)}) but only {C} channels",
                          "use at most as many components as channels (drop components or add channels)")
    norms = np.linalg.norm(M, axis=0)
    if (norms == 0).any():
        raise input_error(where, f"component {names[int(np.argmin(norms))]!r} is zero in every channel",
                          "give a spectrum with signal")
    _, s, vt = np.linalg.svd(M / norms, full_matrices=False)
    if s[-1] <= _RANK_TOL * s[0]:
        v = np.abs(vt[-1])
        involved = [names[k] for k in np.flatnonzero(v > 1e-3 * v.max())]
        raise input_error(where, f"components {involved} are collinear (rank-deficient references)",
                          "drop or replace one of them; they cannot be separated with these channels")
    cond = float(s[0] / s[-1])
    if cond > CONDITION_WARN:
        warn_at_caller(f"{where}: condition number {cond:.3g} > {CONDITION_WARN:g}: components are nearly collinear "
                      "and unmixing will amplify noise strongly", ModelValidityWarning)
    return cond


def default_saturation(dtype) -> float | None:
    """Full-scale value of an integer dtype (saturation level), or None for floats.

    Examples
    --------
    >>> default_saturation(np.uint16), default_saturation(np.float32)
    (65535.0, None)
    """
    dtype = np.dtype(dtype)
    if np.issubdtype(dtype, np.integer):
        return float(np.iinfo(dtype).max)
    return None


def _channel_first(stack, channel_axis: int) -> np.ndarray:
    data = np.asarray(stack)
    if data.dtype == bool or not (np.issubdtype(data.dtype, np.integer) or np.issubdtype(data.dtype, np.floating)):
        raise TypeError(f"stack: dtype {data.dtype} is not a real number type")
    if data.ndim < 1 or not -data.ndim <= channel_axis < data.ndim:
        raise input_error("channel_axis", f"{channel_axis} out of range for a stack of shape {data.shape}",
                          "give the axis that holds the channels")
    return np.moveaxis(data, channel_axis, 0) if channel_axis % data.ndim else data


def _noise_variance(s, flat, gain, read_noise, floor):
    var = np.maximum(s, floor) / gain + (read_noise / gain) ** 2
    if flat is not None:
        var = var / flat**2
    return var


@dataclass(frozen=True)
class _Params:
    M: np.ndarray
    method: str
    saturation: float | None
    gain: float
    read_noise: float
    floor: float
    engine: str
    errors: bool


def unmix_block(Y, params: _Params, dark=None, flat=None):
    """Unmix one block of pixels ``Y`` (C, N); returns abundances, standard errors, residual RMS, status.

    A building block of :func:`unmix_stack` and the chunked file pipeline.
    """
    M = params.M
    C, K = M.shape
    sat = params.saturation
    corrected = dark is not None or flat is not None or params.method == "wls" or params.errors
    if corrected:
        raw = np.asarray(Y, dtype=np.float64)
        satmask = (raw >= sat).any(axis=0) if sat is not None else None
        s = raw - dark if dark is not None else raw
        y = s / flat if flat is not None else s
        solve_sat = None
    else:
        y, s, satmask, solve_sat = Y, None, None, sat
    if params.method == "wls":
        var = _noise_variance(s, flat, params.gain, params.read_noise, params.floor)
        w = 1.0 / var
        A = np.einsum("ck,cn,cj->nkj", M, w, M)
        with np.errstate(invalid="ignore", over="ignore"):  # invalid pixels (NaN, +-inf) are masked just below
            rhs = np.einsum("ck,cn->nk", M, w * y)
        nan = ~np.isfinite(y).all(axis=0)  # NaN or infinite in any channel: invalid
        A[nan] = np.eye(K)
        rhs[nan] = 0.0
        A[~np.isfinite(A).all(axis=(1, 2))] = np.eye(K)
        x = np.linalg.solve(A, rhs[..., None])[..., 0].T
        status = np.zeros(y.shape[1], dtype=np.uint8)
        status[nan] = STATUS_NAN
        x[:, nan] = np.nan
    else:
        solver = nnls_pixels if params.method == "nnls" else lstsq_pixels
        x, status = solver(M, y, saturation=solve_sat, engine=params.engine)
        if corrected and np.dtype(Y.dtype) == np.float32:
            x = x.astype(np.float32)
    if satmask is not None:
        satmask &= status < STATUS_NAN
        status[satmask] = STATUS_SATURATED
        x[:, satmask] = np.nan
    if not params.errors:
        return x, None, None, status
    x64 = np.asarray(x, dtype=np.float64)
    # one temporary, reused in place (the plain expression makes three of (C, N) and took 5x longer)
    r = M @ x64
    np.subtract(y, r, out=r)
    resid = np.sqrt(np.einsum("cn,cn->n", r, r) / C)
    var = _noise_variance(s, flat, params.gain, params.read_noise, params.floor)
    if params.method == "wls":
        se = np.sqrt(np.einsum("nkk->kn", np.linalg.inv(A)))
    else:
        full = np.linalg.solve(M.T @ M, M.T)
        se = np.sqrt((full**2) @ var)
        if params.method == "nnls":
            masks = (x64 > 0).T @ (1 << np.arange(K))
            for mask in np.unique(masks[status == STATUS_CONSTRAINED]):
                sel = ((int(mask) >> np.arange(K)) & 1).astype(bool)
                pix = (masks == mask) & (status == STATUS_CONSTRAINED)
                if sel.any():
                    Ms = M[:, sel]
                    As = np.linalg.solve(Ms.T @ Ms, Ms.T)
                    se[np.ix_(sel, pix)] = np.sqrt((As**2) @ var[:, pix])
    bad = status >= STATUS_NAN
    se[:, bad] = np.nan
    resid[bad] = np.nan
    out_dtype = x.dtype
    return x, se.astype(out_dtype), resid.astype(out_dtype), status


class QcAccumulator:
    """Combine per-block counts and residual statistics into the QC summary."""

    def __init__(self, M, names, method, condition_number):
        self.names = list(names)
        self.qc = {
            "method": method,
            "components": self.names,
            "n_channels": int(M.shape[0]),
            "condition_number": float(condition_number),
            "n_pixels": 0, "n_invalid": 0, "n_saturated": 0, "n_constrained": 0,
        }
        self._r = [0, 0.0, 0.0, 0.0]  # n, sum, sum of squares, max
        self._a = np.zeros((len(self.names), 3))  # n finite, sum, zero count

    def add(self, x, resid, status) -> None:
        st = status.reshape(-1)
        self.qc["n_pixels"] += int(st.size)
        self.qc["n_invalid"] += int((st == STATUS_NAN).sum())
        self.qc["n_saturated"] += int((st == STATUS_SATURATED).sum())
        self.qc["n_constrained"] += int((st == STATUS_CONSTRAINED).sum())
        xa = np.asarray(x, dtype=np.float64).reshape(len(self.names), -1)
        ok = st < STATUS_NAN
        self._a[:, 0] += ok.sum()
        self._a[:, 1] += xa[:, ok].sum(axis=1)
        self._a[:, 2] += (xa[:, ok] == 0).sum(axis=1)
        if resid is not None:
            r = np.asarray(resid, dtype=np.float64).reshape(-1)[ok]
            self._r[0] += r.size
            self._r[1] += r.sum()
            self._r[2] += (r**2).sum()
            self._r[3] = max(self._r[3], float(r.max()) if r.size else 0.0)

    def merge(self, other: QcAccumulator) -> None:
        """Add the counts and residual statistics another accumulator gathered over other pixels."""
        for key in ("n_pixels", "n_invalid", "n_saturated", "n_constrained"):
            self.qc[key] += other.qc[key]
        self._a += other._a
        self._r = [self._r[0] + other._r[0], self._r[1] + other._r[1], self._r[2] + other._r[2],
                   max(self._r[3], other._r[3])]

    def summary(self) -> dict:
        qc = dict(self.qc)
        n = max(qc["n_pixels"] - qc["n_invalid"] - qc["n_saturated"], 0)
        qc["fraction_constrained"] = qc["n_constrained"] / n if n else float("nan")
        qc["mean_abundance"] = {k: (float(self._a[i, 1] / self._a[i, 0]) if self._a[i, 0] else float("nan"))
                                for i, k in enumerate(self.names)}
        qc["fraction_zero"] = {k: (float(self._a[i, 2] / self._a[i, 0]) if self._a[i, 0] else float("nan"))
                               for i, k in enumerate(self.names)}
        rn = self._r[0]
        qc["residual_rms"] = {
            "mean": self._r[1] / rn if rn else float("nan"),
            "rms": float(np.sqrt(self._r[2] / rn)) if rn else float("nan"),
            "max": self._r[3] if rn else float("nan"),
        }
        return qc


def _check_saturation(saturation) -> None:
    if saturation is not None and not float(saturation) > 0:  # NaN fails too; inf means no saturation
        raise input_error("saturation", f"got {saturation}", "give the camera's full scale in counts (> 0), or omit it")


def _check_noise_model(gain_e_per_count, read_noise_e, variance_floor_counts) -> None:
    for name, v in (("gain_e_per_count", gain_e_per_count), ("variance_floor_counts", variance_floor_counts)):
        if not 0 < float(v) < np.inf:
            raise input_error(name, f"{v} is not a finite number > 0", "give a positive value")
    if not 0 <= float(read_noise_e) < np.inf:
        raise input_error("read_noise_e", f"{read_noise_e} is not a finite number >= 0",
                          "give the read noise in e- rms (>= 0)")


def _prepare(stack, references, method, channel_axis, offset, saturation, component_names=None, channel_names=None):
    import os

    from probeplan.unmixing.references import as_references

    if method not in METHODS:
        raise input_error("method", f"{method!r} is not known", f"choose one of {', '.join(METHODS)}")
    _check_saturation(saturation)
    references = as_references(references)
    explicit = channel_names is not None
    if isinstance(stack, (str, os.PathLike)):
        from probeplan.io.stacks import read_stack

        arr, info = read_stack(stack, channel_axis=None if channel_axis == 0 else channel_axis)
        data = np.moveaxis(arr, info.channel_axis, 0)
        if channel_names is None:
            channel_names = info.channel_names
        where = str(stack)
    else:
        data = _channel_first(stack, channel_axis)
        where = "stack"
    if channel_names is not None:
        channel_names = tuple(str(c) for c in channel_names)
        if len(channel_names) != data.shape[0]:
            raise input_error("channel_names", f"{len(channel_names)} names for {data.shape[0]} channels",
                              "give one name per stack channel")
        if hasattr(references, "for_channels"):
            references = references.for_channels(channel_names, where=where)
        elif explicit:
            raise input_error("references", "a plain array cannot be matched to the stack's channel names",
                              "give the references as a CSV path, a DataFrame with a 'channel' column or ReferenceSpectra")
    M, names = design_matrix(references, n_channels=data.shape[0], offset=offset, component_names=component_names)
    sat = default_saturation(data.dtype) if saturation is None else float(saturation)
    return data, M, names, sat


def _broadcast_correction(arr, data, name):
    if arr is None:
        return None
    a = np.asarray(arr, dtype=np.float64)
    try:
        a = np.broadcast_to(a, data.shape)
    except ValueError:
        raise input_error(name, f"shape {a.shape} does not fit the stack's channel-first shape {data.shape}",
                          "give an image of the stack's shape (channels first) or one value per channel") from None
    if name == "flat" and not (a > 0).all():
        raise input_error(name, "has values <= 0 or NaN", "give a flat field that is > 0 everywhere")
    return a.reshape(data.shape[0], -1)


def unmix(stack, references, *, method: str = "nnls", channel_axis: int = 0, dark=None, flat=None,
          offset: bool = False, saturation: float | None = None, engine: str = "auto",
          channel_names=None) -> np.ndarray:
    """Abundances of each component in every pixel of a stack.

    Parameters
    ----------
    stack : array_like, shape (C, ...) with the channel axis at ``channel_axis``, or a stack file path
        A file is read with its channel names (OME-TIFF, ImageJ) and channel axis.
    references : array_like (C, K), ReferenceSpectra, DataFrame with a ``channel`` column, or CSV path
        Rows are matched to the stack's channels by name whenever both have names; a
        channel the references do not name is refused with the fix.
    method : {"nnls", "ls", "wls"}
    channel_axis : int
    dark, flat : array_like, optional
        Dark frame (subtracted) and flat field (divided), broadcastable to the stack
        with channels first.
    offset : bool
        Add a constant offset component (last).
    saturation : float, optional
        Full-scale level; default the dtype maximum for integer stacks.
    engine : {"auto", "numba", "numpy"}
    channel_names : sequence of str, optional
        Names of an array stack's channels, to match the references by name.

    Returns
    -------
    ndarray, shape (K, ...)
        float32 for float32 stacks, float64 otherwise; NaN for NaN or saturated pixels.

    Raises
    ------
    InputError
        See :func:`design_matrix`; unknown method; dark/flat of the wrong shape.

    Examples
    --------
    >>> import numpy as np
    >>> M = np.array([[1.0, 0.0], [0.5, 0.5], [0.0, 1.0]])
    >>> stack = np.einsum("ck,kyx->cyx", M, np.array([[[2.0]], [[0.0]]]))
    >>> np.round(unmix(stack, M)[:, 0, 0], 9).tolist()
    [2.0, 0.0]
    """
    data, M, names, sat = _prepare(stack, references, method, channel_axis, offset, saturation,
                                   channel_names=channel_names)
    if dark is None and flat is None and method != "wls":
        solver = nnls_pixels if method == "nnls" else lstsq_pixels
        x, _ = solver(M, data.reshape(data.shape[0], -1), saturation=sat, engine=engine)
        return x.reshape(M.shape[1], *data.shape[1:])
    return unmix_stack(stack, references, method=method, channel_axis=channel_axis, dark=dark, flat=flat,
                       offset=offset, saturation=saturation, engine=engine, errors=False,
                       channel_names=channel_names).abundances


def unmix_stack(stack, references, *, method: str = "nnls", channel_axis: int = 0, dark=None, flat=None,
                offset: bool = False, saturation: float | None = None, gain_e_per_count: float = 1.0,
                read_noise_e: float = 0.0, variance_floor_counts: float = 1.0, engine: str = "auto",
                errors: bool = True, channel_names=None) -> UnmixResult:
    """Unmix a stack with standard errors, residual RMS and a QC summary.

    Parameters are those of :func:`unmix`, plus:

    gain_e_per_count : float
        Camera conversion gain (photoelectrons per count); 1 if unknown (then the
        standard errors assume the counts are photoelectrons).
    read_noise_e : float
        Camera read noise, e⁻ rms.
    variance_floor_counts : float
        Lower bound of the signal used in the shot-noise variance (counts).
    errors : bool
        Compute standard errors and residuals (default True).

    Returns
    -------
    UnmixResult

    Notes
    -----
    See the module description for the noise model and the standard errors.

    References
    ----------
    Lawson & Hanson, Solving Least Squares Problems (1974). doi:10.1137/1.9781611971217

    Examples
    --------
    >>> import numpy as np
    >>> M = np.array([[1.0, 0.0], [0.5, 0.5], [0.0, 1.0]])
    >>> r = unmix_stack(np.full((3, 2, 2), 100.0), M)
    >>> r.abundances.shape, r.standard_error.shape, r.qc["n_pixels"]
    ((2, 2, 2), (2, 2, 2), 4)
    """
    data, M, names, sat = _prepare(stack, references, method, channel_axis, offset, saturation,
                                   channel_names=channel_names)
    _check_noise_model(gain_e_per_count, read_noise_e, variance_floor_counts)
    cond = _cond_quiet(M)
    C, K = M.shape
    Y = data.reshape(C, -1)
    dk = _broadcast_correction(dark, data, "dark")
    ff = _broadcast_correction(flat, data, "flat")
    params = _Params(M, method, sat, float(gain_e_per_count), float(read_noise_e), float(variance_floor_counts),
                     engine, bool(errors))
    N = Y.shape[1]
    out_dtype = np.float32 if data.dtype == np.float32 else np.float64
    x = np.empty((K, N), out_dtype)
    se = np.empty((K, N), out_dtype) if errors else None
    resid = np.empty(N, out_dtype) if errors else None
    status = np.empty(N, np.uint8)
    qc = QcAccumulator(M, names, method, cond)
    for i0 in range(0, N, _PIXELS_PER_CHUNK):
        sl = slice(i0, i0 + _PIXELS_PER_CHUNK)
        xb, sb, rb, stb = unmix_block(Y[:, sl], params, None if dk is None else dk[:, sl],
                                      None if ff is None else ff[:, sl])
        x[:, sl] = xb
        status[sl] = stb
        if errors:
            se[:, sl] = sb
            resid[sl] = rb
        qc.add(xb, rb, stb)
    spatial = data.shape[1:]
    summary = qc.summary()
    summary.update(gain_e_per_count=gain_e_per_count, read_noise_e=read_noise_e, saturation=sat, offset=offset)
    return UnmixResult(
        abundances=x.reshape(K, *spatial),
        standard_error=se.reshape(K, *spatial) if errors else None,
        residual_rms=resid.reshape(spatial) if errors else None,
        status=status.reshape(spatial),
        component_names=names,
        qc=summary,
    )


def _cond_quiet(M) -> float:
    Mn = M / np.linalg.norm(M, axis=0)
    s = np.linalg.svd(Mn, compute_uv=False)
    return float(s[0] / s[-1])


# --------------------------------------------------------------------------- files, chunked
#: Default working-memory bound of the chunked file pipeline (MiB).
DEFAULT_MEMORY_MB = 256.0
_BYTES_PER_MB = 1024.0 * 1024.0
_OUTPUT_SUFFIXES = {"stderr": "_stderr.tif", "residual": "_residual.tif", "qc": "_qc.json",
                    "overlay": "_overlay.png", "roi": "_roi.csv"}


@dataclass
class FileResult:
    """Result of :func:`unmix_file`: written paths (by kind), the QC summary, ROI rows."""

    outputs: dict
    qc: dict
    roi_rows: list | None = None


def output_paths(out_path, *, roi: bool = False) -> dict:
    """Paths written for abundance file ``out_path``: abundance, stderr, residual, qc, overlay (and roi).

    Examples
    --------
    >>> sorted(k for k in output_paths("res/a.ome.tif"))
    ['abundance', 'overlay', 'qc', 'residual', 'stderr']
    >>> output_paths("res/a.ome.tif")["qc"].name
    'a_qc.json'
    """
    from pathlib import Path

    out = Path(out_path)
    name = out.name
    zarr_out = name.lower().endswith(".zarr")
    for ext in (".ome.tiff", ".ome.tif", ".tiff", ".tif", ".ome.zarr", ".zarr"):
        if name.lower().endswith(ext):
            name = name[: -len(ext)]
            break
    paths = {"abundance": out}
    for kind, suffix in _OUTPUT_SUFFIXES.items():
        if zarr_out and suffix.endswith(".tif"):
            suffix = suffix[: -len(".tif")] + ".ome.zarr"
        if kind != "roi" or roi:
            paths[kind] = out.with_name(name + suffix)
    return paths


def open_map_writers(writers: list, paths, names, spatial_shape, axes: str, pixel_size_um, *, writer=None) -> list:
    """Open the writers of the abundance, standard-error and residual maps, appending each to ``writers``.

    ``paths`` maps ``"abundance"``, ``"stderr"`` and ``"residual"`` to files; ``names`` are the
    components.  Appended one by one, so that when one fails the caller closes those already open.
    ``writer`` is the writer class (default :class:`probeplan.io.stacks.StackWriter`).
    """
    if writer is None:
        from probeplan.io.stacks import StackWriter as writer  # noqa: N813
    K = len(names)
    writers.append(writer(paths["abundance"], (K, *spatial_shape), axes=axes, channel_names=list(names),
                          pixel_size_um=pixel_size_um))
    writers.append(writer(paths["stderr"], (K, *spatial_shape), axes=axes,
                          channel_names=[f"{n} standard error" for n in names], pixel_size_um=pixel_size_um))
    writers.append(writer(paths["residual"], (1, *spatial_shape), axes=axes, channel_names=["residual rms (counts)"],
                          pixel_size_um=pixel_size_um))
    return writers


def _out_axes(spatial_axes: str) -> str:
    lead = spatial_axes[:-2]
    mapped = "".join("Z" if a in "QIS" else a for a in lead)
    if len(set(mapped)) != len(mapped) or any(a not in "TZ" for a in mapped) or mapped == "ZT":
        mapped = {0: "", 1: "Z", 2: "TZ"}.get(len(lead), "")
        if len(mapped) != len(lead):
            raise input_error("stack", f"axes {spatial_axes!r} have too many dimensions", "give a (C, [T], [Z], Y, X) stack")
    return "C" + mapped + "YX"


def _rows_task(reader, dark_reader, flat_reader, params, r0, r1):
    """Read and unmix rows ``r0:r1`` (runs locally or on a dask worker: readers reopen the files)."""
    try:
        block = reader.read_rows_channel_first(r0, r1)
        C, sp = block.shape[0], block.shape[1:]
        dk = dark_reader.read_rows_channel_first(r0, r1).reshape(C, -1) if dark_reader is not None else None
        ff = flat_reader.read_rows_channel_first(r0, r1).reshape(C, -1) if flat_reader is not None else None
    finally:
        for r in (reader, dark_reader, flat_reader):
            if r is not None:
                r.close()
    x, se, resid, status = unmix_block(block.reshape(C, -1), params, dk, ff)
    K = x.shape[0]
    return x.reshape(K, *sp), se.reshape(K, *sp), resid.reshape(sp), status.reshape(sp)


def _rows_per_chunk(info, K, memory_limit_mb, factor):
    px_per_row = int(np.prod(info.spatial_shape)) // info.n_rows
    per_px = info.n_channels * (info.dtype.itemsize + 64) + K * 48 + 32
    rows = int(memory_limit_mb * _BYTES_PER_MB // max(1, px_per_row * per_px))
    rows = max(factor, rows - rows % factor)
    return rows


def _block_summary(x, resid, status, r0, factor, params, names, cond, rois, labels):
    # what a block contributes besides its rows: QC counts, its piece of the overlay, ROI sums
    from probeplan.unmixing.overlay import downsample_mean
    from probeplan.unmixing.roi import RoiAccumulator

    qc = QcAccumulator(params.M, names, params.method, cond)
    qc.add(x, resid, status)
    K = x.shape[0]
    plane = x.reshape(K, -1, *x.shape[-2:])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        plane = np.nanmean(plane, axis=1) if plane.shape[1] > 1 else plane[:, 0]
    small = downsample_mean(plane, factor)
    roi = None
    if rois:
        roi = RoiAccumulator(rois, names, labels)
        roi.add(x, r0)
        roi.labels = None  # travels back without the label image
    return small, qc, roi


@functools.lru_cache(maxsize=2)
def _labels(path: str, mtime_ns: int):
    import tifffile

    return tifffile.imread(path)


@dataclass(frozen=True)
class _BlockJob:
    # everything a worker needs for one block of rows: readers (paths and metadata only),
    # settings, where to write, and what to summarise; no pixel data
    reader: object
    dark: object
    flat: object
    params: _Params
    r0: int
    r1: int
    sinks: tuple
    factor: int
    names: tuple
    cond: float
    rois: tuple
    labels_path: str | None


def _cluster_block(job: _BlockJob, labels=None):
    """One block on a worker: read, unmix, write the rows into the shared output files, summarise.

    ``labels``: the label image when it came from an ROI file rather than a label TIFF the
    worker reads itself (sent once to every worker, not with each block).
    """
    # readers of its own, of the same kind (TIFF or OME-Zarr): an in-process worker may run several
    # blocks of one job list at once
    fresh = [None if r is None else type(r)(r.info) for r in (job.reader, job.dark, job.flat)]
    x, se, resid, status = _rows_task(*fresh, job.params, job.r0, job.r1)
    for sink, arr in zip(job.sinks, (x, se, resid[None]), strict=True):
        sink.write_rows(job.r0, arr)
    if job.labels_path:
        labels = _labels(job.labels_path, os.stat(job.labels_path).st_mtime_ns)
    return x.shape[-2], _block_summary(x, resid, status, job.r0, job.factor, job.params, list(job.names), job.cond,
                                      list(job.rois), labels)


def unmix_file(stack_path, references, out_path, *, method: str = "nnls", channel_axis: int | None = None,
               dark_path=None, flat_path=None, offset: bool = False, saturation: float | None = None,
               gain_e_per_count: float = 1.0, read_noise_e: float = 0.0, variance_floor_counts: float = 1.0,
               rois: Sequence | None = None, labels_path=None, roi_background: str = "background",
               memory_limit_mb: float = DEFAULT_MEMORY_MB, scheduler: str | None = None, engine: str = "auto",
               extra_inputs: Sequence = (), progress=None,
               abundance_unit: str | Sequence[str] = "counts") -> FileResult:
    """Unmix a TIFF/OME-TIFF stack file by blocks of rows and write all outputs atomically.

    Writes the abundance OME-TIFF (float32, component names, pixel size carried over) and,
    beside it, ``<stem>_stderr.tif``, ``<stem>_residual.tif``, ``<stem>_qc.json``,
    ``<stem>_overlay.png`` and, with ROIs, ``<stem>_roi.csv``.  Memory stays near
    ``memory_limit_mb`` whatever the stack size.  With ``scheduler`` (a dask.distributed
    address) the same blocks run on that cluster; the files are opened and written on the workers.

    Parameters
    ----------
    stack_path, out_path : path-like
    references : ReferenceSpectra or array (C, K)
        Rows are matched to the stack's channel names when both have names.
    method, offset, saturation, gain_e_per_count, read_noise_e, variance_floor_counts, engine
        As in :func:`unmix_stack`.
    channel_axis : int, optional
        Needed only when the file does not say.
    dark_path, flat_path : path-like, optional
        Dark frame and flat field stacks of the same shape as the stack.
    rois : sequence of str, Roi or RoiShape, optional
        Rectangles ``"name:x0,y0,x1,y1"``, ellipses and polygons in their text forms, the path
        of an ROI file (``.json``, :mod:`probeplan.unmixing.roifile`), ROI objects, or drawn
        shapes (:class:`probeplan.unmixing.shapes.RoiShape`: rectangle, ellipse, polygon).
    labels_path : path-like, optional
        A label TIFF (Y, X); each non-zero label is an ROI.
    roi_background : str
        Name of the background ROI for the target-to-background ratio.
    abundance_unit : str or sequence of str
        The abundances' unit (one, or one per component) for the overlay's colour bars:
        ``"counts"`` for references normalised to unit sum, ``"µM"`` for references in
        counts per µM (a calibration).
    memory_limit_mb : float
        Working-memory bound for the blocks.
    scheduler : str or distributed.Client, optional
        Address of a running dask.distributed scheduler (or a connected client): one task per
        block of rows; each worker reads its rows and writes them into the output files itself
        (the output folder must be on a filesystem the workers share), and sends back only QC
        counts, its piece of the overlay and ROI sums.
    extra_inputs : sequence of path-like
        Other input files that must not be overwritten (e.g. the references CSV).
    progress : callable, optional
        Called with the number of rows done after each block.

    Returns
    -------
    FileResult

    Raises
    ------
    InputError
        Unreadable inputs, channel mismatch, bad references, an output that is an input,
        an unreachable scheduler.  No output file is left behind.
    """
    from pathlib import Path

    import tifffile

    from probeplan import RESEARCH_USE_CAUTION, __version__
    from probeplan.io.atomic import check_outputs, refuse_input_paths, write_json_atomic
    from probeplan.io.stacks import StackWriter, open_stack
    from probeplan.unmixing.overlay import overlay_factor, write_overlay_png
    from probeplan.unmixing.references import abundance_unit as unit_of_references
    from probeplan.unmixing.roi import RoiAccumulator, rois_from_labels, write_roi_csv
    from probeplan.unmixing.roifile import regions_for_image

    if method not in METHODS:
        raise input_error("method", f"{method!r} is not known", f"choose one of {', '.join(METHODS)}")
    if not 0 < memory_limit_mb < np.inf:
        raise input_error("memory_limit_mb", f"{memory_limit_mb} is not a finite number > 0",
                          "give a positive memory bound in MiB")
    _check_saturation(saturation)
    _check_noise_model(gain_e_per_count, read_noise_e, variance_floor_counts)
    if scheduler is not None:  # workers see only absolute paths
        stack_path, dark_path, flat_path, labels_path = (
            None if p is None else Path(p).absolute() for p in (stack_path, dark_path, flat_path, labels_path))
    reader = open_stack(stack_path, channel_axis=channel_axis)
    info = reader.info
    aux = {}
    for name, p in (("dark", dark_path), ("flat", flat_path)):
        if p is not None:
            r = open_stack(p, channel_axis=info.channel_axis if info.channel_axis_source != "file" else None)
            if r.info.shape != info.shape:
                raise input_error(str(p), f"shape {r.info.shape} differs from the stack's {info.shape}",
                                  f"give a {name} stack of the same shape as {info.path.name}")
            aux[name] = r
    if hasattr(references, "for_channels"):
        references = references.for_channels(info.channel_names, where=str(info.path))
    M, names = design_matrix(references, n_channels=info.n_channels, offset=offset)
    cond = _cond_quiet(M)
    K = len(names)
    ny, nx = info.shape[info.row_axis], info.shape[-1]
    roi_list = []
    labels = None
    if labels_path is not None:
        try:
            labels = tifffile.imread(labels_path)
        except Exception as exc:
            raise input_error(str(labels_path), f"cannot be read as TIFF ({exc})", "give an integer label TIFF") from None
        if labels.shape != (ny, nx):
            raise input_error(str(labels_path), f"shape {labels.shape}, image is {(ny, nx)}",
                              "give a label image of the stack's Y x X size")
        roi_list += rois_from_labels(labels)
    # text forms, an ROI file, drawn shapes or ROI objects (probeplan.unmixing.roifile); outlines for the overlay PNG
    file_rois, drawn, file_labels = regions_for_image(rois or (), (ny, nx))
    if file_labels is not None:
        if labels is not None:
            raise input_error("roi", "the ROI file uses a label image and another label TIFF was given",
                              "give one label image")
        labels = file_labels
    roi_list += file_rois
    paths = output_paths(out_path, roi=bool(roi_list))
    inputs = [info.path, *(r.info.path for r in aux.values()), *extra_inputs]
    if labels_path is not None:
        inputs.append(labels_path)
    inputs += [Path(r) for r in rois or () if isinstance(r, (str, os.PathLike)) and str(r).lower().endswith(".json")]
    src = getattr(references, "source", None)
    if src and Path(str(src)).is_file():
        inputs.append(src)
    refuse_input_paths(paths.values(), inputs, option="out")
    check_outputs(paths.values())  # an existing output not ours is refused before any work
    sat = default_saturation(info.dtype) if saturation is None else float(saturation)
    params = _Params(M, method, sat, float(gain_e_per_count), float(read_noise_e), float(variance_floor_counts),
                     engine, True)
    factor = overlay_factor((ny, nx))
    rows = _rows_per_chunk(info, K, memory_limit_mb, factor)
    zarr_out = str(paths["abundance"]).lower().endswith(".zarr")
    if scheduler is not None and zarr_out:
        # workers write OME-Zarr chunks concurrently: each block must cover whole chunks of rows
        # (the writer's Y chunk is min(ny, 512)) and whole overlay cells
        step = math.lcm(min(ny, 512), factor)
        rows = max(step, rows - rows % step)
    chunks = list(reader.iter_row_blocks(rows))
    spatial = info.spatial_shape
    axes = _out_axes(info.spatial_axes)
    canvas = np.full((K, -(-ny // factor), -(-nx // factor)), np.nan)
    qc = QcAccumulator(M, names, method, cond)
    roi_acc = RoiAccumulator(roi_list, names, labels) if roi_list else None
    writers = []
    if zarr_out:
        from probeplan.io.ngff import ZarrStackWriter as StackWriter  # noqa: N813 - same interface
    try:
        open_map_writers(writers, paths, names, spatial, axes, info.pixel_size_um, writer=StackWriter)

        def merge(r0, nrows, summary, report=True):
            small, q, r = summary
            qc.merge(q)
            canvas[:, r0 // factor : r0 // factor + small.shape[1]] = small
            if roi_acc is not None:
                roi_acc.merge(r)
            if progress is not None and report:
                progress(nrows)

        dark_r, flat_r = aux.get("dark"), aux.get("flat")
        if scheduler is None:
            for r0, r1 in chunks:
                x, se, resid, status = _rows_task(reader, dark_r, flat_r, params, r0, r1)
                writers[0].write_rows(r0, x)
                writers[1].write_rows(r0, se)
                writers[2].write_rows(r0, resid[None])
                merge(r0, x.shape[-2], _block_summary(x, resid, status, r0, factor, params, names, cond, roi_list,
                                                      labels))
        else:
            from probeplan.unmixing.cluster import connect, run_tasks

            sinks = tuple(w.sink() for w in writers)
            jobs = [_BlockJob(reader, dark_r, flat_r, params, r0, r1, sinks, factor, tuple(names), cond,
                              tuple(roi_list), str(Path(labels_path).absolute()) if labels_path is not None else None)
                    for r0, r1 in chunks]
            client = connect(scheduler) if isinstance(scheduler, str) else scheduler
            try:
                extra = {}
                if labels is not None and labels_path is None:  # an ROI file's label image: sent once
                    extra["labels"] = client.scatter(labels, broadcast=True)
                done = run_tasks(client, _cluster_block, jobs,
                                 on_result=(lambda i, res: progress(res[0])) if progress is not None else None,
                                 **extra)
            finally:
                if isinstance(scheduler, str):
                    client.close()
            for job, (nrows, summary) in zip(jobs, done, strict=True):  # in row order: sums as in a local run
                merge(job.r0, nrows, summary, report=False)
        qc_summary = qc.summary()
        if isinstance(abundance_unit, str):
            unit_text = unit_of_references(references, None if abundance_unit == "counts" else abundance_unit)
        else:
            unit_text = "; ".join(f"{n}: {u}" for n, u in zip(names, abundance_unit, strict=True))
        qc_summary.update(
            probeplan_version=__version__, caution=RESEARCH_USE_CAUTION, depth_caution=DEPTH_COMPARISON_CAUTION,
            stack=str(info.path),
            abundance_unit=unit_text,
            files={"abundance": f"abundance of each component, in {unit_text}",
                   "stderr": "standard error of each abundance (same unit), from the camera noise model",
                   "residual": "root mean square over channels of the fit residual, counts"},
            stack_shape=list(info.shape), stack_axes=info.axes, channel_axis=info.channel_axis,
            channel_axis_source=info.channel_axis_source, channel_names=list(info.channel_names or []),
            pixel_size_um=list(info.pixel_size_um) if info.pixel_size_um else None,
            references=str(src) if src else "array", references_matrix=M.tolist(), offset=offset,
            saturation=sat, gain_e_per_count=gain_e_per_count, read_noise_e=read_noise_e,
            variance_floor_counts=variance_floor_counts, dark=str(dark_path) if dark_path else None,
            flat=str(flat_path) if flat_path else None, rows_per_chunk=rows,
            outputs={k: str(v) for k, v in paths.items()},
        )
        for w in writers:
            w.commit()
        write_json_atomic(paths["qc"], qc_summary)
        write_overlay_png(paths["overlay"], canvas, names, title=info.path.name, pixel_size_um=info.pixel_size_um,
                          rois=drawn, scale=factor, unit=abundance_unit)
        roi_rows = None
        if roi_acc is not None:
            roi_rows = roi_acc.rows(roi_background)
            write_roi_csv(paths["roi"], roi_rows)
    except BaseException:
        for w in writers:
            w.abort()
        raise
    finally:
        for r in (reader, *aux.values()):
            r.close()
    return FileResult(outputs=paths, qc=qc_summary, roi_rows=roi_rows)
