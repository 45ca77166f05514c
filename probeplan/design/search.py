"""Exhaustive search for the probe / emission filter / source combination with the best worst-case unmixed SNR.

The objective
-------------
For a set P of K probes imaged through a set F of C ≥ K emission filters (one
channel per filter) under one excitation source s, the response matrix is
M = R[s, P, F]ᵀ (C × K), with R[s, p, f] the photoelectron rate per binned
pixel per µM of probe p in a target inclusion at the target depth
(:func:`probeplan.model.fluorescence.probe_rate_e_per_s`).  Each channel's noise
variance of the rate estimate is, as in :func:`probeplan.model.channels.channel_report`::

    σ²_c = (c·Σ_k M_ck + B_c + Σ_k U_kc) / t + σ_read² / t²

with c the target concentration (µM), B_c the probe-free background rate
(autofluorescence + excitation leakage + dark current), U_kc the nonspecific
uptake of probe k at c / TBR in the surrounding tissue, t the exposure (s) and
σ_read the read noise of one binned pixel.  Each probe's unmixed SNR is
SNR_k = c / √[(MᵀΣ⁻¹M)⁻¹]_kk and the search maximises min_k SNR_k over every
source, every K-subset of the candidate probes and every C-subset of the
candidate filters.

Exact pruning
-------------
See :mod:`probeplan.design.branch_bound`: every combination skipped is provably below the N-th best.

The irradiance of each source is its cap (the skin MPE by default): every
light signal and background scales with it while dark current and read noise
do not, so the Fisher matrix a²Mᵀ(aL + D)⁻¹M grows with the scale a and no
lower irradiance can give a higher SNR.  The same holds for the exposure.

Cameras
-------
With one camera every channel uses it.  With several (e.g. a silicon camera
and an InGaAs camera), each filter is assigned, once and before the search, the
camera with the largest band-integrated QE × transmission
∫T(λ)·QE(λ)dλ over 300-2000 nm: silicon below about 1000 nm, InGaAs above.
This is a simple rule of our own: it ignores the cameras' noise figures.

References
----------
R. Neher, E. Neher, "Optimizing imaging parameters for the separation of
multiple labels in a fluorescence image", J. Microsc. 213, 46 (2004),
doi:10.1111/j.1365-2818.2004.01262.x (unmixed SNR and noise amplification).
The bounds use two standard matrix facts for a positive-definite Fisher
matrix F: [F⁻¹]_kk ≥ 1/F_kk, and the inverse of a principal block is at most
the same block of F⁻¹ (Schur complement); e.g. S. M. Kay, Fundamentals of
Statistical Signal Processing: Estimation Theory (Prentice Hall, 1993), ch. 3
(chapter from memory).
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from probeplan.design.branch_bound import (
    DEFAULT_TOP,
    MAX_COMBINATIONS,
    SINGULAR_PIVOT,
    VAR_FLOOR,
    SearchOutcome,
    check_count,
    exhaustive_search,
)
from probeplan.errors import input_error, positive_number, warn_at_caller
from probeplan.format import format_number
from probeplan.model import optics, skin_limit
from probeplan.model.channels import SEPARABLE_CONDITION_LIMIT, condition_number, noise_amplification
from probeplan.model.fluorescence import DEFAULT_CONCENTRATION_UM, Autofluorescence, background_rates, probe_rate_e_per_s
from probeplan.model.spectra import grid_nm
from probeplan.model.tissue import Tissue

__all__ = [
    "DesignCandidate",
    "DesignResult",
    "SearchOutcome",
    "design",
    "exhaustive_search",
    "probe_series",
    "filter_grid",
    "camera_for_filter",
    "DEFAULT_TOP",
    "MAX_COMBINATIONS",
    "SINGULAR_PIVOT",
    "ROSE_SNR",
]

#: SNR of 5 for a detectable object (Rose criterion; common practice in imaging).
ROSE_SNR = 5.0
#: Relative difference in worst SNR reported as a tie in the explanation.
_TIE_FRACTION = 1e-3
#: Wavelength grid for the camera assignment rule (nm).
_ASSIGN_GRID_NM = grid_nm(300.0, 2000.0, 1.0)
#: Excitation counted as beyond a probe's absorption edge within this margin (nm).
_EDGE_MARGIN_NM = 0.01


# --------------------------------------------------------------------------- candidate generators


def probe_series(material: str, start_nm: float, stop_nm: float, step_nm: float, **overrides: Any) -> list:
    """Probes of one material at emission peaks start, start + step, … ≤ stop (nm).

    Parameters
    ----------
    material : str
        Library material (:func:`probeplan.model.dots.list_materials`).
    start_nm, stop_nm, step_nm : float
        Emission peaks in nm; ``stop_nm`` is included when on the grid.
    **overrides
        Passed to :func:`probeplan.model.dots.make_probe` (``quantum_yield``, ``fwhm_nm``, …).

    Raises
    ------
    InputError
        A non-positive step, a stop below the start, or a peak outside the material's range.

    Examples
    --------
    >>> [p.name for p in probe_series("CdTe", 660, 700, 20)]
    ['CdTe 660 nm', 'CdTe 680 nm', 'CdTe 700 nm']
    """
    from probeplan.model import dots

    start, stop, step = (float(v) for v in (start_nm, stop_nm, step_nm))
    if not (math.isfinite(step) and step > 0) or not (math.isfinite(start) and math.isfinite(stop)) or stop < start:
        raise input_error("probe series", f"{material}:{start:g}-{stop:g}:{step:g}",
                          "give START-STOP:STEP in nm with STOP >= START and STEP > 0, e.g. CdTeSe:660-840:20")
    peaks = grid_nm(start, stop, step)
    return [dots.make_probe(material, float(round(p, 6)), **overrides) for p in peaks]


def filter_grid(centres_nm, widths_nm, *, blocking_od: float | None = None) -> list:
    """Bandpass filters at every centre × width (nm), named in trade notation (``"700/30"``).

    Examples
    --------
    >>> [f.name for f in filter_grid([700, 710], [20, 40])]
    ['700/20', '700/40', '710/20', '710/40']
    """
    centres = np.atleast_1d(np.asarray(centres_nm, dtype=np.float64))
    widths = np.atleast_1d(np.asarray(widths_nm, dtype=np.float64))
    if centres.size == 0 or widths.size == 0 or not np.all(np.isfinite(centres)) or not np.all(np.isfinite(widths)):
        raise input_error("filter grid", f"centres {centres.tolist()}, widths {widths.tolist()}",
                          "give at least one finite centre and one finite width in nm")
    return [optics.parse_filter(f"{c:g}/{w:g}", blocking_od=blocking_od) for c in centres for w in widths]


def camera_for_filter(emission_filter, cameras: Sequence) -> Any:
    """The camera with the largest band-integrated QE × transmission ∫T(λ)QE(λ)dλ (first on ties).

    Examples
    --------
    >>> cams = [optics.camera("si-deep-depletion"), optics.camera("ingaas")]
    >>> camera_for_filter(optics.parse_filter("800/40"), cams).name, camera_for_filter(optics.parse_filter("1300/50"), cams).name
    ('si-deep-depletion', 'ingaas')
    """
    t = emission_filter.transmission(_ASSIGN_GRID_NM)
    scores = [float(np.trapezoid(t * cam.qe(_ASSIGN_GRID_NM), _ASSIGN_GRID_NM)) for cam in cameras]
    return cameras[int(np.argmax(scores))]


# --------------------------------------------------------------------------- compiled kernels


def _fmt(v: float) -> str:
    return format_number(v, 3)  # the one number formatter (∞ for an infinite condition number)


@dataclass
class DesignCandidate:
    """One ranked combination: source, probes, filters (with their cameras) and its figures."""

    rank: int
    source: str
    source_nm: float
    irradiance_mw_per_cm2: float
    probes: tuple[str, ...]
    filters: tuple[str, ...]
    cameras: tuple[str, ...]
    worst_snr: float
    snr: tuple[float, ...]
    limiting_probe: str
    condition_number: float
    noise_amplification: tuple[float, ...]
    response_e_per_s_per_uM: np.ndarray = field(repr=False)  # (C, K)
    noise_var: np.ndarray = field(repr=False)  # (C,) (e-/s)^2
    saturated: bool = False

    @property
    def separable(self) -> bool:
        """Condition number below :data:`probeplan.model.channels.SEPARABLE_CONDITION_LIMIT` and SNR > 0."""
        return bool(self.condition_number < SEPARABLE_CONDITION_LIMIT and self.worst_snr > 0)

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready summary (inf written as None)."""
        def num(v: float) -> float | None:
            return float(v) if math.isfinite(v) else None

        return {
            "rank": self.rank, "source": self.source, "source_nm": self.source_nm,
            "irradiance_mw_per_cm2": self.irradiance_mw_per_cm2, "probes": list(self.probes),
            "filters": list(self.filters), "cameras": list(self.cameras), "worst_snr": self.worst_snr,
            "snr": [float(v) for v in self.snr], "limiting_probe": self.limiting_probe,
            "condition_number": num(self.condition_number), "separable": self.separable,
            "noise_amplification": [num(v) for v in self.noise_amplification],
            "response_e_per_s_per_uM": self.response_e_per_s_per_uM.tolist(), "saturated": self.saturated,
        }


@dataclass
class DesignResult:
    """Ranked combinations of an exhaustive design search, the tables it searched, counts and notes.

    ``response_e_per_s_per_uM`` and ``uptake_e_per_s`` have shape (S, P, F),
    ``background_e_per_s`` (S, F), ``read_noise_e`` (F,), indexed like
    ``sources``, ``probe_names`` and ``filter_names``.
    """

    candidates: list[DesignCandidate]
    k: int
    n_channels: int
    depth_mm: float
    exposure_s: float
    concentration_uM: float
    sources: list[dict[str, Any]]
    probe_names: list[str]
    filter_names: list[str]
    filter_cameras: list[str]
    response_e_per_s_per_uM: np.ndarray = field(repr=False)
    background_e_per_s: np.ndarray = field(repr=False)
    uptake_e_per_s: np.ndarray = field(repr=False)
    read_noise_e: np.ndarray = field(repr=False)
    total_combinations: int = 0
    evaluated: int = 0
    filter_sets_total: int = 0
    filter_sets_skipped: int = 0
    filter_sets_cut: int = 0
    precompute_s: float = 0.0
    search_s: float = 0.0
    notes: list[str] = field(default_factory=list)

    @property
    def pruned(self) -> int:
        """Combinations ruled out by the exact bound without evaluation."""
        return self.total_combinations - self.evaluated

    @property
    def best(self) -> DesignCandidate | None:
        """The winner, or None when there was nothing to rank."""
        return self.candidates[0] if self.candidates else None

    def to_frame(self):
        """The ranked candidates as a :class:`pandas.DataFrame`, one row each, units in the column names.

        Probes, filters, cameras and the per-probe figures are joined with `` + `` in probe (or
        channel) order; an infinite condition number is NaN.
        """
        import pandas as pd

        rows = []
        for c in self.candidates:
            rows.append({
                "rank": c.rank, "source": c.source, "source_nm": c.source_nm,
                "irradiance_mw_per_cm2": c.irradiance_mw_per_cm2, "probes": " + ".join(c.probes),
                "filters": " + ".join(c.filters), "cameras": " + ".join(c.cameras),
                "worst_snr": c.worst_snr, "limiting_probe": c.limiting_probe,
                "snr_per_probe": " + ".join(f"{v:.4g}" for v in c.snr),
                "condition_number": c.condition_number if math.isfinite(c.condition_number) else math.nan,
                "noise_amplification_per_probe": " + ".join(f"{v:.4g}" for v in c.noise_amplification),
                "separable": c.separable, "saturated": c.saturated,
                "depth_mm": self.depth_mm, "exposure_s": self.exposure_s, "concentration_uM": self.concentration_uM,
            })
        return pd.DataFrame.from_records(rows, columns=list(rows[0]) if rows else ["rank"])

    def explanation(self) -> str:
        """Plain-text account of why the winner wins, against each runner-up."""
        lines = [f"Exhaustive search: {self.total_combinations:,} combinations ({len(self.sources)} source(s) × "
                 f"probe sets of {self.k} × filter sets of {self.n_channels}); {self.evaluated:,} evaluated exactly, "
                 f"{self.pruned:,} ruled out by an upper bound that cannot miss the optimum."]
        best = self.best
        if best is None or best.worst_snr <= 0:
            lines.append("No combination separates the probes: every set has a probe with zero unmixed SNR "
                         "(probes that look the same in every channel, or a probe the source does not excite). "
                         "Widen the candidate peaks or filters.")
            return "\n".join(lines)
        others = ", ".join(f"{n} {_fmt(v)}" for n, v in zip(best.probes, best.snr, strict=True) if n != best.limiting_probe)
        amp = [v for v in best.noise_amplification]
        lines.append(
            f"Best: {best.source} at {best.irradiance_mw_per_cm2:.4g} mW/cm^2; probes {', '.join(best.probes)}; "
            f"filters {', '.join(f'{f} ({c})' for f, c in zip(best.filters, best.cameras, strict=True))}.")
        lines.append(
            f"  worst-probe unmixed SNR {best.worst_snr:.3g} at {self.depth_mm:g} mm, limited by {best.limiting_probe}"
            + (f" (others: {others})" if others else "")
            + f"; condition number {_fmt(best.condition_number)}"
            + (" (separable)" if best.separable else " (NOT reliably separable)")
            + f"; noise amplification {_fmt(min(amp))}-{_fmt(max(amp))}.")
        if best.worst_snr < ROSE_SNR:
            lines.append(f"  Even the best worst-probe SNR is below {ROSE_SNR:g} (Rose criterion, common practice): "
                         "consider a longer exposure, a higher concentration, binning, or fewer probes.")
        for cand in self.candidates[1:]:
            snrs = ", ".join(f"{n} {_fmt(v)}" for n, v in zip(cand.probes, cand.snr, strict=True))
            if best.worst_snr - cand.worst_snr <= _TIE_FRACTION * best.worst_snr:
                lines.append(f"  vs #{cand.rank}: the same worst SNR within {100 * _TIE_FRACTION:g} % "
                             f"({_differences(best, cand)}; limited by {cand.limiting_probe}; probe SNRs {snrs}): "
                             "the change does not touch the limiting probe, either choice serves.")
            else:
                lines.append(f"  vs #{cand.rank}: {_differences(best, cand)} costs {_cost(best.worst_snr, cand.worst_snr)} "
                             f"of worst SNR ({cand.worst_snr:.3g}, limited by {cand.limiting_probe}; probe SNRs {snrs}).")
        return "\n".join(lines)

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready summary (the precomputed tables are left out)."""
        return {
            "k": self.k, "n_channels": self.n_channels, "depth_mm": self.depth_mm, "exposure_s": self.exposure_s,
            "concentration_uM": self.concentration_uM, "sources": self.sources,
            "candidate_probes": self.probe_names, "candidate_filters": self.filter_names,
            "filter_cameras": self.filter_cameras,
            "candidates": [c.as_dict() for c in self.candidates],
            "counts": {"total_combinations": self.total_combinations, "evaluated": self.evaluated,
                       "pruned": self.pruned, "filter_sets_total": self.filter_sets_total,
                       "filter_sets_skipped": self.filter_sets_skipped, "filter_sets_cut": self.filter_sets_cut},
            "timing_s": {"precompute": self.precompute_s, "search": self.search_s},
            "explanation": self.explanation(), "notes": self.notes,
        }


def _cost(best: float, other: float) -> str:
    if best <= 0:
        return "no cost"
    return f"{best - other:.3g} ({100.0 * (best - other) / best:.2g} %)"


def _differences(a: DesignCandidate, b: DesignCandidate) -> str:
    parts = []
    if a.source != b.source:
        parts.append(f"source {a.source} -> {b.source}")
    for label, x, y in (("probe", a.probes, b.probes), ("filter", a.filters, b.filters)):
        gone = [v for v in x if v not in y]
        new = [v for v in y if v not in x]
        if gone or new:
            parts.append(f"{label} {', '.join(gone) or '-'} -> {', '.join(new) or '-'}")
    return "; ".join(parts) if parts else "same choice"


def _sources_checked(sources) -> list:
    if isinstance(sources, (optics.Laser, optics.LED)):
        sources = [sources]
    sources = list(sources)
    if not sources:
        raise input_error("sources", "no excitation source given", "give at least one Laser or LED")
    for s in sources:
        if not isinstance(s, (optics.Laser, optics.LED)):
            raise TypeError(f"sources: expected Laser or LED objects, got {type(s).__name__}")
    return sources


def _excited(probe, source) -> bool:
    """Whether the source is shorter than the probe's absorption edge (or a measured ε is given)."""
    if probe.extinction_at_excitation_per_M_cm is not None:
        return True
    return float(source.centre_nm) < probe.exciton_peak_nm - _EDGE_MARGIN_NM


def design(
    tissue: str | Tissue,
    candidate_probes: Sequence,
    candidate_filters: Sequence,
    *,
    sources,
    camera,
    lens,
    k: int,
    depth_mm: float,
    exposure_s: float,
    n_channels: int | None = None,
    irradiance_mw_per_cm2=None,
    illumination_s: float | None = None,
    target_size_mm: float = 2.0,
    concentration_uM: float = DEFAULT_CONCENTRATION_UM,
    uptake_ratio: float = 5.0,
    autofluorescence: Autofluorescence | None = None,
    top: int = DEFAULT_TOP,
    prune: bool = True,
    max_combinations: float = MAX_COMBINATIONS,
    progress: Callable[[int, int], None] | None = None,
) -> DesignResult:
    """Search every source × K candidate probes × C candidate filters for the best worst-probe unmixed SNR.

    Parameters
    ----------
    tissue : str or Tissue
        Tissue preset name or composition.
    candidate_probes : sequence of Probe
        From :func:`probeplan.model.dots.make_probe` or :func:`probe_series`.
    candidate_filters : sequence of Filter
        Emission filters (:func:`probeplan.model.optics.parse_filter`, :func:`filter_grid`).
    sources : Laser, LED or sequence of them
        Candidate excitation sources; one source lights every channel of a combination.
    camera : Camera or sequence of Camera
        One camera, or several: each filter then gets the camera of :func:`camera_for_filter`.
    lens : Lens
    k : int
        Probes to multiplex.
    depth_mm : float
        Target depth below the surface (mm).
    exposure_s : float
        Exposure per channel (s); the longest allowed is best (see module notes).
    n_channels : int, optional
        Filters per combination, ``k`` by default (``k + 1`` adds a spare channel).
    irradiance_mw_per_cm2 : float or sequence, optional
        Irradiance on the skin per source (mW/cm²); None uses each source's skin MPE
        (:func:`probeplan.study.skin_limit.skin_mpe_mw_per_cm2`) for ``illumination_s``.
    illumination_s : float, optional
        How long the skin is lit in one session (s), for the MPE; None: every channel's
        exposure plus positioning, taken as at least 10 s (the long-exposure limit).
    target_size_mm, concentration_uM, uptake_ratio, autofluorescence
        As :func:`probeplan.model.channels.channel_report`.
    top : int
        Number of best combinations reported.
    prune : bool
        False evaluates every combination (for checks); the result is the same.
    max_combinations : float
        Refuse larger searches.
    progress : callable, optional
        ``progress(done, total)`` over (source, filter set) pairs.

    Returns
    -------
    DesignResult

    Raises
    ------
    InputError
        No candidates, ``k`` larger than the candidates, fewer filters than channels, a user
        irradiance above the skin MPE (refused: lower it, or ask the laser safety officer
        and pass the approved MPE-based value), bad physical values, a search too large.
    TypeError
        Wrong object types.

    Warns
    -----
    ProbeplanWarning
        Each distinct warning of the forward model (e.g. typical ε for unsized
        materials), once.

    Notes
    -----
    A probe that a source cannot excite (source at or beyond its absorption edge,
    no measured ε given) has zero response under that source; such combinations
    rank last.  Each candidate's SNR equals
    :func:`probeplan.model.channels.channel_report`'s ``unmixed_snr`` for the same probes
    and channels; condition number and noise amplification come from
    :mod:`probeplan.model.channels`.

    Examples
    --------
    >>> from probeplan.model import dots
    >>> probes = [dots.make_probe("CdTe", p) for p in (660, 700, 730)]
    >>> filters = [optics.parse_filter(f) for f in ("660/20", "700/20", "740/20", "780/40")]
    >>> res = design("soft tissue", probes, filters, sources=optics.Laser(532.0, 1.0),
    ...              camera=optics.camera("si-deep-depletion"), lens=optics.Lens(2.0, 0.1), k=2,
    ...              depth_mm=2.0, exposure_s=0.1, concentration_uM=0.1, top=2)
    >>> res.total_combinations, len(res.candidates)
    (18, 2)
    """
    from probeplan.catalog import resolve

    tissue = resolve.tissue(tissue)
    probes = list(candidate_probes)
    filters = list(candidate_filters)
    srcs = _sources_checked(sources)
    from probeplan.model.dots import Probe

    if not probes:
        raise input_error("candidate_probes", "none given", "give at least k candidate probes")
    if not filters:
        raise input_error("candidate_filters", "none given", "give candidate emission filters or a filter grid")
    for p in probes:
        if not isinstance(p, Probe):
            raise TypeError(f"candidate_probes: expected Probe objects, got {type(p).__name__}")
    for f in filters:
        if not isinstance(f, optics.Filter):
            raise TypeError(f"candidate_filters: expected Filter objects, got {type(f).__name__}")
    cams = [camera] if isinstance(camera, optics.Camera) else list(camera)
    if not cams or not all(isinstance(cm, optics.Camera) for cm in cams):
        raise TypeError("camera: expected a Camera or a sequence of Camera objects")
    if not isinstance(lens, optics.Lens):
        raise TypeError(f"lens: expected a Lens, got {type(lens).__name__}")
    k = check_count("k", k, 1, None, "multiplex at least 1 probe")
    if k > len(probes):
        raise input_error("k", f"{k} probes to multiplex but only {len(probes)} candidate probes",
                          "give more candidate probes or a smaller k")
    n_ch = k if n_channels is None else check_count("n_channels", n_channels, k, None,
                                                   f"give at least k = {k} channels (one per probe)")
    if n_ch > len(filters):
        raise input_error("candidate_filters", f"{len(filters)} candidate filters for {n_ch} channels",
                          f"give at least {n_ch} candidate filters or a smaller k")
    depth = positive_number("depth_mm", depth_mm, allow_zero=True)
    t = positive_number("exposure_s", exposure_s)
    conc = positive_number("concentration_uM", concentration_uM)
    tbr = positive_number("uptake_ratio", uptake_ratio)
    if tbr < 1:
        raise input_error("uptake_ratio", f"got {tbr:g}", "the target-to-background uptake ratio must be >= 1")
    positive_number("target_size_mm", target_size_mm)
    if illumination_s is None:
        lit = max(skin_limit.MPE_LONG_EXPOSURE_S, n_ch * t)
    else:
        lit = positive_number("illumination_s", illumination_s)
    if lit > skin_limit.MPE_MAX_EXPOSURE_S:
        raise input_error("illumination_s", f"{lit:g} s is beyond the skin table ({skin_limit.MPE_MAX_EXPOSURE_S:g} s)",
                          "split the imaging into shorter sessions")
    n_combos = len(srcs) * math.comb(len(probes), k) * math.comb(len(filters), n_ch)
    if n_combos > max_combinations:
        raise input_error("search size", f"{n_combos:.3g} combinations (limit {max_combinations:.3g})",
                          "give fewer candidate probes or filters, or a smaller k")
    mpe = np.array([float(skin_limit.skin_mpe_mw_per_cm2(float(s.centre_nm), lit)) for s in srcs])
    if irradiance_mw_per_cm2 is None:
        irr = mpe.copy()
    else:
        given = np.atleast_1d(np.asarray(irradiance_mw_per_cm2, dtype=np.float64)).ravel()
        if given.size not in (1, len(srcs)):
            raise input_error("irradiance_mw_per_cm2", f"{np.size(irradiance_mw_per_cm2)} values for {len(srcs)} sources",
                              "give one value for all sources or one per source")
        irr = np.broadcast_to(given, (len(srcs),)).copy()
        for i, s in enumerate(srcs):
            positive_number("irradiance_mw_per_cm2", irr[i])
            if irr[i] > mpe[i] * (1 + 1e-12):
                raise input_error("irradiance_mw_per_cm2",
                                  f"{irr[i]:g} mW/cm^2 at {float(s.centre_nm):g} nm is above the skin MPE "
                                  f"{mpe[i]:.4g} mW/cm^2 for {lit:g} s of light",
                                  "lower it to the MPE or below (leave it unset to use the MPE)")

    start = time.perf_counter()
    filter_cams = [cams[0] if len(cams) == 1 else camera_for_filter(f, cams) for f in filters]
    n_s, n_p, n_f = len(srcs), len(probes), len(filters)
    resp = np.zeros((n_s, n_p, n_f))
    upt = np.zeros((n_s, n_p, n_f))
    back = np.zeros((n_s, n_f))
    notes: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for si, src in enumerate(srcs):
            excited = [pi for pi, p in enumerate(probes) if _excited(p, src)]
            for pi in sorted(set(range(n_p)) - set(excited)):
                notes.append(f"{probes[pi].name} is not excited by {src.name} (absorption edge about "
                             f"{probes[pi].exciton_peak_nm:.0f} nm): zero response under that source")
            for fi, filt in enumerate(filters):
                rates = background_rates(
                    tissue, [probes[pi] for pi in excited], source=src, irradiance_mw_per_cm2=irr[si],
                    emission_filter=filt, camera=filter_cams[fi], lens=lens,
                    background_concentration_uM=[conc / tbr] * len(excited), autofluorescence=autofluorescence,
                    probe_absorption=False)  # linear in the probes, as the channel model (see its notes)
                back[si, fi] = rates["autofluorescence"] + rates["leakage"] + rates["dark"]
                upt[si, excited, fi] = rates["uptake"]
                for pi in excited:
                    resp[si, pi, fi] = probe_rate_e_per_s(
                        tissue, probes[pi], source=src, irradiance_mw_per_cm2=irr[si], emission_filter=filt,
                        camera=filter_cams[fi], lens=lens, depth_mm=[depth], target_size_mm=target_size_mm,
                        concentration_uM=1.0)[0]
    seen: set[tuple[type, str]] = set()
    for w in caught:
        key = (w.category, str(w.message))
        if key not in seen:
            seen.add(key)
            notes.append(str(w.message))
            warn_at_caller(str(w.message), w.category)
    read = np.array([cm.read_noise_per_binned_px_e for cm in filter_cams])
    precompute_s = time.perf_counter() - start

    out = exhaustive_search(resp, back, upt, read, k=k, n_channels=n_ch, exposure_s=t, concentration_uM=conc,
                            top=top, prune=prune, max_combinations=max_combinations, progress=progress)
    candidates = []
    for rank in range(out.worst_snr.size):
        s, pi, fi = int(out.source[rank]), out.probes[rank], out.filters[rank]
        m = resp[s][np.ix_(pi, fi)].T  # (C, K)
        var = (m.sum(axis=1) * conc + back[s, fi] + upt[s][np.ix_(pi, fi)].sum(axis=0)) / t + read[fi] ** 2 / t**2
        var = np.maximum(var, VAR_FLOOR)
        snr = tuple(float(v) for v in out.snr[rank])
        full_well = np.array([filter_cams[f].binned_full_well_e for f in fi])  # per binned pixel
        candidates.append(DesignCandidate(
            rank=rank + 1, source=srcs[s].name, source_nm=float(srcs[s].centre_nm),
            irradiance_mw_per_cm2=float(irr[s]), probes=tuple(probes[p].name for p in pi),
            filters=tuple(filters[f].name for f in fi), cameras=tuple(filter_cams[f].name for f in fi),
            worst_snr=float(out.worst_snr[rank]), snr=snr, limiting_probe=probes[pi[int(np.argmin(snr))]].name,
            condition_number=float(condition_number(m)),
            noise_amplification=tuple(float(v) for v in noise_amplification(m, var)),
            response_e_per_s_per_uM=m, noise_var=var,
            saturated=bool(np.any((m.sum(axis=1) * conc + back[s, fi] + upt[s][np.ix_(pi, fi)].sum(axis=0)) * t
                                  > full_well)),
        ))
    if candidates and candidates[0].saturated:
        notes.append("the best combination saturates a channel at this exposure: shorten the exposure or lower the "
                     "irradiance, then search again")
    notes.append(f"irradiance: {'skin MPE' if irradiance_mw_per_cm2 is None else 'user value'} per source for "
                 f"{lit:g} s of light on the skin (MPE written for human skin; the laser safety officer decides)")
    notes.append("autofluorescence is a parametric assumption; set it from an unlabelled control")
    return DesignResult(
        candidates=candidates, k=k, n_channels=n_ch, depth_mm=depth, exposure_s=t, concentration_uM=conc,
        sources=[{"name": s.name, "wavelength_nm": float(s.centre_nm), "irradiance_mw_per_cm2": float(irr[i]),
                  "skin_mpe_mw_per_cm2": float(mpe[i]), "illumination_s": lit} for i, s in enumerate(srcs)],
        probe_names=[p.name for p in probes], filter_names=[f.name for f in filters],
        filter_cameras=[cm.name for cm in filter_cams], response_e_per_s_per_uM=resp, background_e_per_s=back,
        uptake_e_per_s=upt, read_noise_e=read, total_combinations=out.total_combinations, evaluated=out.evaluated,
        filter_sets_total=out.filter_sets_total, filter_sets_skipped=out.filter_sets_skipped,
        filter_sets_cut=out.filter_sets_cut, precompute_s=precompute_s, search_s=out.search_s, notes=notes,
    )
