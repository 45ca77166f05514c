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


def build_tissue(setup: Setup):
    """The tissue preset, with the composition changes applied."""
    from probeplan.model.tissue import tissue_preset

    tissue = tissue_preset(setup.tissue)
    return tissue.with_composition(**dict(setup.composition)) if setup.composition else tissue


def build_probes(setup: Setup) -> list:
    """Probe objects from (material, peak, QY, extinction) values."""
    from probeplan.model import dots

    probes = []
    for material, peak, qy, eps in setup.probes:
        overrides = {}
        if qy is not None:
            overrides["quantum_yield"] = qy
        if eps is not None:
            overrides["extinction_at_excitation_per_M_cm"] = eps
        probes.append(dots.make_probe(material, peak, **overrides))
    names = [p.name for p in probes]
    if len(set(names)) != len(names):
        from probeplan.errors import input_error

        raise input_error("probes", f"two probes are the same ({names})", "give each probe its own material or peak")
    return probes


def build_channels(setup: Setup) -> list:
    """One channel per emission filter; source, camera, lens and exposure shared."""
    from probeplan.model import optics
    from probeplan.catalog.setup import make_camera, make_filter

    source = optics.Laser(setup.excitation_nm)
    lens = optics.Lens(setup.f_number, setup.magnification)
    cam = make_camera(setup.camera, setup.binning)
    return [optics.Channel(f, source, make_filter(f), cam, lens, setup.exposure_s) for f in setup.filters]


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
    """
    from probeplan.errors import input_error
    from probeplan.model.fluorescence import depth_profile

    notes: list[str] = []
    with captured_warnings(notes):
        if len(setup.filters) != len(setup.probes):
            raise input_error("filters", f"{len(setup.filters)} filters for {len(setup.probes)} probes",
                              "give one emission filter per probe")
        tissue = build_tissue(setup)
        if layers:
            from probeplan.model.layers import Layer, LayeredTissue
            from probeplan.model.tissue import tissue_preset

            tissue = LayeredTissue(tuple(Layer(tissue_preset(name), mm) for name, mm in layers), tissue)
        probes = build_probes(setup)
        channels = build_channels(setup)
        depths = depth_grid_mm(depth_max_mm, depth_step_mm, setup.target_depth_mm)
        profiles = [
            depth_profile(
                tissue, probe, source=ch.source, irradiance_mw_per_cm2=setup.irradiance_mw_per_cm2,
                emission_filter=ch.emission_filter, camera=ch.camera, lens=ch.lens, exposure_s=setup.exposure_s,
                depth_mm=depths, target_size_mm=setup.target_size_mm, concentration_uM=setup.concentration_uM,
                uptake_ratio=setup.uptake_ratio, autofluorescence=autofluorescence(setup),
            )
            for probe, ch in zip(probes, channels, strict=True)
        ]
    for p in profiles:
        for n in p.notes:
            if n not in notes:
                notes.append(n)
    return profiles, notes


@st.cache_data(max_entries=64, show_spinner=False)
def depth_png(setup: Setup, depth_max_mm: float, depth_step_mm: float, sbr_threshold: float,
              layers: tuple = ()) -> bytes:
    """SBR, SNR and blur against depth (probeplan.report.figures.depth_figure) as PNG bytes."""
    from probeplan.report.figures import depth_figure
    from probeplan.report.document import figure_png_bytes

    profiles, _ = depth_profiles(setup, depth_max_mm, depth_step_mm, layers)
    fig = depth_figure(profiles, sbr_threshold=sbr_threshold, target_depth_mm=setup.target_depth_mm)
    return figure_png_bytes(fig, dpi=FIGURE_DPI)


@st.cache_data(max_entries=64, show_spinner=False)
def channel_results(setup: Setup):
    """The channel report at the target depth and the notes."""
    from probeplan.model.channels import channel_report

    notes: list[str] = []
    with captured_warnings(notes):
        tissue = build_tissue(setup)
        probes = build_probes(setup)
        channels = build_channels(setup)
        rep = channel_report(
            tissue, probes, channels, irradiance_mw_per_cm2=setup.irradiance_mw_per_cm2,
            depth_mm=[setup.target_depth_mm], target_size_mm=setup.target_size_mm,
            concentration_uM=setup.concentration_uM, uptake_ratio=setup.uptake_ratio,
            autofluorescence=autofluorescence(setup),
        )
    notes += [n for n in rep.notes if n not in notes]
    return rep, notes


@st.cache_data(max_entries=64, show_spinner=False)
def channels_png(setup: Setup) -> bytes:
    """Emission spectra with filter bands and the crosstalk map (probeplan.report.figures.channels_figure)."""
    from probeplan.model.fluorescence import emission_grid_nm
    from probeplan.report.figures import channels_figure
    from probeplan.report.document import figure_png_bytes

    rep, _ = channel_results(setup)
    notes: list[str] = []
    with captured_warnings(notes):
        probes = build_probes(setup)
        channels = build_channels(setup)
        fig = channels_figure(emission_grid_nm(probes), probes, channels, rep.crosstalk[0], rep.probe_names,
                              rep.channel_names, depth_mm=float(rep.depth_mm[0]))
    return figure_png_bytes(fig, dpi=FIGURE_DPI)


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
    from probeplan.catalog import library
    from probeplan.model import optics

    return [r["name"] for r in optics.list_cameras()] + list(library.user_camera_names())
