"""Localization maps: reading, credible regions, densities, overlaps, the distance ansatz.

Pure computation lives in :mod:`.skymap`, :mod:`.distance`, :mod:`.moc` and
:mod:`.synthetic`; :mod:`.fitsio` turns bytes into maps and back.
"""

from matcher.sky.distance import (
    MAX_STD_OVER_MEAN,
    ansatz_norm,
    conditional_moments,
    conditional_pdf,
    marginal_moments,
    parameters_from_moments,
    volume_density,
)
from matcher.sky.fitsio import flat_fits_bytes, moc_fits_bytes, read_skymap, skymap_from_bytes
from matcher.sky.skymap import DEG2_PER_SR, SkyMap
from matcher.sky.synthetic import Arc, Blob, kappa_for_area, random_skymap, synthetic_skymap, vmf_area_deg2

__all__ = [
    "SkyMap",
    "DEG2_PER_SR",
    "read_skymap",
    "skymap_from_bytes",
    "moc_fits_bytes",
    "flat_fits_bytes",
    "ansatz_norm",
    "conditional_moments",
    "conditional_pdf",
    "marginal_moments",
    "parameters_from_moments",
    "volume_density",
    "MAX_STD_OVER_MEAN",
    "Blob",
    "Arc",
    "synthetic_skymap",
    "random_skymap",
    "kappa_for_area",
    "vmf_area_deg2",
]
