"""Completeness curves: maximum-likelihood fits and the rules for quoting their limits.

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
   neighbours until each holds at least :data:`BIN_MIN_N` sources. With thousands of sources
   the test rejects any smooth two- or three-parameter form for departures far too small to
   move a limit, so a fit also counts as describing the data when no such bin's fraction lies
   both more than :data:`FIT_TOLERANCE` and more than 3 binomial sigma, sqrt(C (1 - C) / n),
   from the curve (common practice: a limit is read off a curve that follows the points);
2. the data cross the level: a bin wholly brighter than the limit has k/n >= the level and a bin
   wholly fainter has k/n <= the level (both with at least :data:`BIN_MIN_N` sources);
3. its 1-sigma uncertainty is at most :data:`LIMIT_ERR_MAX` mag.

Otherwise the limit is NaN (null in JSON) with the reason in ``m50_reason`` / ``m90_reason``.

Units: magnitudes AB (widths in mag), completeness dimensionless.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, special, stats

__all__ = ["FIT_P_MIN", "FIT_TOLERANCE", "BIN_MIN_N", "LIMIT_ERR_MAX", "GOF_STEP", "CompletenessFit",
           "completeness_model", "gof_bins", "binned_deviance", "fit_completeness"]


def completeness_model(mag, model: str, c0: float, m_t: float, width: float):
    """Completeness curve C(m) (dimensionless).

    ``logistic``: C = c0 / (1 + exp((m - m_t) / width));
    ``erf``: C = c0 / 2 erfc((m - m_t) / (sqrt(2) width)) (Fleming et al. 1995, AJ 109, 1044).
    In both, C(m_t) = c0 / 2; c0 is the bright-end plateau, width in mag.
    """
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # width -> 0: a step
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
#: Largest |observed - fitted| completeness of a bin for a fit rejected by the deviance test
#: to still describe the data (rule 1 of the module docstring).
FIT_TOLERANCE = 0.05
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


def _limit_reason(value, err, p, frac, lo, hi, n, p_value, dof, max_resid=np.inf):
    """Why a limit at level ``p`` cannot be quoted (None if it can); rules of the module.
    ``max_resid``: largest significant |observed - fitted| fraction of a bin of BIN_MIN_N+
    sources (rule 1)."""
    if dof < 1:
        return f"too few magnitude bins of {BIN_MIN_N}+ sources to test the fit ({dof} dof)"
    if not (p_value >= FIT_P_MIN or max_resid <= FIT_TOLERANCE):
        return (f"the fit does not describe the data (binomial deviance p = {p_value:.2g} < "
                f"{FIT_P_MIN:g}, {dof} dof, and a bin lies {max_resid:.2f} (> 3 sigma) from the curve)")
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
    curve = np.bincount(b, weights=completeness_model(m, model, c0, m_t, width),
                        minlength=len(edges) - 1)
    full = nb >= BIN_MIN_N
    with np.errstate(invalid="ignore", divide="ignore"):
        c_fit = curve / nb
        resid = np.abs(frac - c_fit)
        # a departure counts only if it is also significant (3 binomial sigma)
        resid = np.where(resid > 3 * np.sqrt(c_fit * (1 - c_fit) / nb), resid, 0.0)[full]
    max_resid = float(resid.max()) if resid.size else np.inf
    reasons = {p: _limit_reason(out[p][0], out[p][1], p, frac, edges[:-1], edges[1:], nb,
                                p_value, dof, max_resid) for p in (0.5, 0.9)}
    quoted = {p: (out[p] if reasons[p] is None else (np.nan, np.nan)) for p in (0.5, 0.9)}
    return CompletenessFit(model, float(c0), float(m_t), float(width), cov,
                           quoted[0.5][0], quoted[0.5][1], quoted[0.9][0], quoted[0.9][1],
                           int(m.size), dev, int(dof), p_value, reasons[0.5], reasons[0.9])
