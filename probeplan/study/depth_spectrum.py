"""Depth from the spectrum: a target's depth from one probe's signal in two or more channels.

Tissue absorbs and scatters each emission wavelength differently, so the spectrum that
escapes from a target reshapes with depth (:mod:`probeplan.model.fluorescence`: each
wavelength escapes with its own μeff).  The forward model gives, for a grid of depths d,
the probe's expected counts in each channel p_c(d) (rate × exposure).  A measured signal
s_c (background subtracted, with standard errors σ_c) is fitted by

    χ²(d) = Σ_c (s_c − A(d)·p_c(d))² / σ_c²,   A(d) = Σ s_c p_c/σ_c² / Σ p_c²/σ_c²

with the amplitude A free (the concentration and the system's throughput drop out: only
the channels' ratios carry the depth).  The estimate is the grid minimum refined by a
parabola through its neighbours; the confidence interval is the set of depths with
χ² ≤ χ²_min + Δ, Δ = the χ² quantile of one degree of freedom at the chosen level (3.84
at 95 %; the profile-likelihood interval, e.g. Press et al., Numerical Recipes, §15.6).
Standard errors default to the shot noise of the counts, √max(s, 1) (an assumption: give
the real ones when you have them).

Sensitivity: for the pair of channels whose ratio changes fastest with depth, the depth
change per 1 % change of their ratio, 0.01 / |d ln(ratio)/dd| (mm per %), at the estimate.

Refusal: when the most depth-sensitive ratio of two channels that both carry the probe's
light (each at least 1 % of the brightest at 3.5 mm) changes by less than
:data:`MIN_RATIO_CHANGE` over 1–6 mm, the channels see the same attenuation at every depth
and cannot tell depths apart.  The probe's emission spectrum shapes every p_c: when it is
the material's typical Gaussian rather than a measured spectrum an
:class:`~probeplan.errors.AssumptionWarning` is given.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy.stats import chi2

from probeplan.errors import AssumptionWarning, input_error, warn_at_caller

__all__ = ["DepthEstimate", "ImageDepths", "channel_depth_curves", "depth_from_spectrum", "depth_from_spectrum_plan",
           "depth_from_spectrum_image",
           "MIN_RATIO_CHANGE", "DEFAULT_DEPTH_GRID_MM"]

#: Smallest change of the best channel ratio over 1-6 mm that can inform a depth (10 %: our choice).
MIN_RATIO_CHANGE = 0.10
#: A channel below this share of the brightest channel's counts (at 3.5 mm) carries no depth information.
MIN_CHANNEL_SHARE = 0.01
#: Depths searched (mm).
DEFAULT_DEPTH_GRID_MM = np.round(np.arange(0.25, 10.0001, 0.05), 6)
_CHECK_SPAN_MM = (1.0, 6.0)


@dataclass
class DepthEstimate:
    """Depth estimates (mm) with confidence limits and the sensitivity, per ROI or pixel.

    Arrays have the shape of the signal without its channel axis.  NaN where the signal
    is not positive in at least two channels.
    """

    depth_mm: np.ndarray
    ci_low_mm: np.ndarray
    ci_high_mm: np.ndarray
    sensitivity_mm_per_percent: np.ndarray
    chi2_min: np.ndarray
    confidence: float
    channel_pair: tuple[str, str]
    notes: list[str] = field(default_factory=list)


def channel_depth_curves(tissue, probe, channels, *, source, irradiance_mw_per_cm2: float, camera, lens,
                         target_size_mm: float = 2.0, depth_mm=DEFAULT_DEPTH_GRID_MM) -> np.ndarray:
    """Expected counts of ``probe`` (1 µM excess) in each channel's exposure against depth, shape (D, C)."""
    from probeplan.model.fluorescence import probe_rate_e_per_s

    depth = np.asarray(depth_mm, dtype=np.float64)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AssumptionWarning)
        cols = [probe_rate_e_per_s(tissue, probe, source=source, irradiance_mw_per_cm2=irradiance_mw_per_cm2,
                                   emission_filter=ch.emission_filter, camera=camera, lens=lens, depth_mm=depth,
                                   target_size_mm=target_size_mm) * ch.exposure_s for ch in channels]
    return np.stack(cols, axis=1)


def _best_pair(curves: np.ndarray, depth: np.ndarray, names) -> tuple[int, int, float]:
    """Channel pair whose log ratio changes most over 1-6 mm, and that change (fraction).

    Only channels holding at least :data:`MIN_CHANNEL_SHARE` of the brightest channel's counts
    at mid-span count: a ratio with an empty channel informs nothing.
    """
    i0, i1 = (int(np.argmin(np.abs(depth - d))) for d in _CHECK_SPAN_MM)
    mid = int(np.argmin(np.abs(depth - 0.5 * sum(_CHECK_SPAN_MM))))
    useful = [c for c in range(curves.shape[1]) if curves[mid, c] >= MIN_CHANNEL_SHARE * curves[mid].max()]
    best = (0, 1, 0.0)
    logc = np.log(np.maximum(curves, 1e-300))
    for a in useful:
        for b in useful:
            if b <= a:
                continue
            change = abs(math.expm1((logc[i1, a] - logc[i1, b]) - (logc[i0, a] - logc[i0, b])))
            if change > best[2]:
                best = (a, b, change)
    return best


def depth_from_spectrum(signal, curves, *, channel_names, depth_grid_mm=DEFAULT_DEPTH_GRID_MM, signal_se=None,
                        confidence: float = 0.95, chunk: int = 1 << 14) -> DepthEstimate:
    """Depth per ROI or pixel from one probe's signal in C channels (see the module notes).

    Parameters
    ----------
    signal : array_like, shape (C,) or (C, ...)
        The probe's background-subtracted counts in each channel.
    curves : ndarray, shape (D, C)
        Model counts per channel at each depth of ``depth_grid_mm`` (:func:`channel_depth_curves`).
    channel_names : sequence of str
    depth_grid_mm : array_like, shape (D,)
    signal_se : array_like, optional
        Standard errors of ``signal`` (same shape); default √max(s, 1) (shot noise).
    confidence : float
        Level of the confidence interval (0.95).

    Raises
    ------
    InputError
        Fewer than two channels, or channels whose ratio changes by less than
        :data:`MIN_RATIO_CHANGE` between 1 and 6 mm (they cannot tell depths apart).
    """
    s = np.asarray(signal, dtype=np.float64)
    p = np.asarray(curves, dtype=np.float64)
    depth = np.asarray(depth_grid_mm, dtype=np.float64)
    names = list(channel_names)
    if s.shape[0] < 2 or p.shape[1] != s.shape[0] or p.shape[0] != depth.size or len(names) != s.shape[0]:
        raise input_error("signal", f"{s.shape[0]} channel(s), curves {p.shape}, {len(names)} names",
                          "give the probe's signal in two or more channels, with one model curve per channel")
    if not 0 < confidence < 1:
        raise input_error("confidence", f"got {confidence!r}", "give a level between 0 and 1, e.g. 0.95")
    a, b, change = _best_pair(p, depth, names)
    if change < MIN_RATIO_CHANGE:
        if change == 0.0:
            raise input_error("channels", "fewer than two channels carry the probe's light (each needs 1 % of the "
                              "brightest)", "image the probe in two or more channels that each see its emission")
        raise input_error("channels", f"the best channel ratio ({names[a]}/{names[b]}) changes by only "
                          f"{100 * change:.1f} % between {_CHECK_SPAN_MM[0]:g} and {_CHECK_SPAN_MM[1]:g} mm: the tissue "
                          "attenuates these bands alike, so they cannot tell depths apart",
                          "use channels further apart in wavelength, or on either side of an absorption band "
                          "(haemoglobin below 650 nm, water near 970 and 1450 nm)")
    shape = s.shape[1:]
    S = s.reshape(s.shape[0], -1)
    se = np.sqrt(np.maximum(S, 1.0)) if signal_se is None else np.asarray(signal_se, dtype=np.float64).reshape(S.shape)
    W = 1.0 / np.maximum(se, 1e-12) ** 2
    N = S.shape[1]
    delta = float(chi2.ppf(confidence, 1))
    out = {k: np.full(N, np.nan) for k in ("d", "lo", "hi", "chi2")}
    logr = np.log(np.maximum(p[:, a], 1e-300)) - np.log(np.maximum(p[:, b], 1e-300))
    slope = np.gradient(logr, depth)  # d ln(ratio) / dd per mm
    for i0 in range(0, N, chunk):
        sl = slice(i0, i0 + chunk)
        s_, w_ = S[:, sl], W[:, sl]
        ok = np.sum(s_ > 0, axis=0) >= 2
        num = np.einsum("dc,cn->dn", p, w_ * s_)
        den = np.einsum("dc,cn->dn", p**2, w_)
        amp = np.maximum(num / den, 0.0)
        resid = s_[None, :, :] - amp[:, None, :] * p[:, :, None]
        c2 = np.einsum("dcn,cn->dn", resid**2, w_)  # (D, n)
        j = np.argmin(c2, axis=0)
        n = np.arange(c2.shape[1])
        jm, jp = np.clip(j - 1, 0, depth.size - 1), np.clip(j + 1, 0, depth.size - 1)
        y0, y1, y2 = c2[jm, n], c2[j, n], c2[jp, n]
        curv = y0 - 2 * y1 + y2
        inner = (j > 0) & (j < depth.size - 1) & (curv > 0)
        step = depth[1] - depth[0] if depth.size > 1 else 0.0
        shift = np.where(inner, 0.5 * (y0 - y2) / np.where(inner, curv, 1.0), 0.0)
        d_best = depth[j] + shift * step
        c2min = np.where(inner, y1 - 0.25 * (y0 - y2) * shift, y1)
        inside = c2 <= (c2min + delta)[None, :]
        lo = np.where(inside.any(axis=0), depth[np.argmax(inside, axis=0)], np.nan)
        hi = np.where(inside.any(axis=0), depth[depth.size - 1 - np.argmax(inside[::-1], axis=0)], np.nan)
        for key, val in (("d", d_best), ("lo", np.minimum(lo, d_best)), ("hi", np.maximum(hi, d_best)), ("chi2", c2min)):
            out[key][sl] = np.where(ok, val, np.nan)
    d = out["d"]
    sens = np.full(N, np.nan)
    fin = np.isfinite(d)
    sens[fin] = 0.01 / np.maximum(np.abs(np.interp(d[fin], depth, slope)), 1e-12)
    notes = [f"channel ratio {names[a]}/{names[b]} changes by {100 * change:.0f} % between 1 and 6 mm",
             "amplitude (concentration x throughput) fitted freely: only the channel ratios set the depth"]
    if signal_se is None:
        notes.append("standard errors taken as the shot noise of the counts (sqrt of the signal)")
    at_edge = fin & ((d <= depth[0] + 1e-9) | (d >= depth[-1] - 1e-9))
    if at_edge.any():
        notes.append(f"{int(at_edge.sum())} estimate(s) at the edge of the {depth[0]:g}-{depth[-1]:g} mm search: "
                     "treat them as limits")
    return DepthEstimate(d.reshape(shape), out["lo"].reshape(shape), out["hi"].reshape(shape), sens.reshape(shape),
                         out["chi2"].reshape(shape), confidence, (names[a], names[b]), notes)


def depth_from_spectrum_plan(signal, plan, probe_name: str, *, signal_se=None, confidence: float = 0.95,
                             channel_names=None, depth_grid_mm=DEFAULT_DEPTH_GRID_MM) -> DepthEstimate:
    """:func:`depth_from_spectrum` with the model of a plan (tissue, source, channels, camera, lens, target size).

    ``signal`` rows follow ``channel_names`` (default the plan's channel order); they are matched by name.
    Gives an :class:`~probeplan.errors.AssumptionWarning` when the probe's emission spectrum is the
    material's typical shape rather than a measured one.
    """
    from probeplan.study.evaluate import plan_model

    m = plan_model(plan)
    probes = {p.name: p for p in m.probes}
    if probe_name not in probes:
        raise input_error("probe", f"{probe_name!r} is not a probe of the plan ({list(probes)})", "name one of the plan's probes")
    probe = probes[probe_name]
    plan_names = [ch.name for ch in m.channels]
    names = plan_names if channel_names is None else [str(c) for c in channel_names]
    unknown = [c for c in names if c not in plan_names]
    if unknown:
        raise input_error("channels", f"{unknown} are not channels of the plan ({plan_names})",
                          "name the stack's channels as the plan does")
    channels = [m.channels[plan_names.index(c)] for c in names]
    if getattr(probe, "emission", None) is None:
        warn_at_caller(f"{probe_name}: the emission spectrum is the material's typical shape, not a measurement; "
                      "the depth rests on it: give a measured emission spectrum for a firmer estimate",
                      AssumptionWarning)
    curves = channel_depth_curves(m.tissue, probe, channels, source=m.source, irradiance_mw_per_cm2=m.irradiance_mw_per_cm2,
                                  camera=m.camera, lens=m.lens, target_size_mm=plan.target["size_mm"],
                                  depth_mm=depth_grid_mm)
    return depth_from_spectrum(signal, curves, channel_names=names, depth_grid_mm=depth_grid_mm, signal_se=signal_se,
                               confidence=confidence)


@dataclass
class ImageDepths:
    """Depths from one probe's image: one row per region and a depth map.

    Attributes
    ----------
    rows : list of dict
        Per target region (the background left out): ``roi, depth_mm, ci_low_mm, ci_high_mm,
        confidence, sensitivity_mm_per_percent, channel_pair, pixels``.
    depth_map_mm : ndarray, shape (3, Y, X)
        Depth, lower and upper confidence limit per pixel (mm); NaN below the SNR threshold.
    mapped : ndarray of bool, shape (Y, X)
        Pixels whose brightest channel reaches the SNR threshold.
    notes : list of str
    """

    rows: list[dict]
    depth_map_mm: np.ndarray
    mapped: np.ndarray
    notes: list[str]


def depth_from_spectrum_image(data, plan, probe_name: str, rois, *, background: str = "background", labels=None,
                              gain_e_per_count: float = 1.0, read_noise_e: float = 0.0, min_snr: float = 5.0,
                              confidence: float = 0.95, channel_names=None) -> ImageDepths:
    """Depths per region and per pixel from a (C, Y, X) image of one probe, dark already subtracted.

    The background region's mean is subtracted per channel; each pixel's variance is its shot noise
    (counts / gain) plus the read noise, in counts², and a region's standard error is the root of
    its mean variance over its pixel count.  Regions may be any shape
    (:class:`~probeplan.unmixing.roi.Roi`: rectangles, ellipses, polygons, label regions with
    ``labels``).

    Raises
    ------
    InputError
        No region named ``background``, a region without pixels, or what
        :func:`depth_from_spectrum_plan` refuses.
    """
    from probeplan.errors import positive_number

    gain = positive_number("gain_e_per_count", gain_e_per_count)
    read_noise = positive_number("read_noise_e", read_noise_e, allow_zero=True)
    min_snr = positive_number("min_snr", min_snr, allow_zero=True)
    data = np.asarray(data, dtype=np.float64)
    if data.ndim != 3:
        raise input_error("data", f"shape {data.shape}", "give a (C, Y, X) stack of one probe")
    shape_yx = data.shape[-2:]
    names = [r.name for r in rois]
    if background not in names:
        raise input_error("roi", f"no ROI named {background!r} (given {names})",
                          "add the background region, e.g. 'background:0,0,20,20'")
    masks = {}
    for roi in rois:
        m = roi.mask(shape_yx, labels)
        if not m.any():
            raise input_error("roi", f"{roi.name!r} holds no pixel of the image", "draw it inside the image")
        masks[roi.name] = m
    bg = data[:, masks[background]].mean(axis=1)
    signal = data - bg[:, None, None]
    variance = np.maximum(data, 1.0) / gain + (read_noise / gain) ** 2  # shot + read noise, in counts²
    rows = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for roi in rois:
            if roi.name == background:
                continue
            s, v = signal[:, masks[roi.name]], variance[:, masks[roi.name]]
            est = depth_from_spectrum_plan(s.mean(axis=1), plan, probe_name, signal_se=np.sqrt(v.mean(axis=1) / s.shape[1]),
                                           confidence=confidence, channel_names=channel_names)
            rows.append({"roi": roi.name, "depth_mm": float(est.depth_mm), "ci_low_mm": float(est.ci_low_mm),
                         "ci_high_mm": float(est.ci_high_mm), "confidence": confidence,
                         "sensitivity_mm_per_percent": float(est.sensitivity_mm_per_percent),
                         "channel_pair": "/".join(est.channel_pair), "pixels": int(s.shape[1])})
        mapped = (signal / np.sqrt(variance)).max(axis=0) >= min_snr
        est_map = depth_from_spectrum_plan(np.where(mapped[None], signal, 0.0), plan, probe_name,
                                           signal_se=np.sqrt(variance), confidence=confidence,
                                           channel_names=channel_names)
    for w in {str(w.message): w for w in caught}.values():  # once each, at the caller's line
        warn_at_caller(w.message, w.category)
    depth_map = np.stack([np.where(mapped, m, np.nan) for m in (est_map.depth_mm, est_map.ci_low_mm, est_map.ci_high_mm)])
    notes = list(dict.fromkeys([*est_map.notes,
                                "background subtracted per channel from the background region; pixels below the SNR "
                                f"threshold {min_snr:g} left empty (NaN) in the map"]))
    return ImageDepths(rows, depth_map, mapped, notes)
