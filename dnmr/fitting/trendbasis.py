"""The errors of all slow-exchange trends on one basis: the values each slow-exchange spectrum gave them,
whitened together.

The trends (:mod:`dnmr.fitting.trends`) are regressed line by line, but the values one spectrum gives them
(a linewidth, its rates, shift differences, couplings, population ratios) come from one fit and their
errors are correlated.  Written on the independent unit errors of those values, the held values of
different lines err together as they were measured, so that a rate held at several of them gets the error
of their combination (:meth:`dnmr.fitting.trends.StaticTrend.held_error`) and the rates that share them
are counted as correlated by the Eyring analysis.
"""
from __future__ import annotations

import dataclasses
from collections.abc import Sequence

import numpy as np

from dnmr.fitting.spectrumfit import SpectrumFit
from dnmr.fitting.trends import PARAMETER_PREFIX, ParameterTrend, StaticTrend, exchange_width, value_covariance


def _population_gradient(fit: SpectrumFit, name: str, first: str) -> dict[str, float]:
    """d ln(p/p_first) by free parameter, as the population trend takes its error: with two states
    p_first = 1 - p; with more, each population as fitted."""
    params = fit.lmfit_parameters
    p, p0 = float(params[name].value), float(params[first].value)
    if len([n for n in params if n.startswith(PARAMETER_PREFIX["population"])]) == 2:
        return {name: 1.0 / p + 1.0 / p0}
    return {name: 1.0 / p, first: -1.0 / p0}


def _measured_rows(trend: StaticTrend, fit: SpectrumFit, index: int) -> tuple[list, list[dict], list[float]]:
    """The values one slow-exchange spectrum (place `index` in the run) gave the trends: their owners
    (line name, or (line name, rate parameter) for a rate of the linewidth's joint fit), gradients by
    free parameter and the variances added to them (an unresolved exchange broadening).  The linewidth's
    joint-fit rows come first, in that fit's order, so that its whitening is the leading block."""
    owners, gradients, extra = [], [], []
    for name, line in trend.lines.items():
        if name.startswith(PARAMETER_PREFIX["linewidth"]):
            rates = list(line.rate_noise[index]) if line.rate_noise else []
            owners.append(name)
            gradients.append({name: 1.0})
            extra.append(0.0 if rates else exchange_width(fit) ** 2)  # as linewidth_trend widens it
            for rate in rates:
                owners.append((name, rate))
                gradients.append({rate: 1.0})
                extra.append(0.0)
    for name, line in trend.differences.items():
        owners.append((name, "difference"))
        gradients.append({name: 1.0, trend.first_shift: -1.0})
        extra.append(0.0)
    for name, line in trend.lines.items():
        if name.startswith(PARAMETER_PREFIX["coupling"]):
            owners.append(name)
            gradients.append({name: 1.0})
            extra.append(0.0)
        elif line.kind == "van-t-hoff":
            owners.append(name)
            gradients.append(_population_gradient(fit, name, trend.first_population))
            extra.append(0.0)
    return owners, gradients, extra


def common_noise_basis(trend: StaticTrend, slow: Sequence[tuple[float, SpectrumFit]]) -> StaticTrend:
    """`trend` with every line's errors on one basis: the independent unit errors of all the values the
    slow-exchange spectra `slow` gave the trends (linewidth, rates of its joint fit, shift differences,
    couplings, population ratios), each spectrum's values whitened by their covariance from its fit.

    The lines are regressed one by one (the linewidth's jointly with the rates), but the values of one
    spectrum come from one fit and their errors are correlated (a linewidth and a population ratio, say);
    on a common basis the held values of different lines err together as measured, and a rate held at
    several of them gets the error of their combination, not the sum of independent shares.  `trend` is
    returned as it is when a line has a single temperature or a point without a finite error."""
    lines = {**{n: line for n, line in trend.lines.items() if not n.startswith(PARAMETER_PREFIX["shift"])},
             **{("difference", n): line for n, line in trend.differences.items()}}
    if not slow or any(line.constant or not np.all(np.isfinite(line.stderrs)) for line in lines.values()):
        return trend
    roots, owners = [], []
    for index, (_, fit) in enumerate(slow):
        rows, gradients, extra = _measured_rows(trend, fit, index)
        covariance = value_covariance(fit, gradients) + np.diag(extra)
        try:
            roots.append(np.linalg.cholesky(covariance))
        except np.linalg.LinAlgError:
            return trend
        if not np.isfinite(roots[-1]).all():
            return trend
        owners.append(rows)
    offsets = np.cumsum([0] + [r.shape[0] for r in roots])
    maps = {}
    for key, line in lines.items():
        name = key[1] if isinstance(key, tuple) else key
        row_key = (name, "difference") if isinstance(key, tuple) else name
        rate_noise: tuple = ()
        if line.rate_noise:  # the joint fit's unit errors are the leading ones of each spectrum's basis
            sub = np.cumsum([0] + [1 + len(r) for r in line.rate_noise])
            noise = _on_basis(np.array(line.noise_map), sub, offsets)
            rate_noise = tuple({rate: tuple(float(v) for v in _on_basis(np.array([values]), sub, offsets)[0])
                                for rate, values in rows.items()} for rows in line.rate_noise)
        else:
            noise = np.zeros((2, offsets[-1]))
            for i, column in enumerate(_coefficient_map(line).T):
                noise[:, offsets[i]:offsets[i + 1]] = np.outer(column, roots[i][owners[i].index(row_key)])
        maps[key] = dataclasses.replace(line, noise_map=tuple(tuple(float(v) for v in row) for row in noise),
                                        rate_noise=rate_noise, common_basis=True)
    return dataclasses.replace(trend, lines={n: maps.get(n, line) for n, line in trend.lines.items()},
                               differences={n: maps[("difference", n)] for n in trend.differences})


def _on_basis(matrix: np.ndarray, sub: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """Columns of `matrix` on the unit errors of the linewidth's joint fit (spectrum i's at sub[i]:sub[i+1])
    placed on the common basis (spectrum i's from offsets[i], the joint fit's first)."""
    out = np.zeros((matrix.shape[0], offsets[-1]))
    for i in range(len(sub) - 1):
        out[:, offsets[i]:offsets[i] + sub[i + 1] - sub[i]] = matrix[:, sub[i]:sub[i + 1]]
    return out


def _coefficient_map(line: ParameterTrend) -> np.ndarray:
    """(a, b) of a weighted straight line (:func:`regress_trend`) as a linear map of its points' values."""
    x = np.array([line.x(t) for t in line.temperatures_k]) - line.x0
    w = 1.0 / np.asarray(line.stderrs) ** 2
    design = np.column_stack([np.ones_like(x), x])
    return np.linalg.solve(design.T @ (design * w[:, None]), design.T * w)
