"""The model's entry points with names resolved: what ``import probeplan`` gives a notebook.

Model functions take objects; these wrappers accept a tissue preset or user
tissue name, a written probe (``"CdTe:700"``), a filter in trade notation
(``"700/30"``) or a camera name wherever the model takes the object, resolve
them through :mod:`probeplan.catalog.resolve`, and call the model unchanged.
"""

from __future__ import annotations

from typing import Any

from probeplan.catalog import resolve
from probeplan.model import channels as _channels
from probeplan.model import fluorescence as _fluorescence
from probeplan.model import tissue as _tissue

__all__ = ["optical_properties", "depth_profile", "channel_report"]


def optical_properties(tissue: Any, wavelength_nm, *, scattering_model: str = "power"):
    """Absorption and reduced scattering coefficients (cm⁻¹) of a tissue given by name or as a Tissue.

    See :func:`probeplan.model.tissue.optical_properties`.

    Examples
    --------
    >>> mu_a, mu_sp = optical_properties("skin", 800.0)
    >>> round(float(mu_sp), 2)
    23.59
    """
    return _tissue.optical_properties(resolve.tissue(tissue), wavelength_nm, scattering_model=scattering_model)


def depth_profile(tissue: Any, probe: Any, channel: Any = None, **kwargs: Any):
    """Signal, backgrounds, SBR, SNR and blur against depth for one probe read in one channel.

    ``tissue`` and ``probe`` may be names (``"skin"``, ``"CdTe:700"``); ``channel`` is a
    :class:`~probeplan.model.optics.Channel`.  See :func:`probeplan.model.fluorescence.depth_profile`
    for the keywords; :meth:`DepthProfile.to_frame` gives the table.
    """
    return _fluorescence.depth_profile(resolve.tissue(tissue), resolve.probe(probe), channel, **kwargs)


def channel_report(tissue: Any, probes, channels, **kwargs: Any):
    """Response matrix, crosstalk, condition number and noise amplification; names accepted for tissue and probes.

    See :func:`probeplan.model.channels.channel_report`.
    """
    return _channels.channel_report(resolve.tissue(tissue), [resolve.probe(p) for p in probes], channels, **kwargs)
