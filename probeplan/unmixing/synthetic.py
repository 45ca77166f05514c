"""Synthetic image stacks from the project's own forward model, with known ground truth.

Used for the demo study and for tests of the unmixing.  Image formation (a
stated simplification): each pixel of channel c records, in one exposure t_c,

    e_c(y, x) = t_c · (Σ_k M_ck · a_k(y, x) + b_c)

photoelectrons, where M (e⁻/s per pixel per µM) is the channel model's
response at the target depth (:func:`probeplan.model.channels.response_matrix`), a_k
the probe concentration map (µM) and b_c a spatially uniform
autofluorescence + excitation-leakage background (e⁻/s).  Counts are
Poisson(e_c + dark) plus Gaussian read noise, divided by the conversion gain,
plus the camera offset, rounded and clipped to the bit depth.  Lateral blur is
not applied: the ground truth is the map the pixels see.

Everything is seeded (:class:`numpy.random.Generator`) and reproducible.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from probeplan.errors import input_error

__all__ = ["Scene", "demo_scene", "simulate_counts", "DEMO_SHAPE", "DEMO_SEED"]

#: Image size of the demo stacks (pixels).
DEMO_SHAPE = (128, 128)
#: Seed of every random draw in the demo.
DEMO_SEED = 20261202


@dataclass
class Scene:
    """Ground-truth concentration maps (µM), shape (K, Y, X), and named regions (boolean masks)."""

    abundance_uM: np.ndarray
    component_names: list[str]
    regions: dict[str, np.ndarray]


def _disc(shape, centre, radius):
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    return (yy - centre[0]) ** 2 + (xx - centre[1]) ** 2 <= radius**2


def demo_scene(component_names, *, target_uM: float, uptake_ratio: float, shape=DEMO_SHAPE, seed: int = DEMO_SEED) -> Scene:
    """An invented three-probe scene: a tumour, a lymph node and a muscle region on background uptake.

    Probe 1 accumulates in the tumour, probe 2 in the tumour rim and the node,
    probe 3 in the muscle region; every probe sits at ``target_uM / uptake_ratio``
    elsewhere, with a smooth ±20 % modulation.  The fourth-and-later probes,
    if any, carry background only.
    """
    k = len(component_names)
    if k < 1:
        raise input_error("component_names", "empty", "name at least one probe")
    rng = np.random.default_rng(seed)
    bg = target_uM / uptake_ratio
    yy, xx = np.mgrid[: shape[0], : shape[1]] / np.array(shape, dtype=float)[:, None, None]
    tumour = _disc(shape, (0.34 * shape[0], 0.30 * shape[1]), 0.12 * shape[0])
    rim = _disc(shape, (0.34 * shape[0], 0.30 * shape[1]), 0.17 * shape[0]) & ~tumour
    node = _disc(shape, (0.30 * shape[0], 0.74 * shape[1]), 0.07 * shape[0])
    muscle = _disc(shape, (0.72 * shape[0], 0.62 * shape[1]), 0.15 * shape[0])
    maps = np.empty((k, *shape))
    for i in range(k):
        phase = rng.uniform(0, 2 * np.pi, size=2)
        maps[i] = bg * (1.0 + 0.2 * np.sin(2 * np.pi * xx + phase[0]) * np.cos(2 * np.pi * yy + phase[1]))
    maps[0][tumour] = target_uM
    if k > 1:
        maps[1][rim] = 0.8 * target_uM
        maps[1][node] = target_uM
    if k > 2:
        maps[2][muscle] = 0.6 * target_uM
    background = ~(tumour | rim | node | muscle)
    return Scene(maps, list(component_names),
                 {"tumour": tumour, "tumour rim": rim, "node": node, "muscle": muscle, "background": background})


def simulate_counts(
    abundance,
    response_e_per_s,
    *,
    exposure_s,
    background_e_per_s,
    dark_e_per_s: float,
    read_noise_e: float,
    gain_e_per_count: float = 1.0,
    offset_counts: float = 100.0,
    bit_depth: int = 16,
    seed: int = DEMO_SEED,
) -> np.ndarray:
    """A noisy uint16 stack (C, Y, X) of camera counts; see the module notes for the model.

    Parameters
    ----------
    abundance : array_like, shape (K, Y, X)
        Probe concentration maps (µM).
    response_e_per_s : array_like, shape (C, K)
        e⁻/s per pixel per µM of each probe in each channel.
    exposure_s : array_like, shape (C,)
        Exposure of each channel (s).
    background_e_per_s : array_like, shape (C,)
        Uniform background in each channel (e⁻/s per pixel).
    dark_e_per_s, read_noise_e : float
        Dark current (e⁻/s per pixel) and read noise (e⁻ rms).
    gain_e_per_count, offset_counts, bit_depth :
        Conversion gain, camera offset (counts) and bit depth.
    """
    a = np.asarray(abundance, dtype=np.float64)
    m = np.asarray(response_e_per_s, dtype=np.float64)
    t = np.asarray(exposure_s, dtype=np.float64).reshape(-1, 1, 1)
    b = np.asarray(background_e_per_s, dtype=np.float64).reshape(-1, 1, 1)
    if a.ndim != 3 or m.ndim != 2 or m.shape[1] != a.shape[0] or t.shape[0] != m.shape[0] or b.shape[0] != m.shape[0]:
        raise input_error("simulate_counts", f"shapes abundance {a.shape}, response {m.shape}", "give (K,Y,X) and (C,K)")
    rng = np.random.default_rng(seed)
    electrons = t * (np.einsum("ck,kyx->cyx", m, a) + b + dark_e_per_s)
    counts = rng.poisson(electrons) + rng.normal(0.0, read_noise_e, size=electrons.shape)
    counts = counts / gain_e_per_count + offset_counts
    return np.clip(np.rint(counts), 0, 2**bit_depth - 1).astype(np.uint16)
