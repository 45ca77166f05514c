"""probeplan: plan and analyse multiplexed in vivo fluorescence imaging with nanocrystal probes.

For research use only. It never replaces the institution's animal care committee,
laser safety officer, radiation/chemical safety office, or local regulations.
"""

from probeplan.errors import InputError, ModelValidityWarning, ProbeplanWarning

__all__ = ["InputError", "ProbeplanWarning", "ModelValidityWarning", "__version__", "RESEARCH_USE_CAUTION", "run_study",
           "sphere_reduced_scattering_per_cm", "phantom_recipe", "calibrate_phantom", "apply_calibration",
           "closure", "depth_from_spectrum"]

__version__ = "0.1.0"

#: Shown by every command, report and page.
RESEARCH_USE_CAUTION = (
    "For research use only. probeplan's figures are planning estimates; the institution's animal care "
    "committee, laser safety officer, chemical/radiation safety office and local regulations decide."
)

#: Top-level names imported on first use (keeps ``import probeplan`` light).
_LAZY = {
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
