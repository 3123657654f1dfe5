"""Selection functions of many jobs combined: the counts of every (M_UV, z) cell added up.

A single field holds few galaxies per (M_UV, z) cell, so S(M_UV, z) is measured by running
many injection jobs (``+experiment=selection_grid``) and adding their cells: the jobs are
independent realisations of the same scenario, so the k selected of n truth galaxies of a
cell add across jobs and the combined fraction and its Jeffreys interval follow from the
sums (Brown, Cai & DasGupta 2001, sec. 4.1.2).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from astropy.table import Table

from ..errors import CatalogError

__all__ = ["combine_completeness"]

_CELL = ("abs_mag_uv_lo", "abs_mag_uv_hi", "z_lo", "z_hi")


def combine_completeness(job_dirs, level: float = 0.683) -> dict[str, Table]:
    """Add up the ``selection/<sample>/completeness.ecsv`` cells of several run directories.

    Parameters
    ----------
    job_dirs : iterable of path
        Run (job) directories; those without a ``selection/`` folder are skipped.
    level : float (0..1)
        Central probability of the recomputed Jeffreys intervals.

    Returns
    -------
    dict of sample name -> astropy.table.Table
        Per (M_UV, z) cell: the cell edges (AB mag, redshift), ``n`` and ``k`` summed over the
        jobs, ``fraction`` = k / n (NaN where n = 0), ``fraction_lo``, ``fraction_hi`` and
        ``n_jobs``. Empty when no job has a selection.

    Raises
    ------
    CatalogError
        Two jobs' tables of one sample have different cells (different bins).
    """
    from ..score.metrics import beta_interval

    sums: dict[str, Table] = {}
    jobs: dict[str, int] = {}
    for job in job_dirs:
        sel = Path(job) / "selection"
        if not sel.is_dir():
            continue
        for path in sorted(sel.glob("*/completeness.ecsv")):
            name = path.parent.name
            t = Table.read(path)
            if name not in sums:
                sums[name] = Table({c: t[c] for c in _CELL + ("n", "k")})
                jobs[name] = 1
                continue
            s = sums[name]
            if len(t) != len(s) or any(not np.array_equal(np.asarray(t[c]), np.asarray(s[c]))
                                       for c in _CELL):
                raise CatalogError(f"{path}: its (M_UV, z) cells differ from the other jobs' "
                                   f"cells of sample {name!r}; combine jobs with one binning")
            s["n"] = np.asarray(s["n"]) + np.asarray(t["n"])
            s["k"] = np.asarray(s["k"]) + np.asarray(t["k"])
            jobs[name] += 1
    for name, s in sums.items():
        n, k = np.asarray(s["n"], int), np.asarray(s["k"], int)
        with np.errstate(invalid="ignore", divide="ignore"):
            s["fraction"] = np.where(n > 0, k / np.maximum(n, 1), np.nan)
        lo, hi = beta_interval(k, n, level)
        s["fraction_lo"], s["fraction_hi"] = lo, hi
        s["n_jobs"] = np.full(len(s), jobs[name], int)
        s.meta["description"] = (f"selection completeness S(M_UV, z) of sample {name}, cells "
                                 f"added over {jobs[name]} jobs (Jeffreys intervals at "
                                 f"{level:g})")
    return sums
