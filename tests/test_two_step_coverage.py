"""Are the default two-step results honest on realistic series?  (`dnmr fit` with no options, then Eyring.)

The series come from tests/realistic_series.py: lineshapes from independent references (McConnell,
J. Chem. Phys. 28, 430 (1958), closed form; QuTiP for the coupled AB pair), rates from the Eyring
equation, with first-guess shifts and couplings off in the model file, drifting shifts and referencing,
phase errors, sloping baselines and a temperature-dependent intrinsic width.  A handful of short noise
replicas keeps this lean; benchmarks/error_coverage.py measures the same with many replicas.

What a broken pipeline fails: rates with intervals that do not hold the truth (shifts or couplings held
at the first guess give slow rates several times too high with tiny intervals, issue 12), rates past
coalescence that are only bounds (a free linewidth), and ΔH‡/ΔS‡ many standard errors from the truth.
"""
from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np
import pytest

from realistic_series import AB_RING_INVERSION, N_METHYL_AMIDE, write_series
from dnmr import eyring_fit_file
from dnmr.fitting.series import fit_series

REPLICAS = 3


def _rows(path: Path) -> list[dict]:
    with open(path, newline="") as handle:
        return list(csv.DictReader(handle))


def _run(scenario, folder: Path, seed: int):
    truth = write_series(folder / "data", scenario, seed)
    result = fit_series(truth.series_file, folder / "out", workers=1, progress=False)
    rows = _rows(folder / "out" / "rates.csv")
    eyring = eyring_fit_file(folder / "out" / "rates.csv")[0]
    return truth, rows, eyring, result


def _tied_rates_share_their_whole_error(result) -> int:
    """The rates the linewidth's line was fitted with: their whole error must be among the line's shared
    sources (they and the held rates err together).  Returns how many were checked."""
    line = next(v for n, v in result.trend.lines.items() if n.startswith("linewidth_hz_"))
    slow = [o for o in result.by_temperature() if o.stage == "slow-exchange"]
    checked = 0
    for o, rates in zip(slow, line.rate_noise):
        names = [n for n in o.fit.parameters if n.startswith("log10_rate_")]
        for name, rate, shared in zip(names, o.fit.rates, o.shared_rate_errors):
            if name in rates:
                assert sum(v * v for v in shared.values()) == pytest.approx(rate.log10_rate_stderr**2, rel=1e-6)
                checked += 1
    return checked


def _interval_hits(rows: list[dict], truth) -> list[bool]:
    """For every row with a 68 % interval: does it hold the true rate?"""
    true_rate = dict(zip(truth.temperatures_k, truth.rates_per_s))
    hits = []
    for row in rows:
        k = true_rate[float(row["temperature_k"])]
        if row["rate_ci68_lower"] and row["rate_ci68_upper"]:
            hits.append(float(row["rate_ci68_lower"]) <= k <= float(row["rate_ci68_upper"]))
    return hits


@pytest.mark.parametrize("scenario", [
    # the N-methyl pair: two singlets trading places; AB pair: the model file's J is 0.5 Hz off
    N_METHYL_AMIDE.replace(temperatures_k=(270.0, 285.0, 300.0, 315.0, 330.0, 345.0), points=2048),
    AB_RING_INVERSION.replace(temperatures_k=(240.0, 255.0, 270.0, 285.0, 300.0, 315.0), points=2048),
], ids=["n-methyl-pair", "ab-pair"])
def test_default_two_step_rates_and_barriers_are_honest(scenario, tmp_path):
    hits, z, tied = [], [], 0
    for r in range(REPLICAS):
        truth, rows, eyring, result = _run(scenario, tmp_path / f"r{r}", seed=500 + r)
        # past coalescence the held linewidth keeps the rate from being a lower bound; a cold spectrum may
        # honestly give only an upper bound (exchange broadening below the noise), which must hold the truth
        statuses = [row["status"] for row in rows]
        assert all(s in ("determined", "interval", "upper-bound") for s in statuses), statuses
        assert statuses[-1] in ("determined", "interval") and statuses[-2] in ("determined", "interval"), statuses
        for row, k in zip(rows, truth.rates_per_s):
            if row["status"] == "upper-bound":
                assert k <= float(row["rate_upper"])
        assert all("trend" in row["treatment"] or "fitted" in row["treatment"] for row in rows)
        hits += _interval_hits(rows, truth)
        # the held trends' errors are one draw for all the faster spectra (and the linewidth's line shares
        # the errors of the slow-exchange rates it was fitted with): rates.csv gives those parts, within
        # each rate's error, and Eyring counts them as shared
        for row in rows:
            shared = sum(float(v) ** 2 for k, v in row.items() if k.startswith("log10_rate_shared_") and v)
            if row["status"] == "determined":
                assert shared <= float(row["log10_rate_stderr"]) ** 2 * (1 + 1e-9)
                assert shared > 0 or "trend" not in row["treatment"]
            if row["log10_rate_stderr_held"]:  # every held value came from the trends: the held error is shared
                assert shared == pytest.approx(float(row["log10_rate_stderr_held"]) ** 2, rel=1e-6)
        tied += _tied_rates_share_their_whole_error(result)
        assert eyring.error_shares()["enthalpy"].get("held trends", 0.0) > 0.0
        z += [(eyring.enthalpy_kj_mol - truth.enthalpy_kj_mol) / eyring.enthalpy_stderr,
              (eyring.entropy_j_mol_k - truth.entropy_j_mol_k) / eyring.entropy_stderr]
    assert tied > 0  # the linewidth's line came from determined slow-exchange rates in these series
    share = np.mean(hits)
    # 68 % intervals over ~18 rates: binomial spread about 0.11, so 0.40-0.95 fails only a real mistake
    # (too narrow: intervals that ignore the held values' errors; too wide: errors counted twice)
    assert 0.40 <= share <= 0.95, f"68 % intervals hold the truth in {share:.0%} of {len(hits)}"
    assert np.max(np.abs(z)) <= 3.0, f"ΔH‡/ΔS‡ off by {np.round(z, 1)} standard errors"


def test_reference_line_gives_the_linewidth_and_values_past_coalescence(tmp_path):
    # the same N-methyl pair with a non-exchanging singlet of the same intrinsic width at 2.5 ppm
    scenario = N_METHYL_AMIDE.replace(temperatures_k=(265.0, 280.0, 310.0, 340.0), points=4096, reference_line_ppm=2.5)
    truth = write_series(tmp_path / "data", scenario, seed=77)
    text = truth.series_file.read_text().replace('model = "model.toml"\n',
                                                 'model = "model.toml"\n[fit.reference_line]\nppm = 2.5\n'
                                                 "window_ppm = [2.4, 2.6]\n")
    truth.series_file.write_text(text)
    result = fit_series(truth.series_file, tmp_path / "out", workers=1, progress=False)
    for o, k_true in zip(result.by_temperature(), truth.rates_per_s):
        assert o.treatment["linewidth"] == "reference-line"
        width = o.reference["width_hz"]
        assert abs(width - scenario.linewidth_at(o.spectrum.temperature_k)) <= 4 * o.reference["width_stderr"]
        rate = o.fit.rate(0)
        assert rate.status == "determined" and rate.log10_rate_stderr_held > 0
        assert abs(rate.rate_per_s - k_true) <= 3 * rate.rate_stderr


class _MeasuredFit:
    """What the trends read of a slow-exchange fit: free parameters with errors and correlations, rates."""

    def __init__(self, values: dict, covariance: np.ndarray):
        import lmfit
        from types import SimpleNamespace

        self.lmfit_parameters = lmfit.Parameters()
        sd = np.sqrt(np.diag(covariance))
        names = list(values)
        for a, name in enumerate(names):
            self.lmfit_parameters.add(name, value=values[name])
            par = self.lmfit_parameters[name]
            par.stderr = float(sd[a])
            par.correl = {other: float(covariance[a, b] / (sd[a] * sd[b])) for b, other in enumerate(names) if b != a}
        self.rates = [SimpleNamespace(status="determined")]

    def correlation(self, first: str, second: str) -> float:
        return self.lmfit_parameters[first].correl[second]


def test_held_values_of_different_trends_err_together_as_measured():
    # Linear error propagation (common practice): each line's coefficients are linear in the values the
    # slow-exchange fits measured, c_p = A_p y, so cov(c_p, c_q) = A_p C A_q^T with C the block-diagonal
    # covariance of those values (each fit's covariance, here invented with a linewidth-coupling-rate
    # correlation).  The lines' common basis must give that cross-covariance, and a rate held at both
    # values gets the error of their combination, s^T cov s, not the sum of independent shares.
    from dnmr.fitting.trendbasis import common_noise_basis
    from dnmr.fitting.trends import static_trend

    temps = [230.0, 240.0, 250.0]
    names = ["linewidth_hz_M", "coupling_hz_M_Ha_Hb", "log10_rate_swap"]
    rng = np.random.default_rng(3)
    blocks, fits = [], []
    for t in temps:
        sd = np.array([0.03, 0.004, 0.02]) * (1 + 0.3 * rng.random(3))
        corr = np.array([[1.0, 0.6, -0.9], [0.6, 1.0, -0.5], [-0.9, -0.5, 1.0]])
        cov = corr * np.outer(sd, sd)
        values = dict(zip(names, (1.3 - 0.004 * (t - 240) + rng.normal(0, 0.02), -12.5 + rng.normal(0, 0.003),
                                  math.log10(0.5 * math.exp((t - 240) / 8)))))
        blocks.append(cov)
        fits.append((t, _MeasuredFit(values, cov)))
    trend = common_noise_basis(static_trend(fits, fits, ("coupling", "linewidth")), fits)
    width, coupling = trend.lines["linewidth_hz_M"], trend.lines["coupling_hz_M_Ha_Hb"]
    assert width.common_basis and coupling.common_basis
    # the reference: both lines as linear maps of the nine measured values, built here from their definitions
    x0 = np.mean(temps)
    v = np.zeros((9, 9))
    for i, block in enumerate(blocks):
        v[3 * i:3 * i + 3, 3 * i:3 * i + 3] = block
    d_joint = np.zeros((6, 4))  # (w, log10(k/T)) rows of each spectrum on (a, b, c, d)
    for i, t in enumerate(temps):
        d_joint[2 * i] = [1.0, t - x0, 0.0, 0.0]
        d_joint[2 * i + 1] = [0.0, 0.0, 1.0, 1.0 / t - 1.0 / x0]
    pick = [3 * i + j for i in range(3) for j in (0, 2)]
    v_joint = v[np.ix_(pick, pick)]
    gls = np.linalg.solve(d_joint.T @ np.linalg.solve(v_joint, d_joint), d_joint.T @ np.linalg.inv(v_joint))
    a_width = np.zeros((2, 9))
    a_width[:, pick] = gls[:2]
    w = 1.0 / np.array([b[1, 1] for b in blocks])
    x = np.array(temps) - coupling.x0
    design = np.column_stack([np.ones(3), x])
    a_coupling = np.zeros((2, 9))
    a_coupling[:, [1, 4, 7]] = np.linalg.solve(design.T @ (design * w[:, None]), design.T * w)
    cross = a_width @ v @ a_coupling.T
    assert np.array(width.noise_map) @ np.array(coupling.noise_map).T == pytest.approx(cross, rel=1e-6, abs=1e-12)
    assert np.array(width.noise_map) @ np.array(width.noise_map).T == pytest.approx(np.array(width.covariance), rel=1e-6)
    # a rate at 300 K held at both values: its held error is the combination's
    t = 300.0
    e = np.array([1.0, t - x0])
    g = np.vstack([e @ a_width, np.array([1.0, t - coupling.x0]) @ a_coupling])
    cov_held = g @ v @ g.T
    shares = {"linewidth_hz_M": 0.05, "coupling_hz_M_Ha_Hb": -0.01}
    s = np.array(list(shares.values())) / np.sqrt(np.diag(cov_held))  # log10 k per unit of each held value
    assert trend.held_error(t, shares) == pytest.approx(math.sqrt(s @ cov_held @ s), rel=1e-6)
    assert sum(v * v for v in trend.shared_errors(t, shares).values()) == pytest.approx(s @ cov_held @ s, rel=1e-6)
