"""One Eyring analysis over several rates tables: lineshape rates (``dnmr fit``) joined with rates from
magnetisation transfer (``dnmr transfer``) or tables of the user's own, each row keeping its method.

References: the rates follow the Eyring equation (Eyring, J. Chem. Phys. 3, 107 (1935)) written out in
tests/reference_eyring.py with CODATA constants from scipy; the joint fit and the offset between methods
are checked against statsmodels (WLS on the pooled rows, with an indicator column for the offset).
"""
from __future__ import annotations

import json
import math

import matplotlib.pyplot as plt
import numpy as np
import pytest
import statsmodels.api as sm
from click.testing import CliRunner
from matplotlib.colors import to_hex
from scipy import constants

from dnmr.activation.eyring import eyring_fit_file
from dnmr.activation.eyring_result import method_offset
from dnmr.activation.rate_table import read_rates
from dnmr.cli import cli
from dnmr.errors import InputError
from dnmr.reporting.eyringplot import plot_eyring
from dnmr.reporting.plotting import PALETTE
from reference_eyring import eyring_rate

TRUE_DH, TRUE_DS = 60.0, -12.0  # kJ/mol, J/(mol K): invented truths of the synthetic rates
HOT_K = np.array([290.0, 300.0, 310.0, 320.0])
COLD_K = np.array([246.0, 252.0, 258.0, 264.0])
CONTRACT_KEYS = ("enthalpy_kj_mol", "enthalpy_stderr", "entropy_j_mol_k", "entropy_stderr", "gibbs_298_kj_mol",
                 "gibbs_298_stderr")


def _rates(temperatures, relative_error, seed, scale=1.0):
    rng = np.random.default_rng(seed)
    k = eyring_rate(temperatures, TRUE_DH, TRUE_DS) * np.exp(rng.normal(0.0, relative_error, len(temperatures)))
    return k * scale, relative_error * k * scale


def write_tables(folder, cold_scale=1.0):
    """A lineshape rates.csv (no method column, like ``dnmr fit``) and one transfer table per cold
    temperature (method inversion, one row each, like ``dnmr transfer``)."""
    k, err = _rates(HOT_K, 0.05, 1)
    hot = folder / "lineshape.csv"
    hot.write_text("temperature_k,process,rate_per_s,rate_stderr,status\n"
                   + "".join(f"{t},rotation,{float(r)!r},{float(e)!r},determined\n" for t, r, e in zip(HOT_K, k, err)))
    cold = []
    k, err = _rates(COLD_K, 0.03, 2, cold_scale)
    for t, r, e in zip(COLD_K, k, err):
        path = folder / f"inversion_{t:.0f}.csv"
        path.write_text("temperature_k,process,rate_per_s,rate_stderr,status,method\n"
                        f"{t},rotation,{float(r)!r},{float(e)!r},determined,inversion\n")
        cold.append(path)
    return hot, cold


def pooled(paths):
    """Temperatures, rates and errors of every row of the tables (read here with numpy, not dnmr)."""
    rows = [np.genfromtxt(p, delimiter=",", names=True, dtype=None, encoding="utf-8") for p in paths]
    cat = lambda name: np.concatenate([np.atleast_1d(r[name]).astype(float) for r in rows])  # noqa: E731
    return cat("temperature_k"), cat("rate_per_s"), cat("rate_stderr")


def test_joint_fit_matches_statsmodels_wls_on_the_pooled_rows(tmp_path):
    # reference library: statsmodels WLS of ln(k/T) on 1/T, weights (k/sigma_k)^2, covariance not rescaled;
    # ΔH‡ = -R slope, ΔS‡ = R (intercept - ln(kB/h)) with CODATA constants (Eyring 1935)
    hot, cold = write_tables(tmp_path)
    result = eyring_fit_file([hot, *cold])[0]
    t, k, err = pooled([hot, *cold])
    ref = sm.WLS(np.log(k / t), sm.add_constant(1.0 / t), weights=(k / err) ** 2).fit(cov_type="fixed scale")
    R = constants.R
    assert result.enthalpy_kj_mol == pytest.approx(-R * ref.params[1] / 1e3, rel=1e-9)
    assert result.enthalpy_stderr == pytest.approx(R * ref.bse[1] / 1e3, rel=1e-9)
    assert result.entropy_j_mol_k == pytest.approx(R * (ref.params[0] - np.log(constants.k / constants.h)), rel=1e-9)
    assert result.entropy_stderr == pytest.approx(R * ref.bse[0], rel=1e-9)
    # the truth lies within the joint errors, and the joint entropy error is several-fold smaller than
    # the lineshape rates' alone
    assert abs(result.enthalpy_kj_mol - TRUE_DH) < 3 * result.enthalpy_stderr
    alone = eyring_fit_file(hot)[0]
    assert alone.entropy_stderr > 2.5 * result.entropy_stderr


def test_rows_keep_their_method_and_the_report_lists_them_by_method(tmp_path):
    hot, cold = write_tables(tmp_path)
    result = eyring_fit_file([hot, *cold])[0]
    d = result.to_dict()
    assert d["methods"] == {"lineshape": 4, "inversion": 4}
    assert [p["method"] for p in d["points"]] == ["lineshape"] * 4 + ["inversion"] * 4
    text = result.report()
    assert "methods              lineshape 4 (290–320 K), inversion 4 (246–264 K)" in text
    block = text[text.index("Rates fitted"):]
    assert block.index("  lineshape (4 rates)") < block.index("290.00") < block.index("  inversion (4 rates)") \
        < block.index("246.00")
    assert "Agreement of the methods" in text


def test_method_offset_matches_statsmodels_with_an_indicator_column(tmp_path):
    # reference library: statsmodels WLS with a third column, 1 for the inversion rows; its coefficient
    # is the offset of ln k of those rows from the line through the others
    hot, cold = write_tables(tmp_path, cold_scale=2.0)
    result = eyring_fit_file([hot, *cold])[0]
    t, k, err = pooled([hot, *cold])
    x = np.column_stack([np.ones_like(t), 1.0 / t, (np.arange(len(t)) >= 4).astype(float)])
    ref = sm.WLS(np.log(k / t), x, weights=(k / err) ** 2).fit(cov_type="fixed scale")
    offset = method_offset(result, "inversion")
    assert offset.value == pytest.approx(ref.params[2], rel=1e-8)
    assert offset.stderr == pytest.approx(ref.bse[2], rel=1e-8)
    assert offset.value == pytest.approx(np.log(2.0), abs=3 * offset.stderr)
    assert any("the inversion rates lie" in w and "the methods disagree" in w for w in result.warnings)


def test_method_offset_counts_held_trend_errors_shared_by_one_methods_rows(tmp_path):
    # The lineshape rates share a held trend's error (log10_rate_shared_* columns: a common shift and a tilt),
    # which moves them together against the inversion rates: the offset's error must hold it. Reference:
    # the spread of statsmodels WLS's indicator coefficient (weights as the line's) over 20,000 draws of
    # correlated noise, V = diag(sigma^2 - |u|^2) + U U^T (numpy; variance to about 1 %, allow 5 % in the
    # standard error).
    hot_k, hot_err = _rates(HOT_K, 0.05, 3)
    cold_k, cold_err = _rates(COLD_K, 0.01, 4)
    tilt = (HOT_K - HOT_K.mean()) / np.ptp(HOT_K)
    u = np.column_stack([np.full(4, 0.04), 0.05 * tilt])  # ln k: most of the 5 % of each rate
    hot = tmp_path / "lineshape.csv"
    hot.write_text("temperature_k,process,rate_per_s,rate_stderr,status,log10_rate_shared_shift_ppm_A_1,"
                   "log10_rate_shared_shift_ppm_A_2\n" + "".join(
                       f"{t},rotation,{r!r},{e!r},determined,{a / math.log(10)!r},{b / math.log(10)!r}\n"
                       for t, r, e, (a, b) in zip(HOT_K, hot_k.tolist(), hot_err.tolist(), u.tolist())))
    cold = tmp_path / "inversion.csv"
    cold.write_text("temperature_k,process,rate_per_s,rate_stderr,status,method\n" + "".join(
        f"{t},rotation,{r!r},{e!r},determined,inversion\n" for t, r, e in zip(COLD_K, cold_k.tolist(), cold_err.tolist())))
    result = eyring_fit_file([hot, cold])[0]
    offset = method_offset(result, "inversion")
    t = np.concatenate([HOT_K, COLD_K])
    sigma = np.concatenate([hot_err / hot_k, cold_err / cold_k])
    x = np.column_stack([np.ones_like(t), 1.0 / t, (np.arange(8) >= 4).astype(float)])
    shared = np.vstack([u, np.zeros((4, 2))])
    v = np.diag(sigma**2 - (shared**2).sum(axis=1)) + shared @ shared.T
    y = np.log(np.concatenate([hot_k, cold_k]) / t)
    assert offset.value == pytest.approx(sm.WLS(y, x, weights=1.0 / sigma**2).fit().params[2], rel=1e-8)
    draws = np.random.default_rng(5).multivariate_normal(np.zeros(8), v, size=20_000)
    spread = float(np.std(sm.WLS(draws.T, x, weights=1.0 / sigma**2).fit().params[2]))
    assert offset.stderr == pytest.approx(spread, rel=0.05)
    independent = sm.WLS(y, x, weights=1.0 / sigma**2).fit(cov_type="fixed scale").bse[2]
    assert independent < 0.8 * spread  # counted as independent, the shared parts would average away


def test_methods_that_agree_raise_no_disagreement(tmp_path):
    hot, cold = write_tables(tmp_path)
    result = eyring_fit_file([hot, *cold])[0]
    offset = result.method_offsets()["inversion"]
    assert abs(offset.value) < 3 * offset.stderr
    assert not any("disagree" in w for w in result.warnings)


def test_single_path_and_lineshape_only_tables_are_unchanged(tmp_path):
    hot, _ = write_tables(tmp_path)
    one, listed = eyring_fit_file(hot)[0], eyring_fit_file([hot])[0]
    assert one.to_dict()["enthalpy_kj_mol"] == listed.to_dict()["enthalpy_kj_mol"]
    assert one.to_dict()["methods"] == {"lineshape": 4} and one.method_offsets() == {}
    assert "methods  " not in one.report() and "Agreement" not in one.report()


def test_a_table_without_process_joins_the_only_named_process(tmp_path):
    hot, _ = write_tables(tmp_path)
    own = tmp_path / "own.csv"
    k, err = _rates(COLD_K[:2], 0.04, 5)
    own.write_text("temperature_k,rate_per_s,rate_stderr,method\n"
                   + "".join(f"{t},{float(r)!r},{float(e)!r},EXSY-literature\n" for t, r, e in zip(COLD_K[:2], k, err)))
    (series,) = read_rates([hot, own])
    assert series.process == "rotation" and len(series) == 6
    assert series.methods.tolist() == ["lineshape"] * 4 + ["EXSY-literature"] * 2
    assert series.where(5).startswith(str(own)) and series.where(5).endswith("line 3")


def test_joining_problems_are_one_line_naming_the_file(tmp_path):
    hot, cold = write_tables(tmp_path)
    two = tmp_path / "two.csv"
    two.write_text("temperature_k,process,rate_per_s,rate_stderr\n250,a,1,0.1\n260,a,2,0.1\n250,b,3,0.1\n260,b,4,0.1\n")
    bare = tmp_path / "bare.csv"
    bare.write_text("temperature_k,rate_per_s,rate_stderr\n250,1,0.1\n")
    with pytest.raises(InputError, match=f"{bare}: the table has no process column but the other tables name"):
        read_rates([two, bare])
    bad = tmp_path / "bad.csv"
    bad.write_text("temperature_k,process,rate_per_s,rate_stderr,method\n250,rotation,-1,0.1,inversion\n")
    with pytest.raises(InputError, match=f"^{bad}: line 2: rate_per_s must be positive"):
        read_rates([hot, bad])
    with pytest.raises(InputError, match="named twice"):
        read_rates([hot, hot])
    with pytest.raises(InputError, match="fewer than 2 different temperatures"):
        read_rates(cold[0])  # one transfer table alone has one temperature: it needs the others


def test_cli_eyring_takes_several_tables_and_keeps_the_contract_keys(tmp_path):
    hot, cold = write_tables(tmp_path)
    result = CliRunner().invoke(cli, ["eyring", str(hot), *map(str, cold), "--json",
                                      "--plot", str(tmp_path / "joint.png")])
    assert result.exit_code == 0, result.output
    out = json.loads(result.stdout)
    assert all(isinstance(out[key], float) for key in CONTRACT_KEYS)
    assert out["n_rates"] == 8 and out["methods"] == {"lineshape": 4, "inversion": 4}
    assert (tmp_path / "joint.png").stat().st_size > 1000
    text = CliRunner().invoke(cli, ["eyring", str(hot), *map(str, cold)])
    assert text.exit_code == 0 and "inversion (4 rates)" in text.output
    bare = tmp_path / "bare.csv"
    bare.write_text("temperature_k,rate_per_s\n250,1\n")
    two = tmp_path / "two.csv"
    two.write_text("temperature_k,process,rate_per_s\n250,a,1\n260,a,2\n250,b,3\n260,b,4\n")
    failed = CliRunner().invoke(cli, ["eyring", str(two), str(bare)])
    assert failed.exit_code == 2 and len(failed.output.strip().splitlines()) == 1


def test_figure_marks_each_method_with_its_marker_and_palette_hue(tmp_path):
    hot, cold = write_tables(tmp_path)
    fig = plot_eyring(eyring_fit_file([hot, *cold]))
    ax = fig.axes[0]
    points = {(line.get_marker(), to_hex(line.get_color())) for line in ax.lines if line.get_linestyle() == "None"}
    assert ("o", PALETTE["indigo"]) in points and ("^", PALETTE["vermilion"]) in points
    texts = [t.get_text() for t in ax.get_legend().get_texts()]
    assert sorted(t for t in texts if "confidence band" not in t) == ["inversion", "lineshape"]
    assert any("95 % confidence band" in t for t in texts)  # the band is labelled too
    plt.close(fig)
