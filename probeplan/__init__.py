"""probeplan: plan and analyse multiplexed in vivo fluorescence imaging with nanocrystal probes.

For research use only. It never replaces the institution's animal care committee,
laser safety officer, radiation/chemical safety office, or local regulations.
"""

from probeplan.errors import InputError, ModelValidityWarning, ProbeplanWarning

__all__ = ["InputError", "ProbeplanWarning", "ModelValidityWarning", "__version__", "RESEARCH_USE_CAUTION", "run_study",
           "sphere_reduced_scattering_per_cm", "phantom_recipe", "calibrate_phantom", "apply_calibration",
           "closure", "depth_from_spectrum",
           "optical_properties", "molar_extinction", "absorption", "mu_eff", "diffuse_reflectance",
           "point_source_escape", "point_source_exitance_per_mm2", "point_source_blur_fwhm_mm", "broad_beam_fluence",
           "diameter_nm", "exciton_peak_nm", "extinction_coefficient", "concentration_uM", "skin_mpe_mw_per_cm2",
           "max_injection_volume_ml", "unmix"]

__version__ = "0.1.0"

#: Shown by every command, report and page.
RESEARCH_USE_CAUTION = (
    "For research use only. probeplan's figures are planning estimates; the institution's animal care "
    "committee, laser safety officer, chemical/radiation safety office and local regulations decide."
)

#: Top-level names imported on first use (keeps ``import probeplan`` light).
_LAZY = {
    # the stable interface: tissue optics, light transport, dots, safety, unmixing
    **dict.fromkeys(("optical_properties", "molar_extinction", "absorption"), "probeplan.model.tissue"),
    **dict.fromkeys(("mu_eff", "diffuse_reflectance", "point_source_escape", "point_source_exitance_per_mm2",
                     "point_source_blur_fwhm_mm", "broad_beam_fluence"), "probeplan.model.transport"),
    **dict.fromkeys(("diameter_nm", "exciton_peak_nm", "extinction_coefficient", "concentration_uM"),
                    "probeplan.model.dots"),
    **dict.fromkeys(("skin_mpe_mw_per_cm2", "max_injection_volume_ml"), "probeplan.study.safety"),
    "unmix": "probeplan.unmixing.pipeline",
    "run_study": "probeplan.study.runs",
    "sphere_reduced_scattering_per_cm": "probeplan.model.mie",
    "phantom_recipe": "probeplan.model.phantom",
    "calibrate_phantom": "probeplan.study.calibration",
    "apply_calibration": "probeplan.study.calibration",
    "closure": "probeplan.study.closure",
    "depth_from_spectrum": "probeplan.study.depth_spectrum",
}


def __getattr__(name: str):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'probeplan' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(__all__))
