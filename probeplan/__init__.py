"""probeplan: plan and analyse multiplexed in vivo fluorescence imaging with nanocrystal probes.

For research use only. It never replaces the institution's animal care committee,
laser safety officer, radiation/chemical safety office, or local regulations.

The entry points a notebook needs are here, imported on first use (``import probeplan``
stays light).  Where a function takes a tissue, a probe, a filter or a camera, a name
works as well as the object: the catalog resolves it.

>>> import probeplan
>>> mu_a, mu_sp = probeplan.optical_properties("skin", 800.0)
>>> round(float(mu_sp), 2)
23.59
"""

from __future__ import annotations

import importlib
from typing import Any

from probeplan.errors import AssumptionWarning, InputError, ModelValidityWarning, ProbeplanWarning

__version__ = "0.1.0"

#: Shown by every command, report and page.
RESEARCH_USE_CAUTION = (
    "For research use only. probeplan's figures are planning estimates; the institution's animal care "
    "committee, laser safety officer, chemical/radiation safety office and local regulations decide."
)

#: Public name → module that defines it (imported when the name is first used).
_LAZY = {
    # tissue optics (names resolved by the catalog)
    "optical_properties": "probeplan.catalog.api",
    "molar_extinction": "probeplan.model.tissue",
    "absorption": "probeplan.model.tissue",
    "Tissue": "probeplan.model.tissue",
    # light transport
    "mu_eff": "probeplan.model.transport",
    "diffuse_reflectance": "probeplan.model.transport",
    "point_source_escape": "probeplan.model.transport",
    "point_source_exitance_per_mm2": "probeplan.model.transport",
    "point_source_blur_fwhm_mm": "probeplan.model.transport",
    "broad_beam_fluence": "probeplan.model.transport",
    # dots
    "diameter_nm": "probeplan.model.dots",
    "exciton_peak_nm": "probeplan.model.dots",
    "extinction_coefficient": "probeplan.model.dots",
    "concentration_uM": "probeplan.model.dots",
    "make_probe": "probeplan.model.dots",
    "Probe": "probeplan.model.dots",
    # optics
    "parse_filter": "probeplan.model.optics",
    "Laser": "probeplan.model.optics",
    "LED": "probeplan.model.optics",
    "Lens": "probeplan.model.optics",
    "Channel": "probeplan.model.optics",
    # the forward model and the channel model
    "depth_profile": "probeplan.catalog.api",
    "depth_at_threshold": "probeplan.model.fluorescence",
    "Autofluorescence": "probeplan.model.fluorescence",
    "channel_report": "probeplan.catalog.api",
    # the catalog: names to objects, one set-up builder
    "tissue": "probeplan.catalog.resolve",
    "probe": "probeplan.catalog.resolve",
    "emission_filter": "probeplan.catalog.resolve",
    "camera": "probeplan.catalog.resolve",
    "build_setup": "probeplan.catalog.setup",
    # design
    "design": "probeplan.design.search",
    # safety, plans, rules, animals
    "skin_mpe_mw_per_cm2": "probeplan.model.skin_limit",
    "max_injection_volume_ml": "probeplan.study.safety",
    "setup_skin_exposure": "probeplan.study.safety",
    "load_plan": "probeplan.study.plan",
    "evaluate_plan": "probeplan.study.evaluate",
    "load_rules": "probeplan.study.rules",
    "default_rules": "probeplan.study.rules",
    "animals_per_group": "probeplan.study.animals",
    # unmixing and images
    "unmix": "probeplan.unmixing.pipeline",
    "unmix_file": "probeplan.unmixing.pipeline",
    "read_references_csv": "probeplan.unmixing.references",
    "reference_spectra": "probeplan.unmixing.references",
    "roi_statistics": "probeplan.unmixing.roi",
    "read_roi_file": "probeplan.unmixing.roifile",
    "write_roi_file": "probeplan.unmixing.roifile",
    "read_stack": "probeplan.io.stacks",
    "write_stack": "probeplan.io.stacks",
    # phantoms: Mie theory and recipes
    "sphere_reduced_scattering_per_cm": "probeplan.model.mie",
    "phantom_recipe": "probeplan.model.phantom",
    # a whole study, calibration with a phantom
    "run_study": "probeplan.study.runs",
    "calibrate_phantom": "probeplan.study.calibration",
    "apply_calibration": "probeplan.study.calibration",
    "closure": "probeplan.study.closure",
    "depth_from_spectrum": "probeplan.study.depth_spectrum",
    # the demo
    "run_demo": "probeplan.demo",
}

__all__ = [
    "InputError",
    "ProbeplanWarning",
    "ModelValidityWarning",
    "AssumptionWarning",
    "__version__",
    "RESEARCH_USE_CAUTION",
    *_LAZY,
]


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'probeplan' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
