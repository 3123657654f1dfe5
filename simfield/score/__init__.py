"""score stage of simfield: matching, completeness / purity metrics, effective volume, report.

The submodules are imported explicitly (``from simfield.score import match, metrics, volume``);
:mod:`simfield.score.catalog` reads and checks user catalogues, :mod:`simfield.score.fit` fits
completeness curves, :mod:`simfield.score.run` reads run directories and writes the outputs.
"""

__all__ = ["match", "catalog", "metrics", "fit", "volume", "report", "run"]
