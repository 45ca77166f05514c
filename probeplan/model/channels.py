"""The channel model: probe × channel responses, crosstalk and separability at depth.

For K probes and C channels (each a source + emission filter + camera + lens),
the response matrix M (C × K) holds the photoelectron rate per binned pixel
per µM of probe in a target inclusion at the given depth (through
:func:`probeplan.model.fluorescence.probe_rate_e_per_s`).  From it:

* **crosstalk**: each probe's responses divided by its response in its own
  (brightest) channel, so 1 marks the channel a probe belongs to and the other
  entries are the fraction that leaks into other channels;
* **condition number** of M with unit-norm columns (2-norm): 1 for orthogonal
  channels, ∞ for probes that cannot be told apart;
* **noise amplification** of probe k: the standard deviation of its unmixed
  estimate, √[(MᵀΣ⁻¹M)⁻¹]ₖₖ, divided by that of the best single-channel
  estimate of the probe imaged alone, 1/max_c(M_ck/σ_c) (Neher & Neher 2004
  discuss the same ratio for unmixed fluorophores).  Σ is the diagonal
  per-channel noise variance per second at the operating point (Poisson signal
  and background, dark current, read noise spread over the exposure).

The channel model is linear in the probes (responses per µM add): the probes'
own absorption, which :func:`probeplan.model.fluorescence.depth_profile`
adds to the tissue, is left out here, and :func:`channel_report` notes when
the probes' background uptake raises the tissue's absorption by more than
10 % at a channel's excitation, where that shortcut stops being small.

References
----------
R. Neher, E. Neher, "Optimizing imaging parameters for the separation of
multiple labels in a fluorescence image", J. Microsc. 213, 46 (2004),
doi:10.1111/j.1365-2818.2004.01262.x.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from probeplan.errors import input_error
from probeplan.model.fluorescence import (
    DEFAULT_CONCENTRATION_UM,
    PROBE_ABSORPTION_WARN_FRACTION,
    Autofluorescence,
    background_rates,
    probe_mu_a_per_cm,
    probe_rate_e_per_s,
)
from probeplan.model.tissue import Tissue, as_tissue

__all__ = [
    "ChannelReport",
    "channel_report",
    "response_matrix",
    "crosstalk",
    "condition_number",
    "noise_amplification",
    "unmixed_snr",
    "SEPARABLE_CONDITION_LIMIT",
]

#: Condition number above which a probe set is reported as not separable (common practice: noise
#: amplification grows with the condition number; beyond ~1e3 unmixing is dominated by noise).
SEPARABLE_CONDITION_LIMIT = 1e3


def _matrix(m) -> np.ndarray:
    arr = np.asarray(m, dtype=np.float64)
    if arr.ndim < 2:
        raise input_error("response", f"shape {arr.shape}", "give a (C, K) matrix, channels by probes")
    if not np.all(np.isfinite(arr)):
        raise input_error("response", "contains NaN or inf", "check the inputs of the channel model")
    if np.any(arr < 0):
        raise input_error("response", f"contains a negative value ({arr.min():g})", "responses are counts rates >= 0")
    return arr


def crosstalk(response) -> np.ndarray:
    """Each probe's column divided by its largest entry (its own channel), shape (..., C, K).

    Examples
    --------
    >>> crosstalk([[10.0, 1.0], [2.0, 5.0]]).tolist()
    [[1.0, 0.2], [0.2, 1.0]]
    """
    m = _matrix(response)
    peak = m.max(axis=-2, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(peak > 0, m / np.where(peak > 0, peak, 1.0), 0.0)


def condition_number(response) -> np.ndarray:
    """2-norm condition number of the response with unit-norm columns (inf when singular).

    Examples
    --------
    >>> float(condition_number(np.eye(3)))
    1.0
    >>> float(condition_number([[1.0, 1.0], [1.0, 1.0]]))
    inf
    """
    m = _matrix(response)
    norms = np.linalg.norm(m, axis=-2, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        unit = np.where(norms > 0, m / np.where(norms > 0, norms, 1.0), 0.0)
    s = np.linalg.svd(unit, compute_uv=False)
    smin = s[..., -1]
    with np.errstate(divide="ignore"):
        cond = np.where(smin > s[..., 0] * 1e-12, s[..., 0] / np.where(smin > 0, smin, 1.0), np.inf)
    if m.shape[-2] < m.shape[-1]:
        cond = np.full(cond.shape, np.inf)
    return cond


def _unmixed_variance(m: np.ndarray, noise_var: np.ndarray) -> np.ndarray:
    """diag((MᵀΣ⁻¹M)⁻¹) per stacked matrix, inf where singular."""
    w = 1.0 / noise_var
    fisher = np.einsum("...ck,...c,...cj->...kj", m, w, m)
    out = np.full(m.shape[:-2] + (m.shape[-1],), np.inf)
    try:
        inv = np.linalg.inv(fisher)
        diag = np.diagonal(inv, axis1=-2, axis2=-1)
        ok = np.all(np.isfinite(diag) & (diag > 0), axis=-1) & (condition_number(m) < 1e12)
        out = np.where(ok[..., None], diag, np.inf)
    except np.linalg.LinAlgError:
        for idx in np.ndindex(m.shape[:-2]):
            try:
                d = np.diagonal(np.linalg.inv(fisher[idx]))
                if condition_number(m[idx]) < 1e12 and np.all(d > 0):
                    out[idx] = d
            except np.linalg.LinAlgError:
                pass
    return out


def noise_amplification(response, noise_var) -> np.ndarray:
    """Per-probe noise amplification of unmixing against single-probe imaging.

    Parameters
    ----------
    response : array_like, shape (..., C, K)
        Response matrix.
    noise_var : array_like, shape (..., C)
        Noise variance of each channel in the same units squared.

    Returns
    -------
    ndarray, shape (..., K)
        √[(MᵀΣ⁻¹M)⁻¹]ₖₖ · max_c(M_ck/σ_c); 1 for channels without crosstalk,
        inf for probes that cannot be separated.

    Examples
    --------
    >>> noise_amplification(np.eye(3), np.ones(3)).tolist()
    [1.0, 1.0, 1.0]
    """
    m = _matrix(response)
    var = np.asarray(noise_var, dtype=np.float64)
    if var.shape != m.shape[:-1] or np.any(~np.isfinite(var)) or np.any(var <= 0):
        raise input_error("noise_var", f"shape {var.shape}, needs {m.shape[:-1]} positive values",
                          "give one positive variance per channel")
    unmixed_sd = np.sqrt(_unmixed_variance(m, var))
    best_single = np.max(m / np.sqrt(var)[..., None], axis=-2)
    with np.errstate(invalid="ignore"):
        return np.where(best_single > 0, unmixed_sd * best_single, np.inf)


def unmixed_snr(response, noise_var, abundance=1.0) -> np.ndarray:
    """SNR of each probe's unmixed estimate: abundance / √[(MᵀΣ⁻¹M)⁻¹]ₖₖ, shape (..., K)."""
    m = _matrix(response)
    var = np.asarray(noise_var, dtype=np.float64)
    if var.shape != m.shape[:-1] or np.any(~np.isfinite(var)) or np.any(var <= 0):
        raise input_error("noise_var", f"shape {var.shape}, needs {m.shape[:-1]} positive values",
                          "give one positive variance per channel")
    a = np.asarray(abundance, dtype=np.float64)
    if np.any(~np.isfinite(a)) or np.any(a < 0):
        raise input_error("abundance", f"got {abundance!r}", "give finite abundances >= 0")
    return a / np.sqrt(_unmixed_variance(m, var))


def _probe_absorption_rise(tissue: Tissue, probes, channels, background_uM: float) -> float:
    """Largest fractional rise of the tissue's μa from all probes' background uptake, over the excitations."""
    worst = 0.0
    for x_nm in {float(ch.source.centre_nm) for ch in channels}:
        tissue_mu_a = float(tissue.mu_a_per_cm(x_nm))
        added = sum(float(probe_mu_a_per_cm(p, x_nm, background_uM)) for p in probes)
        if tissue_mu_a > 0:
            worst = max(worst, added / tissue_mu_a)
    return worst


def response_matrix(
    tissue: Tissue,
    probes,
    channels,
    *,
    irradiance_mw_per_cm2: float,
    depth_mm,
    target_size_mm: float = 2.0,
) -> np.ndarray:
    """Photoelectrons per second per binned pixel per µM of each probe in each channel.

    Returns
    -------
    ndarray, shape (D, C, K)
        One (C, K) matrix per depth in ``depth_mm``.
    """
    tissue = as_tissue(tissue)
    depth = np.atleast_1d(np.asarray(depth_mm, dtype=np.float64))
    out = np.empty((depth.size, len(channels), len(probes)))
    for c, ch in enumerate(channels):
        for k, probe in enumerate(probes):
            out[:, c, k] = probe_rate_e_per_s(
                tissue, probe, source=ch.source, irradiance_mw_per_cm2=irradiance_mw_per_cm2,
                emission_filter=ch.emission_filter, camera=ch.camera, lens=ch.lens, depth_mm=depth,
                target_size_mm=target_size_mm, concentration_uM=1.0,
            )
    return out


@dataclass
class ChannelReport:
    """Responses, crosstalk and separability of a probe set in a channel set, at several depths."""

    probe_names: list[str]
    channel_names: list[str]
    depth_mm: np.ndarray
    response_e_per_s_per_uM: np.ndarray  # (D, C, K)
    background_e_per_s: np.ndarray  # (C,)
    leakage_e_per_s: np.ndarray  # (C,)
    crosstalk: np.ndarray  # (D, C, K)
    condition_number: np.ndarray  # (D,)
    noise_amplification: np.ndarray  # (D, K)
    unmixed_snr: np.ndarray  # (D, K)
    exposure_s: np.ndarray  # (C,)
    notes: list[str] = field(default_factory=list)

    @property
    def separable(self) -> np.ndarray:
        """Whether the set can be unmixed at each depth (condition number below the limit)."""
        return self.condition_number < SEPARABLE_CONDITION_LIMIT

    def to_frame(self):
        """The report as a long :class:`pandas.DataFrame`: one row per depth, channel and probe.

        Columns ``depth_mm, channel, probe, response_e_per_s_per_uM, crosstalk, background_e_per_s,
        condition_number, noise_amplification, unmixed_snr`` (the last three per depth and probe).
        """
        import pandas as pd

        rows = []
        for d, depth in enumerate(self.depth_mm):
            for c, channel in enumerate(self.channel_names):
                for k, probe in enumerate(self.probe_names):
                    rows.append({
                        "depth_mm": float(depth), "channel": channel, "probe": probe,
                        "response_e_per_s_per_uM": float(self.response_e_per_s_per_uM[d, c, k]),
                        "crosstalk": float(self.crosstalk[d, c, k]),
                        "background_e_per_s": float(self.background_e_per_s[c]),
                        "condition_number": float(self.condition_number[d]),
                        "noise_amplification": float(self.noise_amplification[d, k]),
                        "unmixed_snr": float(self.unmixed_snr[d, k]),
                    })
        return pd.DataFrame.from_records(rows)

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready summary."""
        return {
            "probes": self.probe_names,
            "channels": self.channel_names,
            "depth_mm": self.depth_mm.tolist(),
            "response_e_per_s_per_uM": self.response_e_per_s_per_uM.tolist(),
            "crosstalk": self.crosstalk.tolist(),
            "background_e_per_s": self.background_e_per_s.tolist(),
            "leakage_e_per_s": self.leakage_e_per_s.tolist(),
            "condition_number": [None if not math.isfinite(c) else float(c) for c in self.condition_number],
            "separable": self.separable.tolist(),
            "noise_amplification": [[None if not math.isfinite(v) else float(v) for v in row]
                                    for row in self.noise_amplification],
            "unmixed_snr": [[float(v) if math.isfinite(v) else 0.0 for v in row] for row in self.unmixed_snr],
            "notes": self.notes,
        }


def channel_report(
    tissue: Tissue,
    probes,
    channels,
    *,
    irradiance_mw_per_cm2: float,
    depth_mm,
    target_size_mm: float = 2.0,
    concentration_uM: float = DEFAULT_CONCENTRATION_UM,
    uptake_ratio: float = 5.0,
    autofluorescence: Autofluorescence | None = None,
) -> ChannelReport:
    """Response matrix, crosstalk, condition number and noise amplification at each depth.

    The noise of channel c at the operating point (all probes at
    ``concentration_uM`` in the target, ``concentration_uM / uptake_ratio``
    around it) is Poisson in signal and background plus read noise, per the
    channel's exposure (``channel.exposure_s``, 1 s when unset).
    """
    if len(probes) == 0 or len(channels) == 0:
        raise input_error("probes/channels", "need at least one of each", "give probes and channels")
    if len(probes) > len(channels):
        raise input_error("channels", f"{len(probes)} probes but only {len(channels)} channels",
                          "unmixing needs at least as many channels as probes: add channels or drop probes")
    if not 1 <= uptake_ratio < np.inf:
        raise input_error("uptake_ratio", f"got {uptake_ratio!r}", "give a finite target-to-background uptake ratio >= 1")
    tissue = as_tissue(tissue)
    depth = np.atleast_1d(np.asarray(depth_mm, dtype=np.float64))
    resp = response_matrix(tissue, probes, channels, irradiance_mw_per_cm2=irradiance_mw_per_cm2, depth_mm=depth,
                           target_size_mm=target_size_mm)
    bg = np.empty(len(channels))
    leak = np.empty(len(channels))
    read_var = np.empty(len(channels))
    exposure = np.empty(len(channels))
    for c, ch in enumerate(channels):
        rates = background_rates(
            tissue, probes, source=ch.source, irradiance_mw_per_cm2=irradiance_mw_per_cm2,
            emission_filter=ch.emission_filter, camera=ch.camera, lens=ch.lens,
            background_concentration_uM=[concentration_uM / uptake_ratio] * len(probes),
            autofluorescence=autofluorescence, probe_absorption=False,
        )
        leak[c] = rates["leakage"]
        bg[c] = float(np.sum(rates["uptake"])) + rates["autofluorescence"] + rates["leakage"] + rates["dark"]
        exposure[c] = float(getattr(ch, "exposure_s", None) or 1.0)
        read_var[c] = float(ch.camera.read_noise_per_binned_px_e) ** 2
    # variance of the rate estimate (e-/s)^2 in each channel at the operating point
    signal = resp.sum(axis=-1) * concentration_uM  # (D, C)
    noise_var = (signal + bg) / exposure + read_var / exposure**2
    noise_var = np.maximum(noise_var, 1e-30)
    amp = noise_amplification(resp, noise_var)
    snr = unmixed_snr(resp, noise_var, abundance=concentration_uM)
    cond = condition_number(resp)
    notes = []
    rise = _probe_absorption_rise(tissue, probes, channels, concentration_uM / uptake_ratio)
    if rise > PROBE_ABSORPTION_WARN_FRACTION:
        notes.append(f"the probes' background uptake ({concentration_uM / uptake_ratio:.3g} uM each) raises the "
                     f"tissue's absorption by up to {100.0 * rise:.0f} % at the excitation: the channel model leaves "
                     "the probes' own absorption out (linear in the probes); the depth curves include it")
    if np.any(cond >= SEPARABLE_CONDITION_LIMIT):
        notes.append(f"condition number reaches {np.max(cond):.3g}: the probes cannot be separated reliably "
                     "at some depths (two probes look the same in these channels)")
    return ChannelReport(
        probe_names=[str(getattr(p, "name", f"probe {i + 1}")) for i, p in enumerate(probes)],
        channel_names=[str(getattr(ch, "name", f"channel {i + 1}")) for i, ch in enumerate(channels)],
        depth_mm=depth,
        response_e_per_s_per_uM=resp,
        background_e_per_s=bg,
        leakage_e_per_s=leak,
        crosstalk=crosstalk(resp),
        condition_number=cond,
        noise_amplification=amp,
        unmixed_snr=snr,
        exposure_s=exposure,
        notes=notes,
    )
