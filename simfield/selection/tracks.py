"""Colour tracks of the project's galaxy templates versus redshift, the basis of the presets.

The templates are those of :mod:`simfield.population.seds` (broken power-law continuum,
380 nm break, Madau 1995 IGM): the star-forming family at its mean UV slope (Bouwens et al.
2014 relation at the chosen M_UV, break 1.25) and the evolved family at its mean (beta = 1,
beta_opt = -0.7, break 1.9) and at its red end (beta = 2, beta_opt = -0.3, break 2.6).
Colours are differences of synthetic AB magnitudes (:func:`band_magnitudes`); a band with no
flux gives +inf. ``python -m simfield.selection.tracks`` prints the tracks of the default bands
(the derivation of ``conf/selection/dropouts.yaml``).

Units: redshift dimensionless, magnitudes and colours AB mag, wavelengths nm.
"""

from __future__ import annotations

import numpy as np

from ..population import seds
from ..population.seds import band_magnitudes, galaxy_fnu, uv_slope_relation, wave_grid

__all__ = ["FAMILIES", "template_parameters", "band_tracks", "colour_tracks"]

#: template families of the tracks
FAMILIES = ("starforming", "evolved", "evolved_red")


def template_parameters(family: str, z, abs_mag_uv: float = -20.0):
    """(beta, break_strength, beta_opt) arrays of a family at redshifts ``z``.

    Parameters
    ----------
    family : str
        One of :data:`FAMILIES`.
    z : array_like
        Redshifts.
    abs_mag_uv : float (AB mag)
        Rest-1500 A magnitude setting the star-forming UV slope.
    """
    z = np.atleast_1d(np.asarray(z, float))
    one = np.ones_like(z)
    if family == "starforming":
        beta = uv_slope_relation(z, abs_mag_uv * one)
        return beta, seds.SF_BREAK * one, seds.sf_beta_opt(beta)
    if family == "evolved":
        return 1.0 * one, 1.9 * one, -0.7 * one
    if family == "evolved_red":
        return 2.0 * one, 2.6 * one, -0.3 * one
    raise ValueError(f"'family' must be one of {', '.join(FAMILIES)}, not {family!r}")


def _magnitudes(bands, z, family: str, abs_mag_uv: float, dist_mod=None) -> np.ndarray:
    """AB magnitudes of a family's template (distance moduli ``dist_mod``, default DM(z))."""
    beta, brk, bopt = template_parameters(family, z, abs_mag_uv)
    wave = wave_grid(bands)
    fnu = galaxy_fnu(wave, z, abs_mag_uv * np.ones_like(z), beta, brk, bopt, dist_mod=dist_mod)
    return band_magnitudes(wave, fnu, bands)


def band_tracks(bands, z, family: str, abs_mag_uv: float = -20.0) -> np.ndarray:
    """AB magnitudes of a family's template in ``bands`` at redshifts ``z``.

    Parameters
    ----------
    bands : sequence of simfield.bands.Band
    z : array_like
        Redshifts, > 0 (at z = 0 the luminosity distance is 0; :func:`colour_tracks` gives
        colours there).
    family : str
        One of :data:`FAMILIES`.
    abs_mag_uv : float (AB mag)

    Returns
    -------
    ndarray (AB mag), shape (n_z, n_band)
        +inf where a band receives no flux.
    """
    z = np.atleast_1d(np.asarray(z, float))
    if not np.all(z > 0):
        raise ValueError(f"'z' must be > 0 (apparent magnitudes need a distance), not "
                         f"{float(z[~(z > 0)][0])!r}")
    return _magnitudes(bands, z, family, abs_mag_uv)


def colour_tracks(bands, z, families=FAMILIES, abs_mag_uv: float = -20.0) -> dict:
    """Adjacent-band colours of each family versus redshift.

    Parameters
    ----------
    bands : sequence of simfield.bands.Band
    z : array_like
        Redshifts, >= 0 (z = 0: rest-frame colours).
    families : sequence of str
        Of :data:`FAMILIES`.
    abs_mag_uv : float (AB mag)

    Returns
    -------
    dict
        ``{family: {"<a>-<b>": ndarray (AB mag)}}`` for each pair of neighbouring bands.
    """
    names = [b.name for b in bands]
    z = np.atleast_1d(np.asarray(z, float))
    out = {}
    for fam in families:
        # a colour does not depend on the distance (DM(z) and 2.5 log10(1 + z) shift every
        # band alike): the template at 10 pc (DM = 0) gives the same colours, and at z = 0,
        # where DM is -inf, the rest-frame colours
        m = _magnitudes(bands, z, fam, abs_mag_uv, dist_mod=np.zeros(z.size))
        with np.errstate(invalid="ignore"):  # inf - inf (NaN) where both bands drop out
            out[fam] = {f"{a}-{b}": m[:, i] - m[:, i + 1] for i, (a, b) in
                        enumerate(zip(names[:-1], names[1:]))}
    return out


def _main() -> None:  # pragma: no cover - a printout
    from ..bands import make_band
    from ..config import CONF_DIR
    from omegaconf import OmegaConf

    tel = OmegaConf.load(f"{CONF_DIR}/telescope/lantern.yaml")
    bands = [make_band(b.name, b.center_nm, b.width_nm, b.throughput, b.sky_mjy_sr)
             for b in tel.bands]
    z = np.round(np.arange(0.0, 15.01, 0.25), 2)
    tr = colour_tracks(bands, z)
    for fam, cols in tr.items():
        print(f"# {fam}: z " + " ".join(f"{c:>9s}" for c in cols))
        for i, zi in enumerate(z):
            print(f"{zi:5.2f} " + " ".join(f"{cols[c][i]:9.2f}" for c in cols))


if __name__ == "__main__":  # pragma: no cover
    _main()
