"""Predicted beside measured: confront a plan's forward model with a study's ROI measurements.

Inputs: the measurements table of a study (``animal, group, time_h, roi, component, mean,
se, tbr``, and ``sd`` when present: abundance per ROI), the plan, and the reference spectra
the images were unmixed with (counts per unit abundance; counts in each channel are then
``abundance × reference``).  Each probe is read in its own channel: the one where the plan
predicts it brightest at the target depth (as the plan's evaluation does).

Quantities (one row per component × quantity in ``closure.csv``):

``signal``
    excess counts of the probe in its own channel, target ROI over background ROI:
    predicted :func:`probeplan.model.fluorescence.depth_profile` at the plan's depth;
    measured (mean_target − mean_background) × reference[own channel].
``background``
    counts in the own channel in the background ROI from the probe's nonspecific uptake and
    from the other, non-probe components (autofluorescence, offset); predicted uptake +
    autofluorescence + excitation leakage (dark current is subtracted in both).
``sbr``
    the raw-channel SBR = (S + B)/B of those two: what the plan's "SBR at depth" means.
``tbr``
    the unmixed abundance ratio target/background (what the study measures as TBR).  With
    references that match the target's depth and no blur it equals the uptake ratio, so the
    predicted value is the plan's ``uptake_ratio``.  SBR and TBR are different quantities: a
    low SBR (most of the channel's light is background) can sit beside a high TBR.
``noise``
    pixel-to-pixel SD of the probe's abundance in the background ROI, expressed as counts of
    its own channel (× reference) so that the abundance unit drops out: predicted by weighted
    least squares on the plan's channel model (shot noise of every background in each
    channel plus read noise: covariance (RᵀWR)⁻¹); measured ``sd`` (needs that column).

Fitted unknowns (each per animal, then mean ± standard error across animals; the plan's
target concentration is taken as right).  Each probe is judged in its own target ROI: the
ROI (other than the background) where its TBR is highest, unless ``target_roi`` names one.

- uptake ratio = measured TBR;
- system throughput = measured / predicted uptake background at that ratio (the factor by
  which laser, lens, filter and camera deliver more or less than the model; the uptake
  background comes from the whole tissue, so it does not depend on the target's depth);
- effective target depth = the depth at which the model's signal × throughput equals the
  measured signal (the signal falls monotonically with depth); NaN, with a note, when no
  depth in 0.05–20 mm does;
- autofluorescence yield = the plan's assumption × (measured non-probe background /
  throughput − predicted leakage) / predicted autofluorescence.

Signal and throughput cannot both be fitted with the depth from one channel: when the depth
is known (anatomy, or :func:`probeplan.study.depth_spectrum.depth_from_spectrum`), pass
``depth_mm``; the throughput then comes from the signal at that depth and the uptake
background becomes a test of the model, not a fit.

The refined plan is the plan's TOML with ``target.uptake_ratio`` and ``target.depth_mm``
replaced and the other fits written as comments.
"""

from __future__ import annotations

import math
import re
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from probeplan.errors import AssumptionWarning, input_error

__all__ = ["CLOSURE_COLUMNS", "MEASUREMENT_COLUMNS", "Closure", "closure", "measurements_from_roi_rows"]

CLOSURE_COLUMNS = ("component", "quantity", "predicted", "measured", "ratio", "meaning")
MEASUREMENT_COLUMNS = ("animal", "group", "time_h", "roi", "component", "mean", "se", "tbr")
_DEPTH_SEARCH_MM = (0.05, 20.0)


@dataclass
class Closure:
    """The closure table, the fitted unknowns and the refined plan text."""

    table: pd.DataFrame
    fits: pd.DataFrame
    refined_plan_toml: str
    notes: list[str] = field(default_factory=list)


def measurements_from_roi_rows(rows, *, animal: str = "1", group: str = "all", time_h: float = 0.0) -> pd.DataFrame:
    """ROI statistics rows (:func:`probeplan.unmixing.roi.roi_statistics`) as a one-animal measurements table.

    ``se`` is the SD over √n_pixels.
    """
    df = pd.DataFrame(list(rows))
    df["se"] = df["sd"] / np.sqrt(df["n_pixels"].clip(lower=1))
    df["animal"], df["group"], df["time_h"] = animal, group, float(time_h)
    return df[[*MEASUREMENT_COLUMNS, "sd", "n_pixels"]]


def _check(measurements: pd.DataFrame) -> pd.DataFrame:
    missing = [c for c in MEASUREMENT_COLUMNS if c not in measurements.columns]
    if missing:
        raise input_error("measurements", f"missing column(s) {missing}", f"give the columns {list(MEASUREMENT_COLUMNS)}")
    return measurements


def _mean_se(values) -> tuple[float, float]:
    v = np.asarray([x for x in values if np.isfinite(x)], dtype=np.float64)
    if v.size == 0:
        return math.nan, math.nan
    return float(v.mean()), (float(v.std(ddof=1) / math.sqrt(v.size)) if v.size > 1 else math.nan)


def closure(measurements: pd.DataFrame, plan, references, *, target_roi: str | dict | None = None,
            background_roi: str = "background", time_h: float | None = None, depth_mm: float | None = None,
            gain_e_per_count: float = 1.0) -> Closure:
    """Put the plan's predictions beside the measurements, fit the unknowns, refine the plan.

    Parameters
    ----------
    measurements : DataFrame
        :data:`MEASUREMENT_COLUMNS` (+ ``sd``); abundance in the references' unit.
    plan : Plan
        :func:`probeplan.study.plan.load_plan`.
    references : ReferenceSpectra
        The spectra the images were unmixed with, in counts per unit abundance (not normalised);
        rows matched to the plan's channels by name.
    target_roi : str or dict, optional
        The target ROI (for every probe, or per probe name); default each probe's ROI of highest TBR.
    background_roi : str
    time_h : float, optional
        Time point to use; default the one with the highest mean TBR of the target ROI (peak contrast).
    depth_mm : float, optional
        The target's depth when known: then the throughput is fitted from the signal at it.
    gain_e_per_count : float
        Camera conversion gain (e⁻ per count) of the images.

    Returns
    -------
    Closure
    """
    from probeplan.model.channels import response_matrix
    from probeplan.model.fluorescence import Autofluorescence, background_rates, depth_profile
    from probeplan.study.evaluate import plan_model

    df = _check(measurements)
    m = plan_model(plan)
    tgt = plan.target
    rois = list(dict.fromkeys(df["roi"]))
    if background_roi not in rois:
        raise input_error("measurements", f"no ROI named {background_roi!r} (ROIs: {rois})",
                          "measure a background ROI or name it with background_roi")
    ch_names = [ch.name for ch in m.channels]
    refs = references.for_channels(ch_names, where="the plan's channels")
    comp = list(refs.component_names)
    probe_names = [p.name for p in m.probes]
    missing = [p for p in probe_names if p not in comp]
    if missing:
        raise input_error(str(refs.source), f"no reference for the plan's probe(s) {missing}",
                          "unmix with references named as the plan's probes")
    others = [c for c in comp if c not in probe_names]
    if time_h is None:
        tbr_by_time = df[(df["roi"] != background_roi) & df["component"].isin(probe_names)].groupby("time_h")["tbr"].max()
        time_h = float(tbr_by_time.idxmax())
    df = df[df["time_h"] == time_h]
    if df.empty:
        raise input_error("time_h", f"no measurements at {time_h:g} h", "choose a measured time point")
    depth = float(tgt["depth_mm"])
    c = float(tgt["concentration_uM"])
    tbr_plan = float(tgt["uptake_ratio"])
    af = Autofluorescence()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AssumptionWarning)
        resp = response_matrix(m.tissue, m.probes, m.channels, irradiance_mw_per_cm2=m.irradiance_mw_per_cm2,
                               depth_mm=[depth], target_size_mm=tgt["size_mm"])[0]  # (C, K) e-/s per µM
        own = [int(np.argmax(resp[:, k])) for k in range(len(m.probes))]
        bgr = [background_rates(m.tissue, m.probes, source=m.source, irradiance_mw_per_cm2=m.irradiance_mw_per_cm2,
                                emission_filter=ch.emission_filter, camera=m.camera, lens=m.lens,
                                background_concentration_uM=[c / tbr_plan] * len(m.probes), autofluorescence=af)
               for ch in m.channels]
    exposure = np.array([ch.exposure_s for ch in m.channels])
    read_noise = float(m.camera.read_noise_per_binned_px_e)
    # predicted per-pixel abundance noise at a background pixel: WLS on the plan's references (counts per µM)
    R = resp * exposure[:, None]
    bg_counts = np.array([(float(np.sum(b["uptake"])) + b["autofluorescence"] + b["leakage"] + b["dark"]) * t
                          for b, t in zip(bgr, exposure, strict=True)])
    cov = np.linalg.inv(R.T @ (R / (bg_counts + read_noise**2)[:, None]))

    def value(animal_rows, roi, name, col="mean"):
        hit = animal_rows[(animal_rows["roi"] == roi) & (animal_rows["component"] == name)]
        return float(hit[col].iloc[0]) if len(hit) and col in hit else math.nan

    rows, fit_rows, notes = [], [], []
    animals = list(dict.fromkeys(df["animal"]))
    for k, probe in enumerate(m.probes):
        name, ch = probe.name, m.channels[own[k]]
        roi_k = target_roi if isinstance(target_roi, str) else (target_roi or {}).get(name) or _own_roi(df, name, background_roi)
        if roi_k not in rois:
            raise input_error("target_roi", f"{roi_k!r} is not a measured ROI ({rois})", "name a measured ROI")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", AssumptionWarning)
            prof = depth_profile(m.tissue, probe, source=m.source, irradiance_mw_per_cm2=m.irradiance_mw_per_cm2,
                                 emission_filter=ch.emission_filter, camera=m.camera, lens=m.lens,
                                 exposure_s=ch.exposure_s, depth_mm=[depth], target_size_mm=tgt["size_mm"],
                                 concentration_uM=c, uptake_ratio=tbr_plan, autofluorescence=af, warn=False)
        s_pred = float(prof.signal_e[0])
        up_pred, af_pred, leak_pred = prof.uptake_background_e, prof.autofluorescence_e, prof.leakage_e
        b_pred = up_pred + af_pred + leak_pred
        noise_pred = math.sqrt(cov[k, k]) * R[own[k], k]  # as counts of the own channel
        ref_own = refs.matrix[own[k]] * gain_e_per_count  # electrons per unit abundance in the own channel
        per: dict[str, list[float]] = {q: [] for q in ("signal", "background", "sbr", "tbr", "noise", "uptake_ratio",
                                                       "af_yield_per_cm", "depth_mm", "throughput")}
        for a in animals:
            rows_a = df[df["animal"] == a]
            at, ab = value(rows_a, roi_k, name), value(rows_a, background_roi, name)
            s_m = (at - ab) * ref_own[k]
            up_m = ab * ref_own[k]
            af_m = sum(value(rows_a, background_roi, o) * ref_own[comp.index(o)] for o in others) if others else 0.0
            b_m = up_m + af_m
            tbr_m = value(rows_a, roi_k, name, "tbr")
            sbr_m = (s_m + b_m) / b_m if b_m > 0 else math.nan
            for q, v in (("signal", s_m), ("background", b_m), ("sbr", sbr_m), ("tbr", tbr_m),
                         ("noise", value(rows_a, background_roi, name, "sd") * ref_own[k]), ("uptake_ratio", tbr_m)):
                per[q].append(v)
            if depth_mm is None:
                thr = up_m / (up_pred * tbr_plan / tbr_m) if tbr_m > 1 and up_pred > 0 else math.nan
                d_eff = _fit_depth(m, probe, ch, tgt, c, tbr_m, s_m / thr if thr > 0 else math.nan)
            else:
                d_eff = float(depth_mm)
                s_at = _signal_e(m, probe, ch, tgt, c, tbr_m, d_eff) if tbr_m > 1 else math.nan
                thr = s_m / s_at if np.isfinite(s_at) and s_at > 0 else math.nan
            per["throughput"].append(thr)
            per["depth_mm"].append(d_eff)
            y_af = af.yield_per_cm * (af_m / thr - leak_pred) / af_pred if others and thr > 0 and af_pred > 0 else math.nan
            per["af_yield_per_cm"].append(max(y_af, 0.0) if np.isfinite(y_af) else math.nan)
        meanings = {
            "signal": f"excess counts (e-) of {name} in channel {ch.name}, target ROI '{roi_k}' over '{background_roi}'"
                      f", per pixel per exposure; predicted at the plan's {depth:g} mm",
            "background": f"counts (e-) in channel {ch.name} in '{background_roi}' from {name}'s nonspecific uptake and "
                          "the non-probe components; predicted uptake + autofluorescence + leakage (dark subtracted)",
            "sbr": f"raw-channel SBR (S + B)/B in channel {ch.name}: how far the target stands above all light in the "
                   "channel before unmixing; this is the plan's 'SBR at depth'",
            "tbr": f"TBR of the unmixed {name} abundance, '{roi_k}' mean / '{background_roi}' mean: predicted equal to "
                   "the plan's uptake ratio; it is not the SBR, which counts every background photon in the channel",
            "noise": f"pixel-to-pixel SD of the unmixed {name} abundance in '{background_roi}', as e- of channel "
                     f"{ch.name}; predicted from shot and read noise of every background through weighted least "
                     "squares (real tissue texture adds to the measured value)",
        }
        predicted = {"signal": s_pred, "background": b_pred, "sbr": (s_pred + b_pred) / b_pred, "tbr": tbr_plan,
                     "noise": noise_pred}
        for q in ("signal", "background", "sbr", "tbr", "noise"):
            meas, _ = _mean_se(per[q])
            rows.append({"component": name, "quantity": q, "predicted": predicted[q], "measured": meas,
                         "ratio": meas / predicted[q] if predicted[q] else math.nan, "meaning": meanings[q]})
        plan_values = {"uptake_ratio": tbr_plan, "af_yield_per_cm": af.yield_per_cm, "depth_mm": depth, "throughput": 1.0}
        for q, unit in (("uptake_ratio", "1"), ("af_yield_per_cm", "cm^-1"), ("depth_mm", "mm"), ("throughput", "1")):
            est, se = _mean_se(per[q])
            fit_rows.append({"component": name, "unknown": q, "plan": plan_values[q], "fitted": est, "se": se,
                             "n_animals": int(np.isfinite(per[q]).sum()), "unit": unit, "roi": roi_k})
            if not np.isfinite(est):
                notes.append(f"{name}: {q} could not be fitted (target not above background, or no depth in "
                             f"{_DEPTH_SEARCH_MM[0]:g}-{_DEPTH_SEARCH_MM[1]:g} mm gives the measured signal at the "
                             "fitted throughput: the model's uptake background and signal disagree with the images by "
                             "more than depth explains; pass the known depth)")
    fits = pd.DataFrame(fit_rows)
    if len(animals) < 2:
        notes.append("one animal: no standard errors for the fitted unknowns (they come from the spread across animals)")
    notes.append(f"time point {time_h:g} h used (peak target contrast unless chosen)")
    notes.append("fits take the plan's target concentration as right: a wrong dose shows up as a throughput change")
    table = pd.DataFrame(rows, columns=list(CLOSURE_COLUMNS))
    return Closure(table, fits, refined_plan_text(plan, fits), notes)


def _own_roi(df: pd.DataFrame, name: str, background_roi: str) -> str:
    """The ROI (not the background) where component ``name`` has its highest mean TBR."""
    sub = df[(df["component"] == name) & (df["roi"] != background_roi)]
    if sub.empty:
        raise input_error("measurements", f"no ROI other than {background_roi!r} for {name!r}", "measure a target ROI")
    return str(sub.groupby("roi")["tbr"].mean().idxmax())


def _signal_e(m, probe, ch, tgt, c, tbr, depth_mm) -> float:
    """Model excess signal (e-) of the probe in its channel at ``depth_mm`` with uptake ratio ``tbr``."""
    from probeplan.model.fluorescence import probe_rate_e_per_s

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AssumptionWarning)
        rate = probe_rate_e_per_s(m.tissue, probe, source=m.source, irradiance_mw_per_cm2=m.irradiance_mw_per_cm2,
                                  emission_filter=ch.emission_filter, camera=m.camera, lens=m.lens, depth_mm=[depth_mm],
                                  target_size_mm=tgt["size_mm"], concentration_uM=c * (1.0 - 1.0 / tbr))
    return float(rate[0]) * ch.exposure_s


def _fit_depth(m, probe, ch, tgt, c, tbr, signal_e) -> float:
    """Depth (mm) at which the model's excess signal (uptake ratio ``tbr``) equals ``signal_e``; NaN if none in range."""
    from scipy.optimize import brentq

    if not (np.isfinite(signal_e) and signal_e > 0 and np.isfinite(tbr) and tbr > 1):
        return math.nan
    target = math.log(signal_e)

    def f(d):
        return math.log(max(_signal_e(m, probe, ch, tgt, c, tbr, d), 1e-300)) - target

    lo, hi = _DEPTH_SEARCH_MM
    if f(lo) < 0 or f(hi) > 0:
        return math.nan
    return float(brentq(f, lo, hi, xtol=1e-3))


def refined_plan_text(plan, fits: pd.DataFrame) -> str:
    """The plan's TOML with ``target.uptake_ratio`` and ``target.depth_mm`` set to the fitted values (across probes)."""
    text = plan.text or ""

    def pooled(q):
        v = fits.loc[fits["unknown"] == q, "fitted"].to_numpy(dtype=float)
        v = v[np.isfinite(v)]
        return float(np.mean(v)) if v.size else math.nan

    header = ["# Refined by probeplan closure from measured images (research use only).",
              "# Fitted unknowns (mean over probes; per probe and with standard errors in closure_fits.csv):"]
    for q in ("uptake_ratio", "depth_mm", "throughput", "af_yield_per_cm"):
        header.append(f"#   {q} = {pooled(q):.4g}")
    out = text
    for key, q in (("uptake_ratio", "uptake_ratio"), ("depth_mm", "depth_mm")):
        v = pooled(q)
        if not np.isfinite(v) or (q == "uptake_ratio" and v < 1):
            continue
        out = _set_in_table(out, "target", key, f"{v:.3g}")
    return "\n".join(header) + "\n" + out


def _set_in_table(text: str, table: str, key: str, value: str) -> str:
    """Replace ``key = …`` inside ``[table]`` of a TOML text (keeping any trailing comment)."""
    lines = text.splitlines()
    current = None
    for i, line in enumerate(lines):
        head = re.match(r"^\s*\[+\s*([^\]]+?)\s*\]+", line)
        if head:
            current = head.group(1)
            continue
        if current == table:
            mt = re.match(rf"^(\s*{re.escape(key)}\s*=\s*)([^#]*?)(\s*#.*)?$", line)
            if mt:
                lines[i] = f"{mt.group(1)}{value}{mt.group(3) or ''}  # was {mt.group(2).strip()}"
                break
    return "\n".join(lines) + "\n"
