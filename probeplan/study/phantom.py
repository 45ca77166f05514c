"""A phantom for a plan: the recipe that mimics the plan's tissue, and the SBR against depth it predicts.

The targets are the plan tissue's μa and μs′ (:func:`probeplan.model.tissue.optical_properties`)
at the plan's excitation wavelength and each probe's emission peak; the recipe is
:func:`probeplan.model.phantom.phantom_recipe`.  The SBR curve is the plan's own forward
model (:func:`probeplan.model.fluorescence.depth_profile`, each probe in its brightest
channel at the target depth) evaluated once in the phantom and once in the tissue, so a
phantom experiment can be compared with the plan before any animal is imaged.  The phantom
holds no autofluorescence (water and the stocks are taken as non-fluorescent: an assumption
to check with a blank) and the probe's uptake ratio is the plan's (an inclusion of probe in
a phantom with probe at c/TBR around it).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

from probeplan.errors import AssumptionWarning

__all__ = ["PlanPhantom", "plan_phantom", "PHANTOM_CAUTION"]

#: Shown with every phantom recipe.
PHANTOM_CAUTION = ("Research use only. Handle nanocrystal probes (Cd, Pb) as toxic heavy-metal waste under your "
                   "chemical safety office's rules; wear laser eye protection when imaging; a phantom replaces no "
                   "review by the animal care committee.")


@dataclass
class PlanPhantom:
    """A plan's phantom: recipe, preparation sheet and SBR against depth in phantom and tissue."""

    recipe: object
    preparation: list[dict]
    properties: list[dict]
    sbr_curve: list[dict]
    notes: list[str] = field(default_factory=list)


def plan_phantom(plan, *, scatterer: str = "intralipid-20", absorber="india-ink", diameter_um: float | None = None,
                 batch_ml: float = 100.0, depth_mm=None) -> PlanPhantom:
    """Phantom recipe for a plan's tissue, with its predicted SBR against depth.

    Parameters
    ----------
    plan : Plan
        From :func:`probeplan.study.plan.load_plan`.
    scatterer, absorber, diameter_um, batch_ml :
        As :func:`probeplan.model.phantom.phantom_recipe`.
    depth_mm : array_like, optional
        Inclusion depths (mm); default 0.5 to 8 mm every 0.5 mm.

    Returns
    -------
    PlanPhantom
        ``sbr_curve`` rows: ``probe, channel, depth_mm, sbr_phantom, sbr_tissue, signal_e_phantom, signal_e_tissue``.
    """
    from probeplan.model.channels import response_matrix
    from probeplan.model.fluorescence import Autofluorescence, depth_profile
    from probeplan.model.phantom import phantom_recipe
    from probeplan.model.tissue import optical_properties
    from probeplan.study.evaluate import plan_model

    m = plan_model(plan)
    tgt = plan.target
    wl = np.array([float(m.source.centre_nm), *(float(p.emission_peak_nm) for p in m.probes)])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AssumptionWarning)
        mu_a, mu_sp = optical_properties(m.tissue, wl)
    recipe = phantom_recipe(wl, mu_a, mu_sp, scatterer=scatterer, absorber=absorber, diameter_um=diameter_um,
                            batch_ml=batch_ml)
    depth = np.arange(0.5, 8.01, 0.5) if depth_mm is None else np.atleast_1d(np.asarray(depth_mm, dtype=np.float64))
    medium = recipe.medium()
    rows = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AssumptionWarning)
        resp = response_matrix(m.tissue, m.probes, m.channels, irradiance_mw_per_cm2=m.irradiance_mw_per_cm2,
                               depth_mm=[tgt["depth_mm"]], target_size_mm=tgt["size_mm"])[0]
        for k, probe in enumerate(m.probes):
            ch = m.channels[int(np.argmax(resp[:, k]))]
            common = dict(source=m.source, irradiance_mw_per_cm2=m.irradiance_mw_per_cm2, emission_filter=ch.emission_filter,
                          camera=m.camera, lens=m.lens, exposure_s=ch.exposure_s, depth_mm=depth,
                          target_size_mm=tgt["size_mm"], concentration_uM=tgt["concentration_uM"],
                          uptake_ratio=tgt["uptake_ratio"], warn=False)
            ph = depth_profile(medium, probe, autofluorescence=Autofluorescence(0.0), **common)
            ti = depth_profile(m.tissue, probe, **common)
            for i, d in enumerate(depth):
                rows.append({"probe": probe.name, "channel": ch.name, "depth_mm": float(d),
                             "sbr_phantom": float(ph.sbr[i]), "sbr_tissue": float(ti.sbr[i]),
                             "signal_e_phantom": float(ph.signal_e[i]), "signal_e_tissue": float(ti.signal_e[i])})
    notes = [*recipe.notes,
             "the phantom is taken as free of autofluorescence (check with a blank); the tissue keeps the plan's "
             "autofluorescence assumption", PHANTOM_CAUTION]
    return PlanPhantom(recipe, recipe.preparation(), recipe.table, rows, notes)
