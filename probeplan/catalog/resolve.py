"""Names to objects: a tissue, probe, filter, camera or source from the words a user writes.

Every surface (the top-level functions, the command line, the plan evaluation,
the page) resolves names here and hands objects to the model.  Each resolver
accepts the object itself too, so callers may mix names and objects.

Written forms
-------------
* tissue: a shipped preset (``"soft tissue"``) or a user tissue in the library
  folder (``tissues/NAME.toml``);
* probe: ``MATERIAL:PEAK`` (``CdTe:700``), ``MATERIAL:PEAK:QY``
  (``InAs:880:0.2``) or ``MATERIAL:PEAK@FILE.csv`` (emission spectrum from the
  first column of a spectra CSV);
* filter: trade notation (``700/30``, ``LP 1000``, ``SP 750``, optionally
  ``OD6``) or the name of a filter in the user library (``filters/*.csv``);
* camera: a built-in generic camera or ``cameras/NAME.toml`` in the user library;
* source: a laser (centre and linewidth) or an LED (centre and FWHM).

Errors name the parameter (``probe``, ``filter``, ``camera``, ...), never a
command-line flag: the command line translates.
"""

from __future__ import annotations

from typing import Any

from probeplan.errors import input_error
from probeplan.model import dots, optics
from probeplan.model.spectra import read_spectra_csv
from probeplan.model.tissue import Tissue, preset_names, tissue_preset

__all__ = [
    "tissue",
    "tissue_names",
    "probe",
    "emission_filter",
    "camera",
    "camera_names",
    "source",
    "lens",
    "material",
]


def tissue_names() -> list[str]:
    """Shipped tissue presets, then the user's own tissues."""
    from probeplan.catalog import library

    return [*preset_names(), *library.user_tissue_names()]


def tissue(name: str | Tissue) -> Tissue:
    """A tissue by name (shipped preset first, then the user library folder), or the Tissue itself.

    Raises
    ------
    InputError
        Unknown name, with the closest valid one among presets and user tissues.
    TypeError
        Neither a name nor a Tissue.

    Examples
    --------
    >>> tissue("skin").a_per_cm
    46.0
    """
    from probeplan.catalog import library
    from probeplan.errors import did_you_mean

    if isinstance(name, Tissue):
        return name
    if not isinstance(name, str):
        raise TypeError(f"tissue: expected a name or a Tissue, got {type(name).__name__}")
    if name in preset_names():
        preset = tissue_preset(name)
        if preset.fat_fraction > 0:  # a user's fat spectrum (library spectra/absorption, column 'fat') replaces ours
            fat = library.user_spectra("absorption").get("fat")
            if fat is not None:
                preset = preset.with_composition(fat_absorption=fat)
        return preset
    user = library.user_tissue_names()
    if name in user:
        return library.user_tissue(name)
    raise input_error("tissue", f"unknown tissue {name!r}", did_you_mean(name, [*preset_names(), *user]))


def material(name: str) -> str:
    """The canonical name of a dot material (case is forgiven), or an error with the closest one."""
    dots.material_properties(name)
    return dots._canonical(name)


def probe(spec: Any, *, extinction_per_M_cm: float | None = None, **overrides: Any):
    """A probe from ``MATERIAL:PEAK[:QY][@FILE.csv]``, or the Probe itself.

    Parameters
    ----------
    spec : str or Probe
        The written form (see the module notes).
    extinction_per_M_cm : float, optional
        Measured extinction at the excitation wavelength (M⁻¹ cm⁻¹).
    **overrides
        Further :func:`probeplan.model.dots.make_probe` settings (``name``, ``fwhm_nm``, ...).

    Examples
    --------
    >>> probe("CdTe:700:0.4").quantum_yield
    0.4
    """
    if isinstance(spec, dots.Probe):
        return spec
    if not isinstance(spec, str):
        raise TypeError(f"probe: expected text such as 'CdTe:700' or a Probe, got {type(spec).__name__}")
    text, _, csv_path = spec.partition("@")
    parts = text.split(":")
    if len(parts) not in (2, 3):
        raise input_error("probe", f"cannot read {spec!r}",
                          "write MATERIAL:PEAK such as CdTe:700 (QY optional: CdTe:700:0.4)")
    try:
        peak = float(parts[1])
        qy = float(parts[2]) if len(parts) == 3 else None
    except ValueError:
        raise input_error("probe", f"{spec!r}: peak and QY must be numbers", "write e.g. CdTe:700:0.4") from None
    settings = dict(overrides)
    if qy is not None:
        settings["quantum_yield"] = qy
    if extinction_per_M_cm is not None:
        settings["extinction_at_excitation_per_M_cm"] = extinction_per_M_cm
    if csv_path:
        spectra = read_spectra_csv(csv_path, kind="emission")
        settings["emission"] = next(iter(spectra.values()))
    return dots.make_probe(parts[0], peak, **settings)


def emission_filter(text: Any):
    """A filter from trade notation or a user-library filter name, or the Filter itself.

    Examples
    --------
    >>> type(emission_filter("700/30")).__name__
    'Bandpass'
    """
    from probeplan.catalog import library

    if isinstance(text, optics.Filter):
        return text
    if not isinstance(text, str):
        raise TypeError(f"filter: expected text such as '700/30' or a Filter, got {type(text).__name__}")
    user = library.user_filters()
    if text in user:
        return user[text]
    return optics.parse_filter(text)


def camera_names() -> list[str]:
    """Built-in cameras, then those in the user library folder."""
    from probeplan.catalog import library

    return [str(r["name"]) for r in optics.list_cameras()] + list(library.user_camera_names())


def camera(name: Any, binning: int = 1):
    """A built-in or user-library camera (or a Camera) with ``binning`` pixels per side.

    Examples
    --------
    >>> camera("si-back", 2).binning
    2
    """
    from probeplan.catalog import library

    if isinstance(binning, bool) or not isinstance(binning, int) or binning < 1:
        raise input_error("binning", f"got {binning!r}", "give a whole number >= 1")
    if isinstance(name, optics.Camera):
        return name.with_binning(binning)
    if not isinstance(name, str):
        raise TypeError(f"camera: expected a camera name or a Camera, got {type(name).__name__}")
    cam = library.user_camera(name) if name in library.user_camera_names() else optics.camera(name)
    return cam.with_binning(binning)


def source(excitation_nm: float, *, linewidth_nm: float | None = None, led_fwhm_nm: float | None = None):
    """A laser at ``excitation_nm`` (linewidth FWHM, typical 1 nm when None), or an LED of ``led_fwhm_nm``."""
    if led_fwhm_nm is not None:
        return optics.LED(excitation_nm, led_fwhm_nm)
    return optics.Laser(excitation_nm, optics.TYPICAL_LASER_LINEWIDTH_NM if linewidth_nm is None else linewidth_nm)


def lens(f_number: float, magnification: float):
    """The collection lens."""
    return optics.Lens(f_number, magnification)
