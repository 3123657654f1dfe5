"""score stage of simfield: matching, completeness / purity metrics, effective volume, report.

The submodules are imported explicitly (``from simfield.score import match, metrics, volume``);
:mod:`simfield.score.run` reads run directories and user catalogues and writes the outputs.
"""

__all__ = ["match", "metrics", "volume", "report", "run"]
