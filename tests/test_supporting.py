"""Supporting-information tables (dnmr.reporting.supporting): ΔG‡ at each sample temperature, bounds, the three formats.

References: the Eyring equation with CODATA constants (Eyring, J. Chem. Phys. 3, 107 (1935);
tests/reference_eyring.py, scipy.constants); first-order propagation of independent errors (JCGM 100:2008,
the GUM, eq. 10), its derivatives taken here by central differences of the reference equation; the
weighted straight line of ln(k/T) on 1/T from statsmodels WLS for the activation table.
"""
from __future__ import annotations

import csv
import io
import math

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import constants

from dnmr.activation.eyring import eyring_fit
from dnmr.reporting.supporting import (
    activation_csv,
    activation_rows,
    gibbs_from_rate,
    rate_rows_from_global,
    rate_rows_from_table,
    rates_csv,
    supporting_rate,
    tables_latex,
    tables_markdown,
    write_supporting_tables,
)
from dnmr.activation.temperature_calibration import fit_temperature_calibration
from reference_eyring import eyring_rate


def reference_gibbs(rate_per_s: float, temperature_k: float) -> float:
    """ΔG‡ (kJ/mol) from k by inverting the Eyring equation (kappa 1), CODATA constants."""
    return constants.R * temperature_k * math.log(constants.k * temperature_k / (constants.h * rate_per_s)) / 1e3


@pytest.mark.parametrize("temperature, enthalpy, entropy", [(250.0, 55.0, -10.0), (330.0, 70.0, 15.0)])
def test_gibbs_at_the_sample_temperature_inverts_the_eyring_equation(temperature, enthalpy, entropy):
    k = eyring_rate(temperature, enthalpy, entropy)
    value, _ = gibbs_from_rate(k, temperature)
    assert value == pytest.approx(enthalpy - temperature * entropy / 1e3, rel=1e-12)


def test_gibbs_error_is_first_order_propagation():
    k, t, sk, st = 120.0, 265.0, 9.0, 0.8
    _, stderr = gibbs_from_rate(k, t, sk, st)
    h_k, h_t = 1e-4 * k, 1e-4 * t
    d_k = (reference_gibbs(k + h_k, t) - reference_gibbs(k - h_k, t)) / (2 * h_k)
    d_t = (reference_gibbs(k, t + h_t) - reference_gibbs(k, t - h_t)) / (2 * h_t)
    assert stderr == pytest.approx(math.hypot(d_k * sk, d_t * st), rel=1e-6)
    assert math.isnan(gibbs_from_rate(k, t)[1])  # no error known: none invented


def test_rate_bounds_give_the_opposite_bounds_on_gibbs():
    upper = supporting_rate("flip", math.nan, 200.0, 0.5, "upper-bound", 0.01, rate_upper=0.3)
    assert upper.gibbs_lower_kj_mol == pytest.approx(reference_gibbs(0.3, 200.0), rel=1e-12)
    assert math.isnan(upper.gibbs_upper_kj_mol) and math.isnan(upper.gibbs_stderr)
    lower = supporting_rate("flip", math.nan, 350.0, 0.5, "lower-bound", 1e5, rate_lower=2e4)
    assert lower.gibbs_upper_kj_mol == pytest.approx(reference_gibbs(2e4, 350.0), rel=1e-12)
    text = tables_markdown([upper, lower], [])
    assert "| < 0.3 | > " in text and "| > 2e+04 | < " in text


def test_sample_temperatures_come_through_the_calibration():
    cal = fit_temperature_calibration([220.0, 250.0, 280.0, 310.0], [223.1, 251.9, 280.4, 308.8])
    rows = [{"temperature_k": "240", "process": "flip", "rate_per_s": "10.5", "rate_stderr": "0.8", "status": "determined"},
            {"temperature_k": "260", "process": "flip", "rate_per_s": "", "status": "failed"},
            {"temperature_k": "300", "process": "flip", "rate_per_s": "900", "rate_stderr": "70", "status": "determined"}]
    table = rate_rows_from_table(rows, cal)
    assert [r.setpoint_k for r in table] == [240.0, 300.0]  # the failed fit is left out
    true = cal.true_temperature([240.0, 300.0])
    assert [r.temperature_k for r in table] == pytest.approx(true.temperature_k, rel=1e-12)
    assert [r.temperature_stderr for r in table] == pytest.approx(true.stderr, rel=1e-12)
    assert table[0].gibbs_kj_mol == pytest.approx(reference_gibbs(10.5, true.temperature_k[0]), rel=1e-12)
    md = tables_markdown(table, [])
    assert "| process | T set / K | T / K | k / s⁻¹ | ΔG‡ / kJ mol⁻¹ |" in md
    assert "| flip | 240.0 |" in md and "through the temperature calibration" in md
    plain = rate_rows_from_table(rows)
    assert all(math.isnan(r.setpoint_k) for r in plain) and "T set" not in tables_markdown(plain, [])


def _series():
    temperatures = np.array([250.0, 265.0, 280.0, 295.0, 310.0])
    k = eyring_rate(temperatures, 60.0, -5.0) * np.array([1.04, 0.97, 1.02, 0.99, 1.03])
    return temperatures, k, 0.05 * k


def test_activation_table_matches_a_weighted_line():
    t, k, sk = _series()
    result = eyring_fit(t, k, sk)
    row = activation_rows([result])[0]
    # statsmodels WLS of ln(k/T) on 1/T (weights 1 / var ln k): slope -dH/R, intercept ln(kB/h) + dS/R
    fit = sm.WLS(np.log(k / t), sm.add_constant(1.0 / t), weights=(k / sk) ** 2).fit()
    cov = fit.normalized_cov_params  # the given errors, unscaled
    assert row.enthalpy_kj_mol == pytest.approx(-fit.params[1] * constants.R / 1e3, rel=1e-9)
    assert row.enthalpy_stderr == pytest.approx(math.sqrt(cov[1, 1]) * constants.R / 1e3, rel=1e-9)
    entropy = (fit.params[0] - math.log(constants.k / constants.h)) * constants.R
    assert row.entropy_j_mol_k == pytest.approx(entropy, rel=1e-9, abs=1e-9)
    assert row.correlation_enthalpy_entropy == pytest.approx(-cov[0, 1] / math.sqrt(cov[0, 0] * cov[1, 1]), rel=1e-9)
    sentence = row.sentence()
    assert "correlation coefficient of ΔH‡ and ΔS‡" in sentence and "weighted harmonic mean" in sentence


def test_three_formats_carry_the_same_numbers(tmp_path):
    t, k, sk = _series()
    rows = [supporting_rate("flip", math.nan, float(a), 0.3, "determined", float(b), float(c)) for a, b, c in zip(t, k, sk)]
    rows.append(supporting_rate("flip", math.nan, 200.0, 0.3, "upper-bound", 1e-3, rate_upper=0.05))
    activation = activation_rows([eyring_fit(t, k, sk)])
    back = list(csv.DictReader(io.StringIO(rates_csv(rows))))
    assert [float(r["rate_per_s"]) for r in back[:5]] == k.tolist()  # full precision
    assert back[5]["rate_stderr"] == "" and float(back[5]["gibbs_lower_kj_mol"]) == rows[5].gibbs_lower_kj_mol
    act = next(csv.DictReader(io.StringIO(activation_csv(activation))))
    assert float(act["enthalpy_kj_mol"]) == activation[0].enthalpy_kj_mol
    latex = tables_latex(rows, activation)
    assert latex.count(r"\begin{tabular}") == 2 and latex.count("{") == latex.count("}")
    assert latex.count(r"$\pm$") == 3 * 5 + 1 + 4  # T, k, ΔG‡ of five rows; T of the bound; ΔH‡, ΔS‡, two ΔG‡
    md = tables_markdown(rows, activation, "Invented rotamer")
    assert md.startswith("# Invented rotamer") and md.count("\n| flip |") == 6
    written = write_supporting_tables(tmp_path, rows, activation)
    assert sorted(p.name for p in written) == ["si_activation.csv", "si_rates.csv", "si_tables.md", "si_tables.tex"]
    from dnmr.errors import InputError

    with pytest.raises(InputError, match="already exists"):
        write_supporting_tables(tmp_path, rows, activation)


def test_global_fit_rates_show_set_point_and_sample_temperature():
    process = {"process": "flip", "enthalpy_kj_mol": 60.0, "enthalpy_stderr": 0.5, "entropy_j_mol_k": -5.0,
               "entropy_stderr": 2.0, "correlation_enthalpy_entropy": 0.998, "gibbs_298_kj_mol": 61.49,
               "gibbs_298_stderr": 0.1, "harmonic_mean_temperature_k": 280.0, "gibbs_hm_kj_mol": 61.4,
               "gibbs_hm_stderr": 0.05,
               "rates": [{"temperature_k": 281.2, "temperature_stderr": 0.4, "setpoint_k": 280.0,
                          "rate_per_s": eyring_rate(281.2, 60.0, -5.0), "rate_stderr": 3.0}]}
    g = {"processes": [process], "options": {"calibration": {"degree": 1}}, "calibration_error_included": True}
    row = rate_rows_from_global(g)[0]
    assert (row.setpoint_k, row.temperature_k, row.temperature_stderr) == (280.0, 281.2, 0.4)
    assert row.gibbs_kj_mol == pytest.approx(60.0 + 281.2 * 5.0 / 1e3, rel=1e-12)
    g["options"]["calibration"], g["calibration_error_included"] = None, False
    assert math.isnan(rate_rows_from_global(g)[0].setpoint_k)
    assert activation_rows(g["processes"])[0].harmonic_mean_temperature_k == 280.0


def test_eyring_command_writes_the_tables_with_set_points(tmp_path):
    from click.testing import CliRunner

    from dnmr.cli import cli

    t, k, sk = _series()
    rates = tmp_path / "rates.csv"
    rates.write_text("temperature_k,rate_per_s,rate_stderr\n" + "".join(f"{a:g},{b!r},{c!r}\n" for a, b, c in zip(t.tolist(), k.tolist(), sk.tolist())))
    cal = tmp_path / "cal.csv"
    cal.write_text("setpoint_k,temperature_k\n240,242.0\n270,271.1\n300,299.6\n330,328.4\n")
    run = CliRunner().invoke(cli, ["eyring", str(rates), "--calibration", str(cal), "--tables", str(tmp_path / "si")])
    assert run.exit_code == 0, run.output
    assert "T set / K" in run.output  # the text report shows each set-point beside its sample temperature
    back = list(csv.DictReader((tmp_path / "si" / "si_rates.csv").open()))
    true = fit_temperature_calibration([240.0, 270.0, 300.0, 330.0], [242.0, 271.1, 299.6, 328.4]).true_temperature(t)
    assert [float(r["setpoint_k"]) for r in back] == t.tolist()
    assert [float(r["temperature_k"]) for r in back] == pytest.approx(true.temperature_k, rel=1e-12)
    assert [float(r["temperature_stderr"]) for r in back] == pytest.approx(true.stderr, rel=1e-12)
