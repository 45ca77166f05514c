"""Shared command-line options for the model commands (depth, channels, design) and their parsing.

Probes are written ``MATERIAL:PEAK`` (e.g. ``CdTe:700``), optionally
``MATERIAL:PEAK:QY``, or ``MATERIAL:PEAK@FILE.csv`` to take the emission
spectrum from the first column of a spectra CSV.  Filters are trade notation
(``700/30``, ``LP 1000``) or the name of a filter in the user library.
"""

from __future__ import annotations

import argparse
from typing import Any

from probeplan.errors import input_error
from probeplan.model.fluorescence import DEFAULT_CONCENTRATION_UM

__all__ = ["add_model_options", "add_optics_options", "add_target_options", "probes_from_args", "parse_probe",
           "make_filter", "make_camera", "make_source", "make_lens", "tissue_from_args", "channels_from_args"]


def add_model_options(parser: argparse.ArgumentParser, *, probes_required: bool = True) -> None:
    """Add the options shared by depth, channels and design."""
    g = parser.add_argument_group("tissue and probes")
    g.add_argument("--tissue", default="soft tissue", help="tissue preset or user tissue (default: 'soft tissue')")
    g.add_argument("--probe", action="append", required=probes_required, metavar="MATERIAL:PEAK",
                   help="a probe, e.g. CdTe:700 or InAs:880:0.2 (QY) or CdTeSe:780@emission.csv; repeat per probe")
    g.add_argument("--extinction", action="append", type=float, metavar="PER_M_CM",
                   help="measured extinction at the excitation wavelength (M^-1 cm^-1), one per --probe, in order")
    g = parser.add_argument_group("excitation")
    g.add_argument("--excitation-nm", type=float, default=640.0, help="laser wavelength in nm (default 640)")
    g.add_argument("--linewidth-nm", type=float, default=1.0, help="laser linewidth FWHM in nm (default 1)")
    g.add_argument("--led-fwhm-nm", type=float, help="use an LED of this FWHM (nm) centred on --excitation-nm")
    g.add_argument("--irradiance", type=float, default=10.0, metavar="MW_PER_CM2",
                   help="excitation irradiance on the skin in mW/cm^2 (default 10)")
    g = parser.add_argument_group("detection")
    g.add_argument("--filter", action="append", metavar="FILTER",
                   help="emission filter, e.g. 700/30 or 'LP 1000'; repeat, one per channel")
    g.add_argument("--camera", default="si-deep-depletion", help="camera name (default si-deep-depletion)")
    add_optics_options(g)
    add_target_options(parser.add_argument_group("target"))


def add_optics_options(group) -> None:
    """Binning, lens and exposure options (shared by depth, channels and design)."""
    group.add_argument("--binning", type=int, default=1, help="pixels binned per side (default 1)")
    group.add_argument("--f-number", type=float, default=2.0, help="lens f-number (default 2)")
    group.add_argument("--magnification", type=float, default=0.1, help="lens magnification (default 0.1)")
    group.add_argument("--exposure-s", type=float, default=0.05, help="exposure per channel in s (default 0.05)")


def add_target_options(group) -> None:
    """Target inclusion, uptake and autofluorescence options (shared by depth, channels and design)."""
    group.add_argument("--size-mm", type=float, default=2.0, help="target inclusion diameter in mm (default 2)")
    group.add_argument("--concentration-uM", type=float, default=DEFAULT_CONCENTRATION_UM,
                       help=f"probe concentration in the target, µM (default {DEFAULT_CONCENTRATION_UM:g})")
    group.add_argument("--uptake-ratio", type=float, default=5.0, help="target-to-background uptake ratio (default 5)")
    group.add_argument("--af-yield", type=float, default=None,
                       help="autofluorescence yield (cm^-1 at 650 nm excitation; an assumption; 0 switches it off)")


def parse_probe(spec: str, extinction: float | None = None):
    """A probe from ``MATERIAL:PEAK[:QY][@FILE.csv]``."""
    from probeplan.model import dots
    from probeplan.model.spectra import read_spectra_csv

    text, _, csv_path = spec.partition("@")
    parts = text.split(":")
    if len(parts) not in (2, 3):
        raise input_error("--probe", f"cannot read {spec!r}", "write MATERIAL:PEAK such as CdTe:700 (QY optional: CdTe:700:0.4)")
    try:
        peak = float(parts[1])
        qy = float(parts[2]) if len(parts) == 3 else None
    except ValueError:
        raise input_error("--probe", f"{spec!r}: peak and QY must be numbers", "write e.g. CdTe:700:0.4") from None
    overrides: dict[str, Any] = {}
    if qy is not None:
        overrides["quantum_yield"] = qy
    if extinction is not None:
        overrides["extinction_at_excitation_per_M_cm"] = extinction
    if csv_path:
        spectra = read_spectra_csv(csv_path, kind="emission")
        overrides["emission"] = next(iter(spectra.values()))
    return dots.make_probe(parts[0], peak, **overrides)


def probes_from_args(args: argparse.Namespace) -> list:
    """The --probe list as Probe objects."""
    specs = args.probe or []
    ext = args.extinction or []
    if ext and len(ext) != len(specs):
        raise input_error("--extinction", f"{len(ext)} values for {len(specs)} probes", "give one per --probe, in order")
    return [parse_probe(s, ext[i] if ext else None) for i, s in enumerate(specs)]


def make_filter(text: str):
    """A filter from trade notation or a user-library filter name."""
    from probeplan.catalog import library
    from probeplan.model import optics

    user = library.user_filters()
    if text in user:
        return user[text]
    return optics.parse_filter(text)


def make_camera(name: str, binning: int = 1):
    """A built-in or user-library camera with the binning set."""
    from probeplan.catalog import library
    from probeplan.model import optics

    if name in library.user_camera_names():
        cam = library.user_camera(name)
    else:
        cam = optics.camera(name)
    if isinstance(binning, bool) or not isinstance(binning, int) or binning < 1:
        raise input_error("--binning", f"got {binning!r}", "give a whole number >= 1")
    return cam.with_binning(binning)


def make_source(args: argparse.Namespace):
    """The excitation source from the options."""
    from probeplan.model import optics

    if args.led_fwhm_nm is not None:
        return optics.LED(args.excitation_nm, args.led_fwhm_nm)
    return optics.Laser(args.excitation_nm, args.linewidth_nm)


def make_lens(args: argparse.Namespace):
    """The lens from the options."""
    from probeplan.model import optics

    return optics.Lens(args.f_number, args.magnification)


def tissue_from_args(args: argparse.Namespace):
    """The tissue (preset or user) named by --tissue."""
    from probeplan.model.tissue import tissue_preset

    return tissue_preset(args.tissue)


def channels_from_args(args: argparse.Namespace, n_default: int) -> list:
    """One channel per --filter (source, camera, lens and exposure shared)."""
    from probeplan.model import optics

    filters = args.filter or []
    if not filters:
        raise input_error("--filter", "no emission filter given", f"give --filter once per channel (at least {n_default})")
    source, lens = make_source(args), make_lens(args)
    cam = make_camera(args.camera, args.binning)
    return [optics.Channel(f, source, make_filter(f), cam, lens, args.exposure_s) for f in filters]
