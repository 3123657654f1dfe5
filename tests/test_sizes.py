"""Galaxy sizes against the published size-luminosity-redshift relations (simfield.population
.sizes): star-forming, Shibuya, Ouchi & Harikane 2015, ApJS 219, 15; quiescent, van der Wel et
al. 2014, ApJ 788, 28 (coefficients [from memory])."""

from __future__ import annotations

import dataclasses

import numpy as np
from astropy.cosmology import FlatLambdaCDM
from numpy.testing import assert_allclose

from simfield.bands import make_band
from simfield.config import PopulationConfig
from simfield.population import make_population, sizes
from simfield.population.seds import rest_fnu_shape
from simfield.random import stream

BANDS = [make_band("b10", 1000, 220, 0.30), make_band("b36", 3600, 800, 0.45)]


def test_published_anchor_values():
    """The relations at points quoted in the papers [from memory]: star-forming r_e ~ 1 kpc at
    z = 4 and M_UV = -21 and r_e ~ L^0.27 (Shibuya et al. 2015); quiescent r_e = 10^0.60 kpc
    at 5e10 Msun and z = 0.25, slope 0.75 in mass, (1 + z)^-1.48 (van der Wel et al. 2014)."""
    assert_allclose(sizes.starforming_r_half_kpc(4.0, -21.0), 1.0, rtol=0.05)
    assert_allclose(sizes.starforming_r_half_kpc(4.0, -23.5) / sizes.starforming_r_half_kpc(
        4.0, -21.0), 10 ** (0.27), rtol=1e-12)  # 2.5 mag = a factor 10 in L
    # the M_550 whose mass is 5e10 Msun at z = 0.25 (M/L_V = 10^(0.48 - 0.0625))
    m_ref = 4.81 - 2.5 * (np.log10(5e10) - (0.48 - 0.25 * 0.25))
    assert_allclose(sizes.quiescent_stellar_mass(0.25, m_ref), 5e10, rtol=1e-10)
    assert_allclose(sizes.quiescent_r_half_kpc(0.25, m_ref), 10 ** 0.60, rtol=1e-10)
    assert_allclose(sizes.quiescent_r_half_kpc(0.25, m_ref - 2.5) / 10 ** 0.60, 10 ** 0.75,
                    rtol=1e-10)


def test_population_median_size_follows_relations():
    """Median r_e at fixed luminosity and redshift of a generated population equals the
    relation (within 3 sampling errors of a log-normal median, 1.2533 sigma / sqrt(N)), and
    r_half (arcsec) is r_half_kpc over astropy's angular-diameter distance."""
    pop = dataclasses.replace(
        PopulationConfig(), mode="uniform", uniform_in="abs_mag", uniform_abs_mag_min=-21.2,
        uniform_abs_mag_max=-20.8, z_min=3.8, z_max=4.2, uniform_density_arcmin2=6000.0,
        quiescent_density_arcmin2=3000.0, dusty_density_arcmin2=0.0, star_density_arcmin2=0.0,
        dwarf_density_arcmin2=0.0, placement="uniform")
    t = make_population(pop, BANDS, (-20, 20), (-20, 20), stream(2, "population"))
    z = np.asarray(t["redshift"], float)
    m_uv = np.asarray(t["abs_mag_uv"], float)
    r = np.asarray(t["r_half_kpc"], float)
    tmpl = np.asarray(t["template"]).astype(str)
    sf = tmpl == "starforming"
    q = np.asarray(t["kind"]).astype(str) == "quiescent"
    assert sf.sum() > 2000 and q.sum() > 1000
    ratio_sf = np.log(r[sf] / sizes.starforming_r_half_kpc(z[sf], m_uv[sf]))
    err = 1.2533 * sizes.SF_SIGMA_LN / np.sqrt(sf.sum())
    assert abs(np.median(ratio_sf)) < 3 * err
    assert_allclose(np.std(ratio_sf), sizes.SF_SIGMA_LN, rtol=0.05)
    m_opt = m_uv[q] - 2.5 * np.log10(rest_fnu_shape(550.0, *(np.asarray(t[c], float)[q] for c in
                                                             ("beta_uv", "break_strength",
                                                              "beta_opt"))))
    ratio_q = np.log(r[q] / sizes.quiescent_r_half_kpc(z[q], m_opt))
    sig_q = sizes.Q_SIGMA_LOG10 * np.log(10)
    assert abs(np.median(ratio_q)) < 3 * 1.2533 * sig_q / np.sqrt(q.sum())
    assert_allclose(np.std(ratio_q), sig_q, rtol=0.08)
    d_a = FlatLambdaCDM(H0=70.0, Om0=0.3, Tcmb0=2.725).angular_diameter_distance(z).to("kpc")
    assert_allclose(np.asarray(t["r_half"], float), r / d_a.value * 206264.806, rtol=2e-3)
