"""Are the default two-step results honest on realistic series?  (`dnmr fit` with no options, then Eyring.)

The series come from tests/realistic_series.py: lineshapes from independent references (McConnell,
J. Chem. Phys. 28, 430 (1958), closed form; QuTiP for the coupled AB pair), rates from the Eyring
equation, with first-guess shifts and couplings off in the model file, drifting shifts and referencing,
phase errors, sloping baselines and a temperature-dependent intrinsic width.  A handful of short noise
replicas keeps this lean; benchmarks/coverage.py measures the same with many replicas.

What a broken pipeline fails: rates with intervals that do not hold the truth (shifts or couplings held
at the first guess give slow rates several times too high with tiny intervals, issue 12), rates past
coalescence that are only bounds (a free linewidth), and ΔH‡/ΔS‡ many standard errors from the truth.
"""
from __future__ import annotations

import csv
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
