"""Rate errors shared between rows (values held at one trend line) in the Eyring fit.

Reference library: statsmodels GLS with the full covariance of ln(k/T), diag(independent) + U U^T,
covariance not rescaled ("fixed scale").  dnmr applies the same covariance by the Woodbury identity.
"""
from __future__ import annotations

import csv
import math

import numpy as np
import pytest
import statsmodels.api as sm

from dnmr import eyring_fit_file
from dnmr.errors import InputError

TEMPS = np.array([280.0, 295.0, 310.0, 325.0, 340.0, 355.0])


def _write(path, k, k_err, shared_cells):
    with open(path, "w", newline="") as handle:
        out = csv.writer(handle)
        out.writerow(["temperature_k", "rate_per_s", "rate_stderr", "log10_rate_shared"])
        out.writerows(zip(TEMPS, k, k_err, shared_cells))


def test_shared_rate_errors_match_statsmodels_gls(tmp_path):
    rng = np.random.default_rng(5)
    k = 2.0e10 * TEMPS * np.exp(-60e3 / (8.314462618 * TEMPS)) * np.exp(rng.normal(0, 0.03, TEMPS.size))
    # two shared components growing with T (a linewidth line extrapolated), log10 k per standard deviation
    loadings = np.column_stack([np.linspace(0.0, 0.05, TEMPS.size), np.linspace(0.0, -0.03, TEMPS.size) ** 2 * 20])
    own = np.full(TEMPS.size, 0.03)  # ln units
    ln_u = math.log(10.0) * loadings
    total = np.sqrt(own**2 + (ln_u**2).sum(axis=1))
    cells = [";".join(f"linewidth_hz_A:{j + 1}={v:.12g}" for j, v in enumerate(row) if v != 0) for row in loadings]
    _write(tmp_path / "rates.csv", k, k * total, cells)
    result = eyring_fit_file(tmp_path / "rates.csv")[0]
    x, y = sm.add_constant(1.0 / TEMPS), np.log(k / TEMPS)
    ref = sm.GLS(y, x, sigma=np.diag(own**2) + ln_u @ ln_u.T).fit(cov_type="fixed scale")
    assert [result.eyring.intercept, result.eyring.slope] == pytest.approx(ref.params, rel=1e-9)
    assert np.sqrt(np.diag(result.eyring.covariance)) == pytest.approx(ref.bse, rel=1e-7)
    assert "held values" in result.eyring.covariance_parts
    # counted as independent instead, the same total errors give a different line and errors
    _write(tmp_path / "independent.csv", k, k * total, [""] * TEMPS.size)
    independent = eyring_fit_file(tmp_path / "independent.csv")[0]
    assert abs(independent.enthalpy_stderr - result.enthalpy_stderr) > 0.05 * result.enthalpy_stderr


def test_a_malformed_shared_error_cell_names_the_line(tmp_path):
    _write(tmp_path / "rates.csv", 10.0 * np.arange(1, 7), np.arange(1, 7), ["a:1=0.01"] * 5 + ["a:1=oops"])
    with pytest.raises(InputError, match="line 7"):
        eyring_fit_file(tmp_path / "rates.csv")
