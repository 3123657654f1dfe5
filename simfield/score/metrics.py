"""Completeness, purity, causes of false detections, photometric bias and completeness fits.

Fractions per bin carry Jeffreys intervals: the central quantiles of the Beta posterior of a
binomial under the Jeffreys prior, Beta(k + 1/2, n - k + 1/2), with the lower bound set to 0 at
k = 0 and the upper bound to 1 at k = n (Brown, Cai & DasGupta 2001, Statistical Science 16, 101,
sec. 4.1.2; Beta quantiles as in Cameron 2011, PASA 28, 128), so every interval holds k/n.

Completeness curves are fitted by maximum likelihood on the unbinned Bernoulli outcomes
(detected or not), with a logistic or an error-function form (Fleming et al. 1995, AJ 109, 1044),
and give the magnitudes where completeness falls to 50% and 90% with uncertainties from the
inverse Hessian of the log-likelihood propagated to those magnitudes (delta method). A limit is
quoted only when (:func:`fit_completeness`, rules in order):

1. the fit describes the data: the binomial deviance of the binned counts against the saturated
   model (one free fraction per bin), D = 2 sum [k ln(k/E) + (n-k) ln((n-k)/(n-E))], has a
   p-value P(chi2_dof > D) >= :data:`FIT_P_MIN` with dof = bins - fitted parameters (likelihood
   ratio, Wilks 1938, Ann. Math. Stat. 9, 60; binomial deviance, McCullagh & Nelder 1989,
   "Generalized Linear Models", sec. 4.4.3). Bins are 0.25 mag wide, merged with their fainter
   neighbours until each holds at least :data:`BIN_MIN_N` sources;
2. the data cross the level: a bin wholly brighter than the limit has k/n >= the level and a bin
   wholly fainter has k/n <= the level (both with at least :data:`BIN_MIN_N` sources);
3. its 1-sigma uncertainty is at most :data:`LIMIT_ERR_MAX` mag.

Otherwise the limit is NaN (null in JSON) with the reason in ``m50_reason`` / ``m90_reason``.

Units: magnitudes AB, sizes arcsec, surface brightness AB mag/arcsec^2, pixel positions 0-based.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from astropy.table import Table
from scipy import optimize, special, stats

__all__ = [
    "FALSE_CAUSES",
    "INTERVAL_NOTE",
    "beta_interval",
    "binned_fraction",
    "binned_fraction_2d",
    "photometric_bias",
    "mean_surface_brightness",
    "FIT_P_MIN",
    "BIN_MIN_N",
    "LIMIT_ERR_MAX",
    "CompletenessFit",
    "gof_bins",
    "binned_deviance",
    "completeness_model",
    "fit_completeness",
    "measure_spike_angles",
    "classify_false_detections",
]

#: how the per-bin intervals are made (``level`` filled in)
INTERVAL_NOTE = ("Jeffreys {level:g} interval: Beta(k+1/2, n-k+1/2) quantiles, 0 at k=0 and 1 at "
                 "k=n (Brown, Cai & DasGupta 2001, Stat. Sci. 16, 101)")

#: causes of unmatched detections, in order of precedence
FALSE_CAUSES = ("artefact", "spike", "shred", "blend", "noise")

# normalised median absolute deviation: sigma = 1.4826 MAD for a Gaussian (common practice)
_NMAD = 1.4826


def beta_interval(k, n, level: float = 0.683):
    """Jeffreys interval of a binomial fraction (Brown, Cai & DasGupta 2001, Statistical
    Science 16, 101, sec. 4.1.2).

    Parameters
    ----------
    k, n : array_like of int
        Successes and trials; ``n == 0`` gives (0, 1).
    level : float (0..1)
        Central probability of the interval.

    Returns
    -------
    lo, hi : ndarray (dimensionless)
        Quantiles (1 -/+ level)/2 of Beta(k + 1/2, n - k + 1/2), with ``lo = 0`` where
        ``k == 0`` and ``hi = 1`` where ``k == n``: the interval always contains k/n.
    """
    k = np.asarray(k, float)
    n = np.asarray(n, float)
    a, b = k + 0.5, n - k + 0.5
    lo = np.where(k > 0, stats.beta.ppf(0.5 * (1.0 - level), a, b), 0.0)
    hi = np.where(k < n, stats.beta.ppf(0.5 * (1.0 + level), a, b), 1.0)
    return np.asarray(lo, float), np.asarray(hi, float)


def binned_fraction(values, success, edges, level: float = 0.683, name: str = "x") -> Table:
    """Fraction of ``success`` per bin of ``values`` with Beta intervals.

    Parameters
    ----------
    values : array_like
        Quantity binned on (any unit; NaN rows are ignored).
    success : array_like of bool
        Outcome per row.
    edges : array_like
        Bin edges (same unit as ``values``), increasing; bins are [lo, hi).
    level : float (0..1)
        Central level of the intervals.
    name : str
        Prefix of the bin columns.

    Returns
    -------
    Table
        Columns ``<name>_lo``, ``<name>_hi``, ``<name>_mid``, ``n``, ``k``, ``fraction`` (NaN
        where n = 0), ``fraction_lo``, ``fraction_hi``.
    """
    v = np.asarray(values, float)
    s = np.asarray(success, bool)
    edges = np.asarray(edges, float)
    ok = np.isfinite(v)
    n, _ = np.histogram(v[ok], edges)
    k, _ = np.histogram(v[ok & s], edges)
    lo, hi = beta_interval(k, n, level)
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(n > 0, k / np.maximum(n, 1), np.nan)
    t = Table()
    t[f"{name}_lo"], t[f"{name}_hi"] = edges[:-1], edges[1:]
    t[f"{name}_mid"] = 0.5 * (edges[:-1] + edges[1:])
    t["n"], t["k"] = n, k
    t["fraction"], t["fraction_lo"], t["fraction_hi"] = frac, lo, hi
    t.meta["interval"] = INTERVAL_NOTE.format(level=level)
    return t


def binned_fraction_2d(xv, yv, success, x_edges, y_edges, level: float = 0.683,
                       names=("x", "y")) -> Table:
    """Fraction of ``success`` on a 2-D grid of bins (one row per cell), as :func:`binned_fraction`."""
    xv, yv = np.asarray(xv, float), np.asarray(yv, float)
    s = np.asarray(success, bool)
    ok = np.isfinite(xv) & np.isfinite(yv)
    n, _, _ = np.histogram2d(xv[ok], yv[ok], [x_edges, y_edges])
    k, _, _ = np.histogram2d(xv[ok & s], yv[ok & s], [x_edges, y_edges])
    xe, ye = np.asarray(x_edges, float), np.asarray(y_edges, float)
    ix, iy = np.meshgrid(np.arange(xe.size - 1), np.arange(ye.size - 1), indexing="ij")
    ix, iy = ix.ravel(), iy.ravel()
    n, k = n.ravel().astype(int), k.ravel().astype(int)
    lo, hi = beta_interval(k, n, level)
    t = Table()
    for nm, e, i in ((names[0], xe, ix), (names[1], ye, iy)):
        t[f"{nm}_lo"], t[f"{nm}_hi"] = e[i], e[i + 1]
    t["n"], t["k"] = n, k
    with np.errstate(invalid="ignore", divide="ignore"):
        t["fraction"] = np.where(n > 0, k / np.maximum(n, 1), np.nan)
    t["fraction_lo"], t["fraction_hi"] = lo, hi
    return t


def mean_surface_brightness(mag, r_half_arcsec):
    """Mean surface brightness inside the half-light radius (AB mag/arcsec^2).

    <mu>_e = m + 2.5 log10(2 pi r_e^2): half the light over the area pi r_e^2 (Graham & Driver
    2005, PASA 22, 118, eq. 8 [mem]). Lensing conserves it.
    """
    r = np.asarray(r_half_arcsec, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.asarray(mag, float) + 2.5 * np.log10(2.0 * np.pi * np.where(r > 0, r, np.nan)**2)


def photometric_bias(mag_true, mag_meas, edges) -> Table:
    """Median offset and scatter of measured - true magnitudes per true-magnitude bin.

    Parameters
    ----------
    mag_true, mag_meas : array_like (AB mag)
        Matched pairs.
    edges : array_like (AB mag)
        Bin edges in true magnitude.

    Returns
    -------
    Table
        ``mag_lo``, ``mag_hi``, ``mag_mid``, ``n``, ``median`` (mag), ``nmad`` (1.4826 x median
        absolute deviation, mag), ``mean``, ``std`` (mag).
    """
    mt = np.asarray(mag_true, float)
    d = np.asarray(mag_meas, float) - mt
    edges = np.asarray(edges, float)
    ok = np.isfinite(d) & np.isfinite(mt)
    idx = np.digitize(mt[ok], edges) - 1
    d = d[ok]
    nb = edges.size - 1
    rows = {"n": np.zeros(nb, int), "median": np.full(nb, np.nan), "nmad": np.full(nb, np.nan),
            "mean": np.full(nb, np.nan), "std": np.full(nb, np.nan)}
    for b in range(nb):
        x = d[idx == b]
        rows["n"][b] = x.size
        if x.size:
            med = np.median(x)
            rows["median"][b] = med
            rows["nmad"][b] = _NMAD * np.median(np.abs(x - med))
            rows["mean"][b] = x.mean()
            rows["std"][b] = x.std(ddof=1) if x.size > 1 else np.nan
    t = Table()
    t["mag_lo"], t["mag_hi"] = edges[:-1], edges[1:]
    t["mag_mid"] = 0.5 * (edges[:-1] + edges[1:])
    for key, v in rows.items():
        t[key] = v
    return t


# --------------------------------------------------------------------------------------------
# completeness fits
# --------------------------------------------------------------------------------------------
def completeness_model(mag, model: str, c0: float, m_t: float, width: float):
    """Completeness curve C(m) (dimensionless).

    ``logistic``: C = c0 / (1 + exp((m - m_t) / width));
    ``erf``: C = c0 / 2 erfc((m - m_t) / (sqrt(2) width)) (Fleming et al. 1995, AJ 109, 1044).
    In both, C(m_t) = c0 / 2; c0 is the bright-end plateau, width in mag.
    """
    with np.errstate(divide="ignore", invalid="ignore"):  # width -> 0 is a step, tried by fits
        u = (np.asarray(mag, float) - m_t) / width
    if model == "logistic":
        return c0 * special.expit(-u)
    if model == "erf":
        return 0.5 * c0 * special.erfc(u / np.sqrt(2.0))
    raise ValueError(f"'model' must be 'logistic' or 'erf', got {model!r}")


def _limit(model, c0, m_t, width, p):
    """Magnitude where C(m) = p (NaN if the plateau c0 <= p)."""
    if c0 <= p:
        return np.nan
    if model == "logistic":
        return m_t + width * np.log(c0 / p - 1.0)
    return m_t + np.sqrt(2.0) * width * special.erfcinv(2.0 * p / c0)


#: smallest goodness-of-fit p-value of a fit whose limits are quoted: a fit rejected at 1%
#: does not describe the data (choice of this project)
FIT_P_MIN = 0.01
#: fewest sources per magnitude bin of the goodness-of-fit test and of the bracketing rule;
#: the chi2 law of the deviance needs several expected counts per bin (McCullagh & Nelder
#: 1989, sec. 4.4.3), and a fraction from fewer than 10 sources says little (common practice)
BIN_MIN_N = 10
#: largest 1-sigma error (mag) of a quoted limit: beyond a factor 1.6 in flux a "limit" no
#: longer tells depths apart (choice of this project)
LIMIT_ERR_MAX = 0.5
#: width (mag) of the fine bins merged into the goodness-of-fit bins
GOF_STEP = 0.25


@dataclass(frozen=True)
class CompletenessFit:
    """Maximum-likelihood completeness curve.

    Attributes
    ----------
    model : str
        ``logistic`` or ``erf``.
    c0, m_t, width : float
        Plateau (0..1), transition magnitude (AB, C = c0/2) and width (mag).
    cov : ndarray (3, 3)
        Covariance of (c0, m_t, width).
    m50, m50_err, m90, m90_err : float (AB mag)
        Magnitudes where C = 0.5 and 0.9 with 1-sigma errors; NaN where not quoted (module
        docstring), the reason then in ``m50_reason`` / ``m90_reason``.
    n : int
        Number of Bernoulli trials fitted.
    deviance : float
        Binomial deviance of the binned counts against the saturated model.
    dof : int
        Its degrees of freedom (bins - fitted parameters).
    p_value : float
        P(chi2_dof > deviance); NaN when dof < 1.
    m50_reason, m90_reason : str or None
        Why the limit is not quoted (None when it is).
    """

    model: str
    c0: float
    m_t: float
    width: float
    cov: np.ndarray
    m50: float
    m50_err: float
    m90: float
    m90_err: float
    n: int
    deviance: float = np.nan
    dof: int = 0
    p_value: float = np.nan
    m50_reason: str | None = None
    m90_reason: str | None = None

    def __call__(self, mag):
        """Completeness at ``mag`` (AB)."""
        return completeness_model(mag, self.model, self.c0, self.m_t, self.width)

    @property
    def describes_data(self) -> bool:
        """Whether the goodness-of-fit test passed (p >= :data:`FIT_P_MIN`)."""
        return bool(self.p_value >= FIT_P_MIN)

    def as_dict(self) -> dict:
        """Plain dict for JSON (limits not quoted are None, with their reason)."""
        err = np.sqrt(np.clip(np.diag(self.cov), 0, None))
        d = {"model": self.model, "c0": self.c0, "c0_err": float(err[0]), "m_t": self.m_t,
             "m_t_err": float(err[1]), "width": self.width, "width_err": float(err[2]),
             "n": self.n, "deviance": self.deviance, "dof": self.dof, "p_value": self.p_value}
        for key in ("m50", "m90"):
            reason = getattr(self, f"{key}_reason")
            d[key] = None if reason else getattr(self, key)
            d[f"{key}_err"] = None if reason else getattr(self, f"{key}_err")
            d[f"{key}_reason"] = reason
        return d


def gof_bins(mag, step: float = GOF_STEP, n_min: int = BIN_MIN_N) -> np.ndarray:
    """Magnitude bin edges holding at least ``n_min`` sources each.

    Bins of ``step`` mag from the brightest source are merged with their fainter neighbours
    until each holds ``n_min`` sources; a short remainder joins the last bin.

    Parameters
    ----------
    mag : array_like (AB mag)
        Finite magnitudes.
    step : float (mag)
    n_min : int

    Returns
    -------
    ndarray (AB mag)
        Increasing edges (a single bin if there are fewer than ``2 n_min`` sources).
    """
    m = np.sort(np.asarray(mag, float))
    lo = np.floor(m[0] / step) * step
    fine = lo + step * np.arange(int(np.floor((m[-1] - lo) / step)) + 2)
    counts, _ = np.histogram(m, fine)
    edges, run = [fine[0]], 0
    for hi, c in zip(fine[1:], counts):
        run += c
        if run >= n_min:
            edges.append(hi)
            run = 0
    if run and len(edges) > 1:
        edges[-1] = fine[-1]
    elif run:
        edges.append(fine[-1])
    return np.asarray(edges, float)


def binned_deviance(mag, detected, curve, edges):
    """Binomial deviance of binned counts against the saturated model.

    Parameters
    ----------
    mag : array_like (AB mag)
    detected : array_like of bool
    curve : callable mag -> probability
        Fitted completeness; E = sum of C(m) over the sources of a bin.
    edges : array_like (AB mag)
        Bin edges (:func:`gof_bins`).

    Returns
    -------
    deviance : float
        D = 2 sum [k ln(k/E) + (n-k) ln((n-k)/(n-E))], 0 ln 0 = 0 (McCullagh & Nelder 1989,
        sec. 4.4.3).
    n_bins : int
        Bins holding sources.
    """
    m = np.asarray(mag, float)
    k = np.asarray(detected, bool).astype(float)
    b = np.clip(np.digitize(m, edges) - 1, 0, len(edges) - 2)
    nb = len(edges) - 1
    n = np.bincount(b, minlength=nb).astype(float)
    kk = np.bincount(b, weights=k, minlength=nb)
    e = np.bincount(b, weights=np.clip(curve(m), 1e-12, 1 - 1e-12), minlength=nb)
    use = n > 0
    n, kk, e = n[use], kk[use], e[use]
    dev = 2.0 * np.sum(special.xlogy(kk, kk / e) + special.xlogy(n - kk, (n - kk) / (n - e)))
    return float(max(dev, 0.0)), int(use.sum())


def _limit_reason(value, err, p, frac, lo, hi, n, p_value, dof):
    """Why a limit at level ``p`` cannot be quoted (None if it can); rules of the module."""
    if dof < 1:
        return f"too few magnitude bins of {BIN_MIN_N}+ sources to test the fit ({dof} dof)"
    if not p_value >= FIT_P_MIN:
        return (f"the fit does not describe the data (binomial deviance p = {p_value:.2g} < "
                f"{FIT_P_MIN:g}, {dof} dof)")
    if not np.isfinite(value):
        return f"the fitted plateau never reaches {p:g}"
    full = n >= BIN_MIN_N
    brighter = np.any(full & (hi <= value) & (frac >= p))
    fainter = np.any(full & (lo >= value) & (frac <= p))
    if not (brighter and fainter):
        return (f"the data do not bracket {p:g} at {value:.2f} (need a bin of {BIN_MIN_N}+ "
                f"sources at or above {p:g} brighter and one at or below fainter)")
    if not np.isfinite(err):
        return "uncertainty undefined (singular curvature of the likelihood)"
    if err > LIMIT_ERR_MAX:
        return f"uncertainty {err:.2f} mag exceeds {LIMIT_ERR_MAX:g} mag"
    return None


# plateau c0 = expit(12) = 1 - 6e-6: closer to 1 counts as "at the boundary"
_LOGIT_PLATEAU_MAX = 12.0


def _unpack(theta):
    # c0 in (0, 1) through a logistic, width > 0 through a log
    return special.expit(theta[0]), theta[1], np.exp(theta[2])


def _hessian(f, x, h):
    n = x.size
    hess = np.empty((n, n))
    for i in range(n):
        for j in range(i, n):
            ei, ej = np.eye(n)[i] * h[i], np.eye(n)[j] * h[j]
            v = (f(x + ei + ej) - f(x + ei - ej) - f(x - ei + ej) + f(x - ei - ej)) / (4 * h[i] * h[j])
            hess[i, j] = hess[j, i] = v
    return hess


def fit_completeness(mag, detected, model: str = "logistic") -> CompletenessFit:
    """Maximum-likelihood fit of a completeness curve to Bernoulli outcomes.

    Parameters
    ----------
    mag : array_like (AB mag)
        True (observed-frame) magnitude of each input source.
    detected : array_like of bool
        Whether it was recovered.
    model : str
        ``logistic`` or ``erf`` (:func:`completeness_model`).

    Returns
    -------
    CompletenessFit
        Parameters, covariance (inverse Hessian of -ln L, transformed back by the Jacobian),
        the goodness of fit, and the 50% / 90% magnitudes with delta-method errors where the
        rules of the module docstring allow them (NaN with a reason otherwise).
    """
    if model not in ("logistic", "erf"):
        raise ValueError(f"'model' must be 'logistic' or 'erf', got {model!r}")
    m = np.asarray(mag, float)
    k = np.asarray(detected, bool)
    ok = np.isfinite(m)
    m, k = m[ok], k[ok].astype(float)
    if m.size < 5 or k.sum() == 0 or k.sum() == k.size:
        raise ValueError("completeness fit needs at least 5 sources, some detected and some not")
    eps = 1e-12

    def nll(theta):
        c = np.clip(completeness_model(m, model, *_unpack(theta)), eps, 1 - eps)
        return -np.sum(k * np.log(c) + (1 - k) * np.log1p(-c))

    # start: plateau = fraction among the brightest quarter, m_t where the running fraction halves
    order = np.argsort(m)
    c_start = min(max(k[order[: max(1, m.size // 4)]].mean(), 0.55), 0.99)
    m_start = float(np.median(m[k > 0])) if k.sum() else float(np.median(m))
    best = None
    for m0 in (m_start, float(np.median(m)), float(np.percentile(m, 75))):
        for w0 in (0.2, 0.6):
            th0 = np.array([special.logit(c_start), m0, np.log(w0)])
            r = optimize.minimize(nll, th0, method="Nelder-Mead",
                                  options={"xatol": 1e-7, "fatol": 1e-9, "maxiter": 8000})
            if best is None or r.fun < best.fun:
                best = r
    r = optimize.minimize(nll, best.x, method="BFGS")
    theta = r.x if r.fun <= best.fun else best.x
    h = np.array([1e-3, 1e-3 * max(np.exp(theta[2]), 0.05), 1e-3])
    # a plateau at the boundary (c0 -> 1) has no curvature: fix it there, and give the other
    # two parameters their conditional errors
    free = np.arange(3)
    if theta[0] > _LOGIT_PLATEAU_MAX:
        theta[0] = _LOGIT_PLATEAU_MAX
        free = np.arange(1, 3)
    c0, m_t, width = _unpack(theta)
    cov_t = np.zeros((3, 3))
    sub = free[:, None], free[None, :]

    def nll_free(x):
        th = theta.copy()
        th[free] = x
        return nll(th)

    try:
        cov_t[sub] = np.linalg.inv(_hessian(nll_free, theta[free], h[free]))
    except np.linalg.LinAlgError:
        cov_t[sub] = np.nan

    # Jacobian of (c0, m_t, width) and of the limits with respect to theta
    jac = np.diag([c0 * (1 - c0), 1.0, width])
    cov = jac @ cov_t @ jac.T
    out = {}
    for p in (0.5, 0.9):
        val = _limit(model, c0, m_t, width, p)
        if np.isfinite(val):
            g = np.zeros(3)
            for i in free:
                d = np.zeros(3)
                d[i] = h[i]
                g[i] = (_limit(model, *_unpack(theta + d), p)
                        - _limit(model, *_unpack(theta - d), p)) / (2 * h[i])
            err = float(np.sqrt(max(g @ cov_t @ g, 0.0)))
        else:
            err = np.nan
        out[p] = (float(val), err)
    # goodness of fit and the quoting rules (module docstring)
    edges = gof_bins(m)
    dev, n_bins = binned_deviance(m, k, lambda x: completeness_model(x, model, c0, m_t, width),
                                  edges)
    dof = n_bins - free.size
    p_value = float(stats.chi2.sf(dev, dof)) if dof >= 1 else np.nan
    b = np.clip(np.digitize(m, edges) - 1, 0, len(edges) - 2)
    nb = np.bincount(b, minlength=len(edges) - 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.bincount(b, weights=k, minlength=len(edges) - 1) / nb
    reasons = {p: _limit_reason(out[p][0], out[p][1], p, frac, edges[:-1], edges[1:], nb,
                                p_value, dof) for p in (0.5, 0.9)}
    quoted = {p: (out[p] if reasons[p] is None else (np.nan, np.nan)) for p in (0.5, 0.9)}
    return CompletenessFit(model, float(c0), float(m_t), float(width), cov,
                           quoted[0.5][0], quoted[0.5][1], quoted[0.9][0], quoted[0.9][1],
                           int(m.size), dev, int(dof), p_value, reasons[0.5], reasons[0.9])


# --------------------------------------------------------------------------------------------
# causes of false detections
# --------------------------------------------------------------------------------------------
def measure_spike_angles(psf, threshold: float = 3.0, r_in: float = 0.25, r_out: float = 0.48,
                         bin_deg: float = 2.0):
    """Directions of the diffraction spikes of a PSF image.

    In an annulus (``r_in`` .. ``r_out`` of the stamp size), each pixel is divided by the median
    of the pixels at its radius; azimuth bins whose median ratio exceeds ``threshold`` are spikes.

    Parameters
    ----------
    psf : ndarray, shape (n, n)
        PSF image, centred, in the mosaic's pixel orientation.
    threshold : float
        Contrast over the azimuthal median that makes a spike.
    r_in, r_out : float
        Annulus radii as fractions of the stamp side.
    bin_deg : float (deg)
        Azimuth bin size.

    Returns
    -------
    ndarray (deg)
        Bin-centre angles of the spikes, counter-clockwise from the +x axis, in [0, 360).
    """
    psf = np.asarray(psf, float)
    ny, nx = psf.shape
    y, x = np.mgrid[0:ny, 0:nx]
    cy, cx = np.unravel_index(np.argmax(psf), psf.shape)
    dx, dy = x - cx, y - cy
    r = np.hypot(dx, dy)
    side = min(nx, ny)
    ring = (r >= r_in * side) & (r <= r_out * side)
    if ring.sum() < 50:
        return np.zeros(0)
    ri = np.round(r[ring]).astype(int)
    vals = psf[ring]
    ratio = np.empty_like(vals)
    for rr in np.unique(ri):
        sel = ri == rr
        med = np.median(vals[sel])
        ratio[sel] = vals[sel] / med if med > 0 else np.where(vals[sel] > 0, np.inf, 0.0)
    ang = np.degrees(np.arctan2(dy[ring], dx[ring])) % 360.0
    nb = int(round(360.0 / bin_deg))
    ib = np.minimum((ang / bin_deg).astype(int), nb - 1)
    centres = (np.arange(nb) + 0.5) * bin_deg
    med_ratio = np.array([np.median(ratio[ib == b]) if np.any(ib == b) else 0.0
                          for b in range(nb)])
    return centres[med_ratio > threshold]


def classify_false_detections(det_x, det_y, det_truth, img_x, img_y, img_source, img_mag,
                              img_is_star, source_recovered: dict | np.ndarray,
                              pixel_scale_arcsec: float, *, truth_segm=None, dq=None,
                              spike_angles_deg=(), bright_star_mag: float = 22.0,
                              spike_ref_mag: float = 18.0, spike_length_arcsec: float = 6.0,
                              halo_radius_arcsec: float = 1.5, spike_half_width_deg: float = 4.0,
                              blend_radius_arcsec: float = 0.5):
    """Likely cause of every unmatched detection.

    Rules, first that applies wins (:data:`FALSE_CAUSES`):

    1. ``artefact``: a data-quality flag is set at the detection's pixel (``dq != 0``).
    2. ``spike``: near a truth star brighter than ``bright_star_mag``: within its halo radius, or
       within its spike length and inside ``spike_half_width_deg`` of a spike direction. Both
       radii scale as 10^(-0.2 (m - spike_ref_mag)), i.e. as the square root of the star's flux:
       the diffraction wings fall off as r^-2 (Born & Wolf sec. 8.5, far-field envelope of an
       edge), so the radius where they drop to a fixed threshold grows as sqrt(flux).
    3. ``shred``: the truth segmentation at the detection belongs to a source already recovered
       (a piece of an extended galaxy or lensed arc); without a segmentation map, the only truth
       image within ``blend_radius_arcsec`` belongs to a recovered source.
    4. ``blend``: two or more truth images within ``blend_radius_arcsec``, or the truth
       segmentation (or the single nearby truth image) belongs to a source not recovered: real
       light whose centroid is pulled off by a neighbour.
    5. ``noise``: none of the above.

    Parameters
    ----------
    det_x, det_y : array_like (0-based pixels)
        Detection positions on the mosaic.
    det_truth : array_like of int
        Matched truth-image row per detection, -1 if unmatched.
    img_x, img_y : array_like (0-based pixels)
        Truth image positions.
    img_source : array_like of int
        Truth source id of each image.
    img_mag : array_like (AB mag)
        Observed magnitude of each image.
    img_is_star : array_like of bool
        Whether the image is of a foreground star.
    source_recovered : dict {source id: bool}
        Whether each truth source was recovered (any image matched).
    pixel_scale_arcsec : float (arcsec/pixel)
        Mosaic pixel side.
    truth_segm, dq : ndarray of int, optional
        Truth segmentation (source ids, 0 = none) and data-quality map on the mosaic grid.
    spike_angles_deg : sequence of float (deg)
        Spike directions counter-clockwise from the mosaic +x axis.
    bright_star_mag, spike_ref_mag : float (AB mag)
    spike_length_arcsec, halo_radius_arcsec, blend_radius_arcsec : float (arcsec)
    spike_half_width_deg : float (deg)

    Returns
    -------
    ndarray of str
        Cause per detection; ``""`` for matched detections.
    """
    from scipy.spatial import cKDTree

    dx_ = np.asarray(det_x, float)
    dy_ = np.asarray(det_y, float)
    un = np.asarray(det_truth) < 0
    cause = np.full(dx_.size, "", dtype="<U8")
    cause[un] = "noise"
    idx = np.flatnonzero(un)
    if idx.size == 0:
        return cause
    ux, uy = dx_[idx], dy_[idx]
    undecided = np.ones(idx.size, bool)

    def _pix(img, x, y):
        ny, nx = img.shape
        ix = np.clip(np.round(x).astype(int), 0, nx - 1)
        iy = np.clip(np.round(y).astype(int), 0, ny - 1)
        return img[iy, ix]

    def _set(mask, name):
        m = mask & undecided
        cause[idx[m]] = name
        undecided[m] = False

    if dq is not None:
        _set(_pix(np.asarray(dq), ux, uy) != 0, "artefact")

    ix_, iy_ = np.asarray(img_x, float), np.asarray(img_y, float)
    isrc = np.asarray(img_source)
    star = np.asarray(img_is_star, bool) & (np.asarray(img_mag, float) < bright_star_mag)
    spike = np.zeros(idx.size, bool)
    angles = np.asarray(list(spike_angles_deg), float)
    for sx, sy, sm in zip(ix_[star], iy_[star], np.asarray(img_mag, float)[star]):
        scale = 10.0 ** (-0.2 * (sm - spike_ref_mag))
        ddx, ddy = ux - sx, uy - sy
        r = np.hypot(ddx, ddy) * pixel_scale_arcsec
        near = r <= halo_radius_arcsec * scale
        if angles.size:
            phi = np.degrees(np.arctan2(ddy, ddx))
            dphi = np.abs((phi[:, None] - angles[None, :] + 180.0) % 360.0 - 180.0)
            along = dphi.min(axis=1) <= spike_half_width_deg
            near |= along & (r <= spike_length_arcsec * scale)
        spike |= near
    _set(spike, "spike")

    rec = source_recovered
    is_rec = np.vectorize(lambda s: bool(rec.get(int(s), False)), otypes=[bool])
    n_near = np.zeros(idx.size, int)
    near_src = np.full(idx.size, -1)
    if ix_.size:
        tree = cKDTree(np.column_stack([ix_, iy_]))
        lists = tree.query_ball_point(np.column_stack([ux, uy]),
                                      blend_radius_arcsec / pixel_scale_arcsec)
        n_near = np.array([len(v) for v in lists], int)
        near_src = np.array([isrc[v[0]] if len(v) == 1 else -1 for v in lists])
    if truth_segm is not None:
        seg = _pix(np.asarray(truth_segm), ux, uy)
        has = seg > 0
        seg_rec = np.zeros(idx.size, bool)
        if has.any():
            seg_rec[has] = is_rec(seg[has])
        _set(has & seg_rec, "shred")
        _set((n_near >= 2) | (has & ~seg_rec), "blend")
    one = n_near == 1
    one_rec = np.zeros(idx.size, bool)
    if one.any():
        one_rec[one] = is_rec(near_src[one])
    _set(one & one_rec & (n_near < 2), "shred")
    _set((n_near >= 2) | (one & ~one_rec), "blend")
    return cause
