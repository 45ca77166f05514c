"""The one builder of an imaging set-up from plain values: tissue, probes, source, channels, camera, lens.

The command line (``depth``, ``channels``), the plan evaluation
(:func:`probeplan.study.evaluate.plan_model`) and the page all call
:func:`build_setup`, so one set-up written three ways gives one set of objects
and the same numbers.  Names are resolved by :mod:`probeplan.catalog.resolve`.

An error raised while building carries the key of the offending value
(``InputError.key``, e.g. ``("probes", 1, "material")`` or ``("filters", 0)``)
so that each surface can point at its own field: the plan at its file line, the
command line at its flag, the page at its control.

Skin exposure is not decided here: :func:`probeplan.study.safety.setup_skin_exposure`
applies the one rule to a built set-up.
"""

from __future__ import annotations

import contextlib
import re
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from probeplan.catalog import resolve
from probeplan.errors import InputError, input_error
from probeplan.io.tomlsource import format_path
from probeplan.model import dots, optics

__all__ = ["ImagingSetup", "build_setup", "keyed", "DEFAULT_TISSUE", "DEFAULT_CAMERA"]

#: Tissue and camera of a set-up when none is named (the command line's defaults).
DEFAULT_TISSUE = "soft tissue"
DEFAULT_CAMERA = "si-deep-depletion"

_WHERE_PREFIX = re.compile(r"^[A-Za-z_][A-Za-z0-9_ /]*: ")
#: Probe settings a mapping may carry besides material and emission peak.
_PROBE_SETTINGS = ("name", "quantum_yield", "fwhm_nm", "extinction_at_excitation_per_M_cm")


@dataclass
class ImagingSetup:
    """The optical objects of one imaging set-up, built and checked.

    Attributes
    ----------
    probes : list of Probe
    source : Laser or LED
    channels : list of Channel
        One per emission filter, sharing source, camera and lens.
    camera, lens, tissue
    irradiance_mw_per_cm2 : float
        Irradiance used by the fluorescence model, mW/cm².
    skin_irradiance_mw_per_cm2 : float
        Irradiance compared with the skin limit (averaged over the limiting
        aperture; the model's irradiance when no other is given), mW/cm².
    autofluorescence : Autofluorescence or None
        The autofluorescence assumption (None: the model's default).
    """

    probes: list
    source: Any
    channels: list
    camera: Any
    lens: Any
    tissue: Any
    irradiance_mw_per_cm2: float
    skin_irradiance_mw_per_cm2: float
    autofluorescence: Any = field(default=None)

    @property
    def exposures_s(self) -> list[float]:
        """Each channel's exposure (s), in channel order."""
        return [float(ch.exposure_s) for ch in self.channels]


@contextlib.contextmanager
def keyed(*key: Any) -> Iterator[None]:
    """Re-raise an InputError as ``KEY: problem; fix`` with ``.key`` set to ``key`` (the innermost key wins)."""
    try:
        yield
    except InputError as exc:
        if getattr(exc, "key", None) is not None:
            raise
        detail = _WHERE_PREFIX.sub("", str(exc), count=1)
        err = InputError(f"{format_path(key)}: {detail}")
        err.key = key  # type: ignore[attr-defined]
        err.detail = detail  # type: ignore[attr-defined]
        raise err from None


def _probe(i: int, spec: Any, extinction: float | None):
    if isinstance(spec, Mapping):
        with keyed("probes", i, "material"):
            material = resolve.material(spec["material"])
        settings = {k: spec[k] for k in _PROBE_SETTINGS if spec.get(k) is not None}
        if extinction is not None:
            settings["extinction_at_excitation_per_M_cm"] = extinction
        with keyed("probes", i, "emission_peak_nm"):
            return dots.make_probe(material, spec["emission_peak_nm"], **settings)
    with keyed("probes", i):
        return resolve.probe(spec, extinction_per_M_cm=extinction)


def build_setup(
    *,
    probes: Sequence[Any],
    filters: Sequence[Any],
    excitation_nm: float,
    irradiance_mw_per_cm2: float,
    tissue: Any = DEFAULT_TISSUE,
    composition: Mapping[str, float] | None = None,
    layers: Sequence[tuple[Any, float]] = (),
    extinction_per_M_cm: Sequence[float] | None = None,
    channel_names: Sequence[str] | None = None,
    linewidth_nm: float | None = None,
    led_fwhm_nm: float | None = None,
    skin_irradiance_mw_per_cm2: float | None = None,
    camera: Any = DEFAULT_CAMERA,
    binning: int = 1,
    f_number: float = 2.0,
    magnification: float = 0.1,
    exposure_s: float | Sequence[float] = 0.05,
    autofluorescence_yield_per_cm: float | None = None,
) -> ImagingSetup:
    """Build an imaging set-up from plain values.

    Parameters
    ----------
    probes : sequence
        Each a written probe (``"CdTe:700"``, ``"CdTe:700:0.4"``, ``"CdTe:700@em.csv"``), a Probe, or a
        mapping with ``material`` and ``emission_peak_nm`` (and optionally ``name``, ``quantum_yield``,
        ``fwhm_nm``, ``extinction_at_excitation_per_M_cm``).
    filters : sequence
        One emission filter per channel: trade notation, a user-library filter name or a Filter.
    excitation_nm : float
        Source centre wavelength, nm.
    irradiance_mw_per_cm2 : float
        Irradiance on the skin used by the fluorescence model, mW/cm².
    tissue : str or Tissue
        Preset or user tissue name, or a Tissue.
    composition : mapping, optional
        Composition changes (:meth:`Tissue.with_composition`), e.g. ``{"blood_fraction": 0.01}``.
    layers : sequence of (tissue, thickness_mm)
        Layers over the target's tissue from the surface down (e.g. ``[("skin", 0.5)]``); each tissue
        a name or a Tissue. The set-up's tissue is then a
        :class:`~probeplan.model.layers.LayeredTissue`.
    extinction_per_M_cm : sequence of float, optional
        Measured extinction at the excitation wavelength, one per probe (M⁻¹ cm⁻¹).
    channel_names : sequence of str, optional
        Channel names (default: the filters as written).
    linewidth_nm, led_fwhm_nm : float, optional
        Laser linewidth (typical 1 nm when None), or the FWHM of an LED source.
    skin_irradiance_mw_per_cm2 : float, optional
        Irradiance compared with the skin limit (default: ``irradiance_mw_per_cm2``).
    camera : str or Camera
        Built-in or user camera name.
    binning : int
        Pixels binned per side.
    f_number, magnification : float
        The collection lens.
    exposure_s : float or sequence of float
        Exposure per channel, s: one for all channels or one per filter.
    autofluorescence_yield_per_cm : float, optional
        Autofluorescence yield (an assumption; None: the model's default, 0: off).

    Returns
    -------
    ImagingSetup

    Raises
    ------
    InputError
        Any name or value the catalog or the model refuses; ``.key`` names the field
        (``("probes", i)``, ``("probes", i, "material")``, ``("filters", c)``, ``("camera",)``, ...).

    Examples
    --------
    >>> s = build_setup(probes=["CdTe:700", "InAs:880"], filters=["700/30", "880/50"], excitation_nm=640.0,
    ...                 irradiance_mw_per_cm2=10.0)
    >>> [ch.name for ch in s.channels], s.tissue.name, s.exposures_s
    (['700/30', '880/50'], 'soft tissue', [0.05, 0.05])
    """
    from probeplan.model.fluorescence import Autofluorescence

    probes = list(probes)
    filters = list(filters)
    ext = None if extinction_per_M_cm is None else list(extinction_per_M_cm)
    if ext is not None and len(ext) != len(probes):
        with keyed("extinction_per_M_cm"):
            raise input_error("extinction_per_M_cm", f"{len(ext)} values for {len(probes)} probes",
                              "give one per probe, in order")
    if not filters:
        with keyed("filters"):
            raise input_error("filters", "no emission filter given", "give one emission filter per channel")
    names = [str(f) for f in filters] if channel_names is None else list(channel_names)
    if len(names) != len(filters):
        with keyed("channel_names"):
            raise input_error("channel_names", f"{len(names)} names for {len(filters)} filters", "give one per filter")
    exposures = [exposure_s] * len(filters) if not isinstance(exposure_s, Sequence) else list(exposure_s)
    if len(exposures) != len(filters):
        with keyed("exposure_s"):
            raise input_error("exposure_s", f"{len(exposures)} exposures for {len(filters)} filters",
                              "give one exposure for all channels or one per filter")
    built_probes = [_probe(i, spec, None if ext is None else ext[i]) for i, spec in enumerate(probes)]
    with keyed("excitation_nm"):
        src = resolve.source(excitation_nm, linewidth_nm=linewidth_nm, led_fwhm_nm=led_fwhm_nm)
    with keyed("binning"):
        if isinstance(binning, bool) or not isinstance(binning, int) or binning < 1:
            raise input_error("binning", f"got {binning!r}", "give a whole number >= 1")
    with keyed("camera"):
        cam = resolve.camera(camera, binning)
    with keyed("f_number"):
        lens = resolve.lens(f_number, magnification)
    channels = []
    for c, filt in enumerate(filters):
        with keyed("filters", c):
            flt = resolve.emission_filter(filt)
        with keyed("exposure_s", c) if isinstance(exposure_s, Sequence) else keyed("exposure_s"):
            channels.append(optics.Channel(names[c], src, flt, cam, lens, exposures[c]))
    with keyed("tissue"):
        tis = resolve.tissue(tissue)
    if composition:
        with keyed("composition"):
            tis = tis.with_composition(**dict(composition))
    if layers:
        from probeplan.model.layers import Layer, LayeredTissue

        stack = []
        for i, (layer_tissue, thickness_mm) in enumerate(layers):
            with keyed("layers", i):
                stack.append(Layer(resolve.tissue(layer_tissue), thickness_mm))
        tis = LayeredTissue(tuple(stack), tis)
    af = None
    if autofluorescence_yield_per_cm is not None:
        with keyed("autofluorescence_yield_per_cm"):
            af = Autofluorescence(yield_per_cm=autofluorescence_yield_per_cm)
    irradiance = float(irradiance_mw_per_cm2)
    skin = irradiance if skin_irradiance_mw_per_cm2 is None else float(skin_irradiance_mw_per_cm2)
    return ImagingSetup(built_probes, src, channels, cam, lens, tis, irradiance, skin, af)
