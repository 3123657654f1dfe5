"""High-redshift sample selection: colour / S/N / photo-z cuts and their scoring.

:mod:`~simfield.selection.cuts` applies a sample's conditions to a photometry table,
:mod:`~simfield.selection.score` scores the selection against the truth (selection
completeness, contamination, V_eff, expected counts), :mod:`~simfield.selection.volume` holds
the volumes and Poisson probabilities, :mod:`~simfield.selection.tracks` the template colour
tracks behind the presets, :mod:`~simfield.selection.report` the HTML report and
:mod:`~simfield.selection.run` the entry points.
"""

from .cuts import apply_sample, apply_samples
from .run import score_catalogue_selection, score_run_selection

__all__ = ["apply_sample", "apply_samples", "score_run_selection", "score_catalogue_selection"]
