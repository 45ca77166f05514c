"""The model side of the page: the shared imaging set-up, and the cached library runs behind
the depth and channels views.

The set-up is gathered into :class:`Setup`, a tuple of plain values, so that
``st.cache_data`` keys on it; the library objects (tissue, probes, channels) are
built from it inside the cached functions.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
import streamlit as st
from app.page_common import FIGURE_DPI, ProbeSpec, captured_warnings

__all__ = [
    "Setup",
    "build",
    "build_tissue",
    "build_probes",
    "build_channels",
    "autofluorescence",
    "depth_grid_mm",
    "depth_profiles",
    "depth_png",
    "channel_results",
    "channels_png",
    "skin_mpe",
    "skin_exposure",
    "material_ranges",
    "camera_names",
]


class Setup(NamedTuple):
    """Everything the depth and channels views need, as plain values (units in the names)."""

    tissue: str
    composition: tuple[tuple[str, float], ...]
    probes: tuple[ProbeSpec, ...]
    filters: tuple[str, ...]
    excitation_nm: float
    irradiance_mw_per_cm2: float
    camera: str
    binning: int
    f_number: float
    magnification: float
    exposure_s: float
    target_depth_mm: float
    target_size_mm: float
    concentration_uM: float
    uptake_ratio: float
    autofluorescence_yield_per_cm: float | None


def build(setup: Setup, layers: tuple = ()):
    """The set-up's objects, by the catalog's one builder (as the command line and the plan build theirs).

    ``layers``: ((tissue name, thickness mm), ...) from the surface down over the set-up's tissue.
    """
    from probeplan.catalog.setup import build_setup
    from probeplan.errors import input_error

    names = [(m, float(peak)) for m, peak, _, _ in setup.probes]
    if len(set(names)) != len(names):
        raise input_error("probes", f"two probes are the same ({names})", "give each probe its own material or peak")
    return build_setup(
        tissue=setup.tissue, composition=dict(setup.composition) or None,
        probes=[{"material": m, "emission_peak_nm": peak, "quantum_yield": qy, "extinction_at_excitation_per_M_cm": e}
                for m, peak, qy, e in setup.probes],
        filters=list(setup.filters), excitation_nm=setup.excitation_nm,
        irradiance_mw_per_cm2=setup.irradiance_mw_per_cm2, camera=setup.camera, binning=setup.binning,
        f_number=setup.f_number, magnification=setup.magnification, exposure_s=setup.exposure_s,
        autofluorescence_yield_per_cm=setup.autofluorescence_yield_per_cm, layers=layers,
    )


def build_tissue(setup: Setup):
    """The tissue (preset or user tissue), with the composition changes applied."""
    from probeplan.catalog import resolve

    tissue = resolve.tissue(setup.tissue)
    return tissue.with_composition(**dict(setup.composition)) if setup.composition else tissue


def build_probes(setup: Setup) -> list:
    """Probe objects from (material, peak, QY, extinction) values."""
    return build(setup).probes


def build_channels(setup: Setup) -> list:
    """One channel per emission filter; source, camera, lens and exposure shared."""
    return build(setup).channels


def autofluorescence(setup: Setup):
    """The autofluorescence assumption of the set-up (None: the library default)."""
    from probeplan.model.fluorescence import Autofluorescence

    y = setup.autofluorescence_yield_per_cm
    return None if y is None else Autofluorescence(yield_per_cm=y)


def depth_grid_mm(depth_max_mm: float, depth_step_mm: float, target_depth_mm: float) -> np.ndarray:
    """Depths shown on the plots, with the target depth itself included (mm)."""
    from probeplan.errors import input_error

    if not (depth_max_mm > 0 and 0 < depth_step_mm <= depth_max_mm):
        raise input_error("depth range", f"deepest {depth_max_mm:g} mm, step {depth_step_mm:g} mm",
                          "give a positive deepest depth and a smaller positive step")
    grid = np.arange(0.0, depth_max_mm + depth_step_mm / 2, depth_step_mm)
    return np.union1d(grid, [target_depth_mm])


@st.cache_data(max_entries=64, show_spinner=False)
def depth_profiles(setup: Setup, depth_max_mm: float, depth_step_mm: float, layers: tuple = ()):
    """One :class:`~probeplan.model.fluorescence.DepthProfile` per probe (its own filter) and the notes.

    ``layers``: ((tissue name, thickness mm), ...) from the surface down over the set-up's tissue.
    Each probe's profile is cached on its own (:func:`_probe_depth_profile`): moving one probe's
    control recomputes only that probe.
    """
    from probeplan.errors import input_error

    if len(setup.filters) != len(setup.probes):
        raise input_error("filters", f"{len(setup.filters)} filters for {len(setup.probes)} probes",
                          "give one emission filter per probe")
    names = [(m, float(peak)) for m, peak, _, _ in setup.probes]
    if len(set(names)) != len(names):
        raise input_error("probes", f"two probes are the same ({names})", "give each probe its own material or peak")
    notes: list[str] = []
    profiles = []
    for probe, filt in zip(setup.probes, setup.filters, strict=True):
        profile, probe_notes = _probe_depth_profile(setup._replace(probes=(probe,), filters=(filt,)), depth_max_mm,
                                                    depth_step_mm, layers)
        profiles.append(profile)
        notes += [n for n in probe_notes if n not in notes]
    return profiles, notes


@st.cache_data(max_entries=256, show_spinner=False)
def _probe_depth_profile(setup: Setup, depth_max_mm: float, depth_step_mm: float, layers: tuple = ()):
    """The depth profile of a set-up holding one probe and its filter, and the notes (warnings first)."""
    from probeplan.model.fluorescence import depth_profile

    notes: list[str] = []
    with captured_warnings(notes):
        built = build(setup, layers)
        depths = depth_grid_mm(depth_max_mm, depth_step_mm, setup.target_depth_mm)
        ch = built.channels[0]
        profile = depth_profile(
            built.tissue, built.probes[0], source=ch.source, irradiance_mw_per_cm2=built.irradiance_mw_per_cm2,
            emission_filter=ch.emission_filter, camera=ch.camera, lens=ch.lens, exposure_s=ch.exposure_s,
            depth_mm=depths, target_size_mm=setup.target_size_mm, concentration_uM=setup.concentration_uM,
            uptake_ratio=setup.uptake_ratio, autofluorescence=built.autofluorescence,
        )
    notes += [n for n in profile.notes if n not in notes]
    return profile, notes


@st.cache_data(max_entries=64, show_spinner=False)
def depth_png(setup: Setup, depth_max_mm: float, depth_step_mm: float, sbr_threshold: float,
              layers: tuple = ()) -> bytes:
    """SBR, SNR and blur against depth (probeplan.report.figures.depth_figure) as PNG bytes."""
    from probeplan.report.document import figure_png_bytes
    from probeplan.report.figures import depth_figure

    profiles, _ = depth_profiles(setup, depth_max_mm, depth_step_mm, layers)
    # fixed margins, drawn once: the figure is redrawn whenever a control moves
    fig = depth_figure(profiles, sbr_threshold=sbr_threshold, target_depth_mm=setup.target_depth_mm, quick=True)
    return figure_png_bytes(fig, dpi=FIGURE_DPI, tight=False, compress_level=1)


@st.cache_data(max_entries=64, show_spinner=False)
def channel_results(setup: Setup):
    """The channel report at the target depth and the notes."""
    from probeplan.model.channels import channel_report

    notes: list[str] = []
    with captured_warnings(notes):
        built = build(setup)
        rep = channel_report(
            built.tissue, built.probes, built.channels, irradiance_mw_per_cm2=built.irradiance_mw_per_cm2,
            depth_mm=[setup.target_depth_mm], target_size_mm=setup.target_size_mm,
            concentration_uM=setup.concentration_uM, uptake_ratio=setup.uptake_ratio,
            autofluorescence=built.autofluorescence,
        )
    notes += [n for n in rep.notes if n not in notes]
    return rep, notes


@st.cache_data(max_entries=64, show_spinner=False)
def channels_png(setup: Setup) -> bytes:
    """Emission spectra with filter bands and the crosstalk map (probeplan.report.figures.channels_figure)."""
    from probeplan.model.fluorescence import emission_grid_nm
    from probeplan.report.document import figure_png_bytes
    from probeplan.report.figures import channels_figure

    rep, _ = channel_results(setup)
    notes: list[str] = []
    with captured_warnings(notes):
        probes = build_probes(setup)
        channels = build_channels(setup)
        fig = channels_figure(emission_grid_nm(probes), probes, channels, rep.crosstalk[0], rep.probe_names,
                              rep.channel_names, depth_mm=float(rep.depth_mm[0]), quick=True)
    return figure_png_bytes(fig, dpi=FIGURE_DPI, tight=False, compress_level=1)  # fixed margins, drawn once


@st.cache_data(max_entries=64, show_spinner=False)
def skin_exposure(setup: Setup):
    """The skin check of one session of the set-up, by the library's one rule, and any note it gave.

    :func:`probeplan.study.safety.setup_skin_exposure`: every channel's exposure once, the source
    on only while the camera exposes, all on one skin site (as the command line and the plan).
    """
    from probeplan.study import safety

    notes: list[str] = []
    with captured_warnings(notes):
        check = safety.setup_skin_exposure(build(setup))
    return {"share_of_mpe": check.ratio, "skin_mpe_mw_per_cm2": check.mpe_mw_per_cm2,
            "on_time_s": check.total_on_time_s, "governing_rule": check.governing_rule,
            "allowed_fraction": check.allowed_fraction}, notes


@st.cache_data(max_entries=256, show_spinner=False)
def skin_mpe(excitation_nm: float, illumination_s: float):
    """Skin maximum permissible exposure (mW/cm²) and any note the library gave."""
    from probeplan.study import safety

    notes: list[str] = []
    with captured_warnings(notes):
        mpe = float(safety.skin_mpe_mw_per_cm2(excitation_nm, illumination_s))
    return mpe, notes


@st.cache_data(show_spinner=False)
def material_ranges() -> dict[str, tuple[float, float]]:
    """Emission range (nm) of every dot material in the library."""
    from probeplan.model import dots

    return {r["name"]: tuple(r["emission_range_nm"]) for r in dots.list_materials()}


def camera_names() -> list[str]:
    """Built-in cameras and those in the user library folder."""
    from probeplan.catalog import resolve

    return resolve.camera_names()
