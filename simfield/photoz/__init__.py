"""Photometric redshifts by template fitting.

:mod:`.templates` builds template band fluxes on a redshift grid from the population's own
spectral model (plus dusty, strong-Balmer-break and line-emitting families), :mod:`.fit` fits
every object at once (chi2, P(z), intervals, P(z > cut)), :mod:`.prior` holds the optional
luminosity-function prior and :mod:`.run` reads a run's ``photometry.fits`` and writes
``photoz.fits``. Like every stage it imports no other stage.
"""

from .fit import PhotozResult, fit_photoz
from .run import fit_run, photoz_table
from .templates import (TemplateSet, build_templates, default_families, redshift_grid)

__all__ = ["PhotozResult", "fit_photoz", "fit_run", "photoz_table", "TemplateSet",
           "build_templates", "default_families", "redshift_grid"]
