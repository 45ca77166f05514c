"""Command-line options shared by the model commands (depth, channels, design), and the set-up they describe.

Probes are written ``MATERIAL:PEAK`` (e.g. ``CdTe:700``), optionally
``MATERIAL:PEAK:QY``, or ``MATERIAL:PEAK@FILE.csv`` to take the emission
spectrum from the first column of a spectra CSV.  Filters are trade notation
(``700/30``, ``LP 1000``) or the name of a filter in the user library.  The
set-up itself is built by :func:`probeplan.catalog.setup.build_setup`, as the
plan evaluation and the page build theirs.
"""

from __future__ import annotations

import argparse

from probeplan.model.defaults import DEFAULT_CONCENTRATION_UM

__all__ = ["add_model_options", "add_optics_options", "add_target_options", "setup_from_args", "FLAGS"]

#: Parameter or set-up key → the flag that sets it (errors are reported with the flag).
FLAGS = {
    "tissue": "--tissue",
    "composition": "--tissue",
    "probes": "--probe",
    "probe": "--probe",
    "extinction_per_M_cm": "--extinction",
    "excitation_nm": "--excitation-nm",
    "linewidth_nm": "--linewidth-nm",
    "led_fwhm_nm": "--led-fwhm-nm",
    "irradiance_mw_per_cm2": "--irradiance",
    "filters": "--filter",
    "filter": "--filter",
    "camera": "--camera",
    "binning": "--binning",
    "f_number": "--f-number",
    "magnification": "--magnification",
    "exposure_s": "--exposure-s",
    "autofluorescence_yield_per_cm": "--af-yield",
    "target_size_mm": "--size-mm",
    "concentration_uM": "--concentration-uM",
    "uptake_ratio": "--uptake-ratio",
    "illumination_s": "--illumination-s",
    "roi": "--roi",
    "rois": "--roi",
    "out": "--out",
    "out_dir": "--out",
    "scheduler": "--scheduler",
    "auto_rois": "--auto-roi",
    "roi_file": "--rois",
    "dark_path": "--dark",
    "flat_path": "--flat",
    "labels_path": "--roi",
    "overwrite": "--overwrite",
    "channel_axis": "--channel-axis",
    "gain_e_per_count": "--gain",
    "read_noise_e": "--read-noise",
    "min_snr": "--min-snr",
}


def add_model_options(parser: argparse.ArgumentParser, *, probes_required: bool = True) -> None:
    """Add the options shared by depth and channels."""
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


def setup_from_args(args: argparse.Namespace, filters: list[str] | None = None):
    """The imaging set-up the options describe (one channel per ``--filter``, or per ``filters`` given)."""
    from probeplan.catalog.setup import build_setup
    from probeplan.errors import input_error

    filters = list(args.filter or []) if filters is None else filters
    if not filters:
        raise input_error("filters", "no emission filter given", "give one emission filter per channel, e.g. 700/30")
    return build_setup(
        tissue=args.tissue, probes=list(args.probe or []), extinction_per_M_cm=args.extinction or None,
        filters=filters, excitation_nm=args.excitation_nm, linewidth_nm=args.linewidth_nm,
        led_fwhm_nm=args.led_fwhm_nm, irradiance_mw_per_cm2=args.irradiance, camera=args.camera,
        binning=args.binning, f_number=args.f_number, magnification=args.magnification, exposure_s=args.exposure_s,
        autofluorescence_yield_per_cm=args.af_yield,
    )
