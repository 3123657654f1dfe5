"""population stage of simfield: light-cone galaxies, foreground stars, contaminants -> truth.

Modules: :mod:`.luminosity` (evolving rest-UV Schechter function, light-cone sampling),
:mod:`.seds` (templates, IGM, synthetic photometry), :mod:`.morphology` (Sersic shapes, sizes,
knots, GalSim profiles), :mod:`.stars` (foreground stars), :mod:`.lightcone` (the truth table).
Contaminant families: :mod:`.dwarfs` (cool M/L/T dwarfs), :mod:`.contaminants` (dusty and
quiescent galaxies), :mod:`.dust` (Calzetti et al. 2000 attenuation), :mod:`.lines` (nebular
emission lines).
"""

from .lightcone import COLUMN_UNITS, make_population, selection_band_index
from .luminosity import (expected_counts, number_density_brighter, upper_incomplete_gamma,
                         uv_lf_parameters, uv_luminosity_function)
from .morphology import make_profile
from .seds import band_magnitudes, galaxy_fnu, igm_transmission

__all__ = [
    "make_population",
    "selection_band_index",
    "COLUMN_UNITS",
    "make_profile",
    "uv_lf_parameters",
    "uv_luminosity_function",
    "number_density_brighter",
    "upper_incomplete_gamma",
    "expected_counts",
    "igm_transmission",
    "galaxy_fnu",
    "band_magnitudes",
]
