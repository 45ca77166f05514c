"""The physics: spectra, tissue optics, light transport, nanocrystal probes, optics and the forward model.

Holds the wavelength grid and :class:`~probeplan.model.spectra.Spectrum` (``spectra``), tissue
absorption and scattering from composition (``tissue``), light transport (``transport``: diffusion
theory and the model registry; ``transport_tables``: the default, diffusion corrected by Monte Carlo
tables; ``layers``: skin and fat over the target's tissue), the photon-packet Monte Carlo
(``montecarlo``) and the white Monte Carlo that makes the tables (``montecarlo_white``), nanocrystal
sizing and emission (``dots``), filters, sources, cameras and lenses (``optics``), the skin's exposure
limit to laser light (``skin_limit``), the signal and background at depth (``fluorescence``), the
probe × channel response with crosstalk and separability (``channels``), Mie theory for phantom
spheres (``mie``) and liquid phantom recipes (``phantom``).

It may import :mod:`probeplan.errors`, :mod:`probeplan.units`, :mod:`probeplan.io` and the
shipped tables in :mod:`probeplan.data`; never the catalog, unmixing, design, study, report or
command line.
"""

__all__: list[str] = []
