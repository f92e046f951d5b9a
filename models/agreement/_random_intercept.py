"""A straight line with a random intercept per group, fitted by REML from per-group sums.

The model ``y_ij = b0 + b1 x_ij + u_i + e_ij`` with ``u_i ~ N(0, tau^2)`` and ``e_ij ~ N(0, sigma^2)``
is what statsmodels ``MixedLM(y, [1, x], groups).fit(reml=True)`` fits; this is the same REML
estimate, computed exactly rather than by a general optimiser. Within group ``i`` (``m_i``
observations) the covariance is ``sigma^2 (I + g J)`` with ``g = tau^2 / sigma^2``, whose inverse is
``I - c_i J`` with ``c_i = g / (1 + g m_i)`` and whose log-determinant is ``log(1 + g m_i)``
(Sherman-Morrison; compound symmetry). Everything the REML log-likelihood needs is therefore a
function of per-group sums (count, sums of 1 and x, sum of y) and of the overall cross products, so
the likelihood profiled over the error variance and the fixed effects,

    l(g) = -(n - p)/2 log R(g) - 1/2 sum log(1 + g m_i) - 1/2 log det X'V^-1 X,

(``R`` the generalised residual sum of squares at the GLS fixed effects, ``p = 2``) costs O(groups)
per value of ``g``. It is evaluated on a grid of ``g`` (all values at once), and its derivative's
root is then found by Brent's method in the bracket around the best grid point, to about 1e-13
relative in ``g``. The fixed-effect standard errors follow statsmodels: the inverse of minus the
Hessian of the scale-profiled log-likelihood in (b0, b1, g) (``MixedLM.hessian``, written out here
for compound symmetry), Wald intervals and p-values on the normal distribution.

Where statsmodels' optimiser converges the two agree to its tolerance; where it stops early
(``ConvergenceWarning``) this estimate has the higher REML likelihood (tests compare both).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import optimize, stats

__all__ = ["random_intercept_line"]

_GRID = np.logspace(-10, 8, 73)  # variance ratios tau^2 / sigma^2 searched before the root is polished
_P = 2  # fixed effects: intercept and slope


class _Sums:
    """Per-group and overall sums of a centred (x, y) for the closed-form likelihood."""

    def __init__(self, y: NDArray[np.float64], x: NDArray[np.float64], codes: NDArray[np.intp]) -> None:
        self.x_mean, self.y_mean = float(x.mean()), float(y.mean())
        xc, yc = x - self.x_mean, y - self.y_mean
        k = int(codes.max()) + 1
        self.y, self.design, self.codes, self.k = yc, np.column_stack([np.ones_like(xc), xc]), codes, k
        self.m = np.bincount(codes, minlength=k).astype(np.float64)
        self.t = np.stack([self.m, np.bincount(codes, weights=xc, minlength=k)], axis=1)  # X_i' 1, (k, 2)
        self.sy = np.bincount(codes, weights=yc, minlength=k)
        self.xtx = self.design.T @ self.design
        self.xty = self.design.T @ yc
        self.yty = float(yc @ yc)
        self.n = int(yc.size)

    def gls(self, g: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64],
                                                   NDArray[np.float64]]:
        """For each variance ratio in ``g`` (shape (G,)): X'V^-1 X (G, 2, 2), the GLS fixed effects
        (G, 2), R (G,) and the group sums of the GLS residuals (G, k)."""
        c = g[:, None] / (1.0 + g[:, None] * self.m[None, :])  # (G, k)
        xvx = self.xtx[None] - np.einsum("gk,ka,kb->gab", c, self.t, self.t)
        xvy = self.xty[None] - np.einsum("gk,ka,k->ga", c, self.t, self.sy)
        beta = np.linalg.solve(xvx, xvy[..., None])[..., 0]
        resid_sum = self.sy[None, :] - np.einsum("ka,ga->gk", self.t, beta)
        rss = self.yty - (c * self.sy[None, :] ** 2).sum(axis=1) - (beta * xvy).sum(axis=1)
        return xvx, beta, rss, resid_sum

    def loglike(self, g: NDArray[np.float64]) -> NDArray[np.float64]:
        """The profiled REML log-likelihood (up to a constant) at each ratio in ``g``."""
        xvx, _, rss, _ = self.gls(g)
        with np.errstate(invalid="ignore", divide="ignore"):
            value = (-0.5 * (self.n - _P) * np.log(rss) - 0.5 * np.log1p(g[:, None] * self.m[None, :]).sum(axis=1)
                     - 0.5 * np.linalg.slogdet(xvx)[1])
        return np.asarray(value, dtype=np.float64)

    def slope_of_loglike(self, g: float) -> float:
        """d l / d g (envelope theorem: the fixed effects are at their GLS value)."""
        xvx, _, rss, resid_sum = self.gls(np.array([g]))
        w2 = 1.0 / (1.0 + g * self.m) ** 2
        a1 = (self.t * w2[:, None]).T @ self.t
        d_rss = -float((w2 * resid_sum[0] ** 2).sum())
        return float(-0.5 * (self.n - _P) * d_rss / rss[0] - 0.5 * (self.m / (1.0 + g * self.m)).sum()
                     + 0.5 * np.trace(np.linalg.solve(xvx[0], a1)))


def _ratio(sums: _Sums) -> tuple[float, bool]:
    """The REML variance ratio tau^2 / sigma^2 (>= 0) and whether its search ended at a stationary point
    (or at the boundary g = 0 with the likelihood falling from there)."""
    values = sums.loglike(_GRID)
    if not np.isfinite(values).any():
        return float("nan"), False
    best = int(np.nanargmax(values))
    if best == 0 and sums.slope_of_loglike(0.0) <= 0.0:
        return 0.0, True
    low = 0.0 if best == 0 else float(_GRID[best - 1])
    high = float(_GRID[min(best + 1, _GRID.size - 1)])
    f_low, f_high = sums.slope_of_loglike(low), sums.slope_of_loglike(high)
    if not (f_low > 0.0 > f_high):
        return float(_GRID[best]), False
    root, info = optimize.brentq(sums.slope_of_loglike, low, high, xtol=1e-300, rtol=1e-13, maxiter=200,
                                 full_output=True, disp=False)
    return float(root), bool(info.converged)


def random_intercept_line(y: NDArray[np.float64], x: NDArray[np.float64], codes: NDArray[np.intp],
                          alpha: float) -> dict[str, Any]:
    """REML fit of ``y ~ x`` with a random intercept per group.

    Parameters
    ----------
    y, x : ndarray of shape (n,)
        Finite values.
    codes : ndarray of intp, shape (n,)
        Group of each observation, coded 0 .. k-1 (every code present).
    alpha : float
        1 - level of the slope's Wald interval.

    Returns
    -------
    dict
        ``intercept``, ``slope``, ``slope_ci`` (low, high), ``p_value`` (two-sided Wald, normal),
        ``converged`` (the likelihood's maximum was located), ``variance_ratio`` (tau^2 / sigma^2)
        and ``scale`` (sigma^2).

    Raises
    ------
    numpy.linalg.LinAlgError
        For a singular design or Hessian.
    """
    sums = _Sums(np.asarray(y, dtype=np.float64), np.asarray(x, dtype=np.float64), np.asarray(codes))
    if np.linalg.matrix_rank(sums.design) < _P:
        raise np.linalg.LinAlgError("Singular matrix")
    least_squares = sums.y - sums.design @ np.linalg.lstsq(sums.design, sums.y, rcond=None)[0]
    if not float(least_squares @ least_squares) > 1e-24 * max(sums.yty, 1.0):  # y is a line in x: nothing to fit
        raise np.linalg.LinAlgError("Singular matrix")
    g, converged = _ratio(sums)
    if not np.isfinite(g):
        raise np.linalg.LinAlgError("Singular matrix")
    xvx3, beta3, _, resid_sum3 = sums.gls(np.array([g]))
    xvx, beta, s = xvx3[0], beta3[0], resid_sum3[0]
    # R from the residuals themselves (no cancellation between large sums)
    resid = sums.y - sums.design @ beta
    rss = float(resid @ resid - (g / (1.0 + g * sums.m) * s**2).sum())
    fac = sums.n - _P
    m, t = sums.m, sums.t
    w2, w3 = 1.0 / (1.0 + g * m) ** 2, 1.0 / (1.0 + g * m) ** 3
    b_term = float((w2 * s**2).sum())
    d_term = float((2.0 * m * w3 * s**2).sum())
    a1 = (t * w2[:, None]).T @ t
    a2 = (t * (2.0 * m * w3)[:, None]).T @ t
    q = np.linalg.solve(xvx, a1)
    hessian = np.zeros((3, 3))
    hessian[:2, :2] = -fac * xvx / rss
    hessian[:2, 2] = hessian[2, :2] = -fac * (t * (w2 * s)[:, None]).sum(axis=0) / rss
    hessian[2, 2] = (0.5 * float((m**2 * w2).sum()) - 0.5 * fac * (d_term / rss - b_term**2 / rss**2)
                     + 0.5 * (float(np.trace(q @ q)) - float(np.trace(np.linalg.solve(xvx, a2)))))
    cov = np.linalg.inv(-hessian)
    slope = float(beta[1])
    se = float(np.sqrt(cov[1, 1])) if cov[1, 1] > 0 else float("nan")
    z = float(stats.norm.ppf(1.0 - alpha / 2.0))
    return {"intercept": float(beta[0]) + sums.y_mean - slope * sums.x_mean, "slope": slope,
            "slope_ci": (slope - z * se, slope + z * se), "p_value": float(2.0 * stats.norm.sf(abs(slope / se))),
            "converged": converged, "variance_ratio": g, "scale": rss / fac}
