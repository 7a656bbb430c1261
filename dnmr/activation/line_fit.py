"""Straight lines in 1/T through rates: the Eyring and Arrhenius fits with rate and temperature errors.

Method
------
The Eyring equation k = kappa (kB T / h) exp(ΔS‡/R) exp(-ΔH‡/RT) is a straight line

    ln(k/T) = [ln(kappa kB / h) + ΔS‡/R] - (ΔH‡/R) (1/T),

fitted by generalised least squares: the residuals of ln(k/T) have the covariance

    V = diag(sigma_i^2) + G C_T G,   sigma_i = rate_stderr_i / rate_i (the standard error of ln k_i),

where C_T is the covariance of the temperatures (K^2) and G = diag(dr_i/dT_i), dr/dT = -1/T + slope/T^2
the change of a point's residual with its temperature (linearised; iterated with the slope, effective
variance). The estimate is (X^T V^-1 X)^-1 X^T V^-1 y with covariance (X^T V^-1 X)^-1, and the
goodness of fit is chi-square = r^T V^-1 r with n - 2 degrees of freedom. ΔH‡ = -R * slope,
ΔS‡ = R * (intercept - ln(kappa kB/h)); ΔG‡(T) = ΔH‡ - T ΔS‡ with its standard error from the full
covariance of slope and intercept. The Arrhenius line ln k = ln A - Ea/(RT) is fitted the same way.
Energies in kJ/mol (kcal/mol alongside), entropies in J/(mol K).

Temperature errors
------------------
C_T = diag(independent^2) + F F^T: an independent error per point (a ``temperature_stderr`` column or
value, the scatter of a calibration's points about its curve) plus a few *shared* columns F — the
uncertainty of a calibration curve (one column per coefficient) and an unknown probe offset
(``temperature_offset_stderr``: one column, the same in every row). A shared error moves every point
together; it is not scatter and does not inflate the chi-square. C_T is never formed as a dense n x n
matrix: V^-1 is applied by the Woodbury identity, so a table of thousands of rows costs a few vectors.
Because the estimate is linear in the data, its covariance splits exactly into the shares of the rates,
of the independent temperature errors and of each shared source (``error_shares``).

Rate errors shared through held trends
--------------------------------------
``dnmr fit`` holds the shifts, couplings, populations and linewidth of the faster spectra at trends
taken from the slow-exchange spectra, and the trends' errors go into every one of those rates at once
(the linewidth's, fitted jointly with the slow-exchange rates, also into those rates). Its
``rates.csv`` gives these parts (``log10_rate_shared_<source>`` columns: u_ij, log10 k, for each
independent source j of a trend's error; the rest of ``rate_stderr`` is the spectrum's own). The
line keeps the weights 1/sigma_i^2 of the rate errors as given, and its covariance adds A U U^T A^T
("held trends" in ``error_shares``, U the shared parts in ln k, A the linear map of the fit) while the
rate part keeps only what is not shared: counted as independent, the shared parts would average away
over the rows although they move the whole line.  The shared parts are kept out of the weights on
purpose: they are linearised sensitivities of rates that depend on the held values far from linearly
past coalescence, and a generalised least-squares fit trusting them pulls the line by their curvature
(measured on the realistic series of the tests: dH‡ biased by about 1.7 of its standard errors).
What is judged against the errors counts them as correlated too (``LineFit.full_covariance``): the
chi-square is the generalised least-squares minimum under the full covariance (the line takes up most of
a shared part, so counted as independent they would make the rates look to scatter far less than their
errors), and the studentised residuals divide by the variance the residuals of the weighted line have
under it.

Standard errors
---------------
* Rate errors given (every rate has ``rate_stderr``): the errors are taken at face value (covariance not
  rescaled) and the reduced chi-square is reported with its p-value; a poor value raises a warning.
  ``scale_errors=True`` multiplies the covariance by the reduced chi-square instead.
* No rate errors: ordinary least squares, and the rate part of the errors comes from the residual scatter
  (needs at least 3 rates; with 2 the errors are reported as not determined). That scatter already holds
  the independent temperature errors, so only the shared ones are added (through the same linear map).

Residuals
---------
Outliers are flagged by studentised residuals (beyond 3 standard deviations by default, common
practice; judged one at a time so that one gross outlier does not make its neighbours look bad), never
removed. Each residual is divided by its standard deviation under the full covariance (shared errors
correlated), and with errors of unknown scale also by the scatter without it (externally studentised:
the chi-square without the point, by the mean-shift drop that reduces to the textbook weighted
least-squares formula without shared errors).
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
from scipy import stats

from dnmr.activation.rates import RateSeries
from dnmr.kinetics import GAS_CONSTANT

#: Where the standard errors of a fit come from (``EyringResult.error_basis``): the rate errors as given,
#: the rate errors scaled by the reduced chi-square (``scale_errors``), or the scatter about the line.
BASIS_GIVEN = "given rate errors"
BASIS_SCALED = "given rate errors, scaled by the reduced chi-square"
BASIS_SCATTER = "scatter of the rates about the line"
OUTLIER_THRESHOLD = 3.0  # common practice for studentised residuals
LEVERAGE_TOLERANCE = 1e-9  # 1 - h below this: the point fixes the line, its residual cannot be judged
SLOPE_TOLERANCE = 1e-9  # relative change of the slope that ends the effective-variance iteration (rounding
# leaves about 1e-10 on tens of thousands of rows)
MAX_ITERATIONS = 50
OWN_VARIANCE_FLOOR = 1e-6  # least share of a rate's variance left independent when its shared parts are taken out


class Estimate(NamedTuple):
    """A value with its standard error (same unit)."""

    value: float | np.ndarray
    stderr: float | np.ndarray


@dataclass(frozen=True)
class ResidualCovariance:
    """Covariance of the residuals, diag(diagonal) + shared @ shared.T, applied without forming it.

    Attributes
    ----------
    diagonal : ndarray
        (n,) independent variances (positive).
    shared : ndarray
        (n, m) factor of the shared part, m small.
    """

    diagonal: np.ndarray
    shared: np.ndarray

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        """V^-1 rhs by the Woodbury identity: O(n m^2), never an n x n matrix."""
        d_rhs = rhs / (self.diagonal[:, None] if rhs.ndim == 2 else self.diagonal)
        if not self.shared.shape[1]:
            return d_rhs
        d_u, core = self._woodbury()
        return d_rhs - d_u @ np.linalg.solve(core, self.shared.T @ d_rhs)

    def _woodbury(self) -> tuple[np.ndarray, np.ndarray]:
        """D^-1 U and the core I + U^T D^-1 U of the Woodbury identity."""
        d_u = self.shared / self.diagonal[:, None]
        return d_u, np.eye(self.shared.shape[1]) + self.shared.T @ d_u

    def variances(self) -> np.ndarray:
        """Diagonal of V."""
        return self.diagonal + (self.shared**2).sum(axis=1)

    def inverse_diagonal(self) -> np.ndarray:
        """Diagonal of V^-1 (Woodbury), O(n m^2)."""
        d_u, core = self._woodbury()
        return 1.0 / self.diagonal - np.einsum("ij,ij->i", d_u @ np.linalg.inv(core), d_u)

    def correlated(self, columns: np.ndarray) -> "ResidualCovariance":
        """The same covariance with `columns` (n, m), parts of the independent variances that the rows
        share, counted as correlated: diagonal - sum of their squares, shared part widened by them.

        The independent rest keeps at least :data:`OWN_VARIANCE_FLOOR` of its variance, so that a table's
        rounding (a shared part a little above the stated error) cannot make V singular."""
        if not columns.shape[1]:
            return self
        own = np.maximum(self.diagonal - (columns**2).sum(axis=1), OWN_VARIANCE_FLOOR * self.diagonal)
        return ResidualCovariance(own, np.hstack([self.shared, columns]))

    def sandwich(self, linear_map: np.ndarray) -> np.ndarray:
        """A V A^T: the covariance of coefficients A y (A a (p, n) linear map) when y has this covariance."""
        a_shared = linear_map @ self.shared
        return (linear_map * self.diagonal) @ linear_map.T + a_shared @ a_shared.T

    def residual_variances(self, design: np.ndarray, linear_map: np.ndarray) -> np.ndarray:
        """Diagonal of (I - X A) V (I - X A)^T: the variances of the residuals y - X A y of a linear fit
        (X `design` (n, p), A `linear_map` (p, n)) when y has this covariance, O(n p^2 + n m p)."""
        fitted_self = (design * linear_map.T).sum(axis=1)  # diagonal of X A
        spread = np.einsum("ij,jk,ik->i", design, (linear_map * self.diagonal) @ linear_map.T, design)
        shared_left = self.shared - design @ (linear_map @ self.shared)
        return self.diagonal * (1.0 - 2.0 * fitted_self) + spread + (shared_left**2).sum(axis=1)


class GlsSolution(NamedTuple):
    """One generalised least-squares solution: coefficients, (X^T V^-1 X)^-1, the linear map A with
    coefficients = A y, residuals and chi-square r^T V^-1 r."""

    beta: np.ndarray
    normal: np.ndarray
    linear_map: np.ndarray
    residuals: np.ndarray
    chi_square: float


def generalised_least_squares(design: np.ndarray, y: np.ndarray, covariance: ResidualCovariance) -> GlsSolution:
    """Generalised least squares: the coefficients of `design` (n x p) that fit `y` (n) under the residual
    covariance V, with (X^T V^-1 X)^-1, the linear map and the chi-square (see :class:`GlsSolution`)."""
    weighted = covariance.solve(design)
    normal = np.linalg.inv(design.T @ weighted)
    linear_map = normal @ weighted.T
    beta = linear_map @ y
    residuals = y - design @ beta
    return GlsSolution(beta, normal, linear_map, residuals, float(residuals @ covariance.solve(residuals)))


def _line(x: np.ndarray, y: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted least-squares intercept and slope of y = a + b x."""
    sw = w.sum(-1)
    xm = (w * x).sum(-1) / sw
    ym = (w * y).sum(-1) / sw
    dx = x - xm
    slope = (w * dx * (y - ym)).sum(-1) / (w * dx * dx).sum(-1)
    return ym - slope * xm, slope


SHARE_RATES = "rates"
SHARE_SCATTER = "scatter"
SHARE_TEMPERATURES = "temperature scatter"
SHARE_HELD = "held trends"


@dataclass(frozen=True)
class LineFit:
    """Least-squares line y = intercept + slope * (1/T), with y = ln k - power * ln T.

    Attributes
    ----------
    intercept, slope : float
        Fitted coefficients (slope in K).
    covariance : ndarray
        Total 2 x 2 covariance of (intercept, slope).
    covariance_parts : dict of str to ndarray
        `covariance` split by source (they add up to it): "rates" (or "scatter" when the errors come from
        the scatter about the line), "temperature scatter" (independent temperature errors), "held trends"
        (rate errors shared through held trends) and one entry per shared temperature error
        ("calibration", "probe offset", "given covariance").
    residuals : ndarray
        y - fitted y of each point (ln units).
    weights : ndarray
        1/sigma^2 of ln k from the rate errors alone (ones without rate errors).
    residual_covariance : ResidualCovariance
        Covariance V of the residuals the line was fitted with (rates and temperatures): its weights.
    full_covariance : ResidualCovariance
        Covariance of ln k about the line with every shared error counted as correlated: V with the
        parts of the rate errors shared through held trends moved off the diagonal into shared columns
        (V itself when no rate errors are shared). The line's errors, its chi-square and its residuals
        are judged against it.
    linear_map : ndarray
        (2, n) map A of the fit: (intercept, slope) = A y.
    chi_square : float
        Goodness of fit under `full_covariance`: the least r^T V_full^-1 r over all lines (the generalised
        least-squares minimum, chi-square with n - 2 degrees of freedom whichever weights drew the line;
        r^T V^-1 r of the line's own residuals when no rate errors are shared). NaN without rate errors.
    dof : int
        Degrees of freedom, n - 2.
    scatter : float
        sqrt(weighted residual sum of squares / dof): without rate errors, the scatter of ln k about the
        line; with rate errors, the square root of the reduced chi-square of the rate errors alone.
    """

    intercept: float
    slope: float
    covariance: np.ndarray
    covariance_parts: dict
    residuals: np.ndarray
    weights: np.ndarray
    residual_covariance: ResidualCovariance
    full_covariance: ResidualCovariance
    linear_map: np.ndarray
    chi_square: float
    dof: int
    scatter: float

    @property
    def energy(self) -> Estimate:
        """-R * slope with its standard error, kJ/mol: ΔH‡ of the Eyring line, Ea of the Arrhenius line."""
        return Estimate(-GAS_CONSTANT * self.slope / 1e3, GAS_CONSTANT * math.sqrt(self.covariance[1, 1]) / 1e3)

    def predict(self, temperature_k: float | np.ndarray) -> Estimate:
        """Fitted ordinate at `temperature_k` (K) with its standard error."""
        x = 1.0 / np.asarray(temperature_k, dtype=float)
        c = self.covariance
        var = c[0, 0] + 2 * x * c[0, 1] + x * x * c[1, 1]
        return Estimate(self.intercept + self.slope * x, np.sqrt(var))


def _shared_parts(linear_map: np.ndarray, shared: np.ndarray, sources: Sequence[str]) -> dict:
    """Covariance of the coefficients from each shared temperature source (columns grouped by name)."""
    parts = {}
    for name in dict.fromkeys(sources):
        columns = linear_map @ shared[:, [j for j, s in enumerate(sources) if s == name]]
        parts[name] = columns @ columns.T
    return parts


def fit_line(series: RateSeries, power: int, scaled: bool) -> LineFit:
    """Fit y = ln k - power ln T against 1/T (K^-1) over the rows of `series` (all values, no bounds).

    Parameters
    ----------
    series : RateSeries
        The rates (s^-1) to fit, with their errors and the errors of their temperatures (K).
    power : int
        1 for the Eyring line (ln(k/T)), 0 for the Arrhenius line (ln k).
    scaled : bool
        Scale the covariance by the reduced chi-square (always so without rate errors).
    """
    t, k = series.temperature_k, series.rate_per_s
    x, y = 1.0 / t, np.log(k) - power * np.log(t)
    design = np.column_stack([np.ones_like(x), x])
    errors = series.temperature_errors
    sigma2 = (series.rate_stderr / k) ** 2
    have_errors = bool(np.isfinite(sigma2).all())
    w = 1.0 / sigma2 if have_errors else np.ones_like(t)
    dof = len(t) - 2
    slope = float(_line(x, y, w)[1])
    for _ in range(MAX_ITERATIONS):
        gradient = -power / t + slope / t**2  # d(residual)/dT
        shared = gradient[:, None] * errors.shared_k
        independent = (gradient * errors.independent_k) ** 2
        # without rate errors the scatter holds the independent errors of rates and temperatures alike
        covariance = ResidualCovariance(sigma2 + independent if have_errors else np.ones_like(t), shared)
        scatter_only = ResidualCovariance(np.ones_like(t), shared[:, :0])
        fit = generalised_least_squares(design, y, covariance if have_errors else scatter_only)
        converged = abs(fit.beta[1] - slope) <= SLOPE_TOLERANCE * abs(slope)
        slope = float(fit.beta[1])
        if converged or not errors.any:
            break
    weighted_ss = float((w * fit.residuals**2).sum())
    scatter = math.sqrt(weighted_ss / dof) if dof > 0 else math.nan
    a = fit.linear_map
    full = covariance
    if have_errors:
        # the parts of the rate errors shared through held trends move the rows together: the line keeps its
        # weights (the rate errors as given), and its covariance and chi-square count those parts as correlated
        rate_shared = series.rate_shared_columns
        full = covariance.correlated(rate_shared)
        held = a @ rate_shared
        own = np.clip(sigma2 - (rate_shared**2).sum(axis=1), 0.0, None)
        parts = {SHARE_RATES: (a * own) @ a.T, SHARE_TEMPERATURES: (a * independent) @ a.T, SHARE_HELD: held @ held.T}
        chi_square = generalised_least_squares(design, y, full).chi_square
    else:
        parts = {SHARE_SCATTER: fit.normal * scatter**2}
        chi_square = math.nan
    parts.update(_shared_parts(a, shared, errors.sources))
    if scaled and have_errors and dof > 0:
        parts = {name: part * chi_square / dof for name, part in parts.items()}
    parts = {name: part for name, part in parts.items() if part.any() or name in (SHARE_RATES, SHARE_SCATTER)}
    return LineFit(float(fit.beta[0]), slope, sum(parts.values()), parts, fit.residuals, w, covariance, full, a,
                   chi_square, dof, scatter)


def studentised_residuals(series: RateSeries, basis: str) -> np.ndarray:
    """Studentised residuals of the Eyring line through the rows of `series` (all values), with the error
    basis `basis` (one of the ``BASIS_*`` values).

    With known errors e_i / sqrt(Var e_i), Var e the diagonal of (I - X A) V_full (I - X A)^T (A the
    line's linear map, V_full its full covariance: rate and temperature errors, shared parts correlated;
    V - X C X^T when the line is weighted by V_full itself). With errors of unknown scale the same,
    externally studentised: divided by s_(i), the square root of the reduced chi-square without point i
    (chi-square minus the drop an extra coefficient for point i would give, (e_i^T P y)^2 / e_i^T P e_i,
    P = V^-1 - V^-1 X C X^T V^-1, C = (X^T V^-1 X)^-1, over n - 3 degrees of freedom), with V = V_full
    (the identity when the errors come from the scatter alone); without shared errors this is the
    textbook e sqrt(w) / (s_(i) sqrt(1 - h)) of weighted least squares. A point of leverage h = 1 (each of two
    points, or one whose weight dwarfs the others') fixes the line through itself: its residual is zero
    whatever the data, has no variance left (1 - h is zero, or a rounding error either side of it) and
    cannot be judged, so it gets NaN.
    """
    line = fit_line(series, power=1, scaled=basis != BASIS_GIVEN)
    x, e = 1.0 / series.temperature_k, line.residuals
    design = np.column_stack([np.ones_like(x), x])
    covariance = line.full_covariance if basis != BASIS_SCATTER else ResidualCovariance(np.ones_like(x), design[:, :0])
    # a part shared through a held trend moves the rows together and the line takes most of it up: it
    # leaves less in the residuals than if it were independent
    variance = covariance.residual_variances(design, line.linear_map)
    judged = variance > LEVERAGE_TOLERANCE * covariance.variances()
    out = np.full_like(e, np.nan)
    if basis == BASIS_GIVEN:
        out[judged] = e[judged] / np.sqrt(variance[judged])
        return out
    dof = len(x) - 3
    if dof <= 0:
        return out
    fit = generalised_least_squares(design, e + design @ [line.intercept, line.slope], covariance)
    weighted = covariance.solve(design)
    kept_precision = covariance.inverse_diagonal() - np.einsum("ij,jk,ik->i", weighted, fit.normal, weighted)
    deleted = fit.chi_square - covariance.solve(fit.residuals)[judged] ** 2 / kept_precision[judged]
    with np.errstate(divide="ignore", invalid="ignore"):  # exact data: 0/0, no residual to judge
        out[judged] = e[judged] / np.sqrt(variance[judged] * deleted / dof)
    return out


def outlier_flags(series: RateSeries, basis: str, threshold: float) -> np.ndarray:
    """Possible outliers of the Eyring line through the rows of `series` (True where flagged).

    Flagged one at a time: the worst point beyond the limit is set aside and the rest judged again. The
    limit is `threshold` for normal (known-error) residuals, and the Student-t quantile of the same tail
    probability for externally studentised ones. Setting points aside only for the judging keeps one
    gross outlier from dragging the line and making its neighbours look bad.
    """
    known = basis == BASIS_GIVEN
    flags = np.zeros(len(series), dtype=bool)
    tail = stats.norm.sf(threshold)
    while (~flags).sum() >= (3 if known else 4):
        keep = np.flatnonzero(~flags)
        r = np.abs(np.nan_to_num(studentised_residuals(series.subset(keep), basis)))
        limit = threshold if known else stats.t.isf(tail, len(keep) - 3)
        worst = int(np.argmax(r))
        if r[worst] <= limit:
            break
        flags[keep[worst]] = True
    return flags
