"""Tests of dnmr.activation.thermometers and .temperature_calibration: shift thermometers, reading them from
spectra, set-point calibrations.

Calibration formulas: Ammann, Meier & Merbach, J. Magn. Reson. 46, 319 (1982) (from memory, as given in
PHYSICS.md); the older methanol fit of Raiford, Fisk & Becker, Anal. Chem. 51, 2050 (1979) (from memory).
Synthetic thermometer spectra are sums of Lorentzian absorption lines (the closed-form slow-motion
lineshape of the Bloch equations) placed at stated shifts, with first-order multiplets from the n + 1
rule with binomial intensities (textbook). Calibration statistics are checked against statsmodels OLS.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

import dnmr
import statsmodels.api as sm
from click.testing import CliRunner

from dnmr.activation.eyring import eyring_fit_file
from dnmr.cli import cli
from dnmr.errors import InputError
from dnmr.activation.temperature_calibration import fit_temperature_calibration, read_temperature_calibration
from dnmr.activation.thermometers import (
    ETHYLENE_GLYCOL,
    METHANOL,
    THERMOMETER_CAUTIONS,
    get_thermometer,
    temperature_from_file,
    temperature_from_spectrum,
    thermometer_reading,
)


# ---------------------------------------------------------------------------------------------
# Calibration formulas
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "dd, expected",
    [
        # Ammann, Meier & Merbach (1982), methanol, T = 409.0 - 36.54 dd - 21.85 dd^2 (from memory),
        # evaluated by hand
        (1.5, 409.0 - 54.81 - 49.1625),
        (2.0, 409.0 - 73.08 - 87.40),
        (2.5, 409.0 - 91.35 - 136.5625),
    ],
)
def test_methanol_formula(dd, expected):
    assert METHANOL.temperature(dd) == pytest.approx(expected, abs=1e-9)


@pytest.mark.parametrize("dd, expected", [(0.6, 405.3), (1.0, 364.5), (1.5, 313.5), (1.85, 277.8)])
def test_glycol_formula(dd, expected):
    # Ammann, Meier & Merbach (1982), ethylene glycol, T = 466.5 - 102.00 dd (from memory), by hand
    assert ETHYLENE_GLYCOL.temperature(dd) == pytest.approx(expected, abs=1e-9)


def test_methanol_calibrations_of_1979_and_1982_agree_at_1_5_ppm():
    # PHYSICS.md: the older methanol fit of Raiford, Fisk & Becker, Anal. Chem. 51, 2050 (1979) agrees with
    # the 1982 one within about 1 K at dd = 1.5 ppm. Its form T = 403.0 - 29.53 dd - 23.87 dd^2 is from
    # memory; only the agreement at 1.5 ppm is asserted, as that is all we are sure of.
    older = 403.0 - 29.53 * 1.5 - 23.87 * 1.5**2
    assert abs(METHANOL.temperature(1.5) - older) < 1.0


def test_formulas_decrease_with_shift_difference_and_invert():
    # fact of the trade: the OH line moves downfield (dd grows) as the liquid cools (common practice)
    for thermo in (METHANOL, ETHYLENE_GLYCOL):
        lo, hi = thermo.shift_difference_range_ppm
        dd = np.linspace(lo, hi, 25)
        t = thermo.temperature(dd)
        assert (np.diff(t) < 0).all()
        assert t[0] == pytest.approx(thermo.valid_range_k[1]) and t[-1] == pytest.approx(thermo.valid_range_k[0])
        for temperature in (t[3], t[12], t[20]):
            assert thermo.temperature(thermo.shift_difference(temperature)) == pytest.approx(temperature, rel=1e-12)


def test_valid_ranges_are_the_published_ones():
    # Ammann, Meier & Merbach (1982) (from memory): methanol 178-330 K, ethylene glycol 273-416 K
    assert METHANOL.valid_range_k == (178.0, 330.0)
    assert ETHYLENE_GLYCOL.valid_range_k == (273.0, 416.0)


def test_refuses_outside_the_calibrated_range():
    with pytest.raises(InputError, match=r"gives 350.6 K, outside its calibrated range 178-330 K.*ethylene glycol"):
        METHANOL.temperature(1.0)
    with pytest.raises(InputError, match=r"outside its calibrated range 273-416 K.*methanol"):
        ETHYLENE_GLYCOL.temperature(2.2)
    with pytest.raises(InputError, match="outside its calibrated range"):
        METHANOL.temperature(3.0)
    with pytest.raises(InputError, match='unknown thermometer .*did you mean "methanol"'):
        get_thermometer("methanl")


def test_reading_from_a_shift_difference():
    reading = thermometer_reading(1.5, "methanol")
    assert reading.temperature_k == pytest.approx(305.0275)
    assert "305.03 K" in reading.report()
    assert reading.to_dict()["thermometer"] == "methanol"


# ---------------------------------------------------------------------------------------------
# Reading a thermometer spectrum
# ---------------------------------------------------------------------------------------------


def lorentzian(x, centre, fwhm):
    """Unit-area Lorentzian absorption line (Bloch equations, slow motion)."""
    return (fwhm / (2 * np.pi)) / ((x - centre) ** 2 + (fwhm / 2) ** 2)


def multiplet(x, centre, n_neighbours, j_ppm, fwhm, area):
    """First-order multiplet: n + 1 lines J apart with binomial intensities (textbook n + 1 rule)."""
    weights = np.array([1.0])
    for _ in range(n_neighbours):
        weights = np.convolve(weights, [0.5, 0.5])
    offsets = (np.arange(n_neighbours + 1) - n_neighbours / 2) * j_ppm
    return area * sum(w * lorentzian(x, centre + o, fwhm) for w, o in zip(weights, offsets))


MHZ = 400.0
AXIS = np.linspace(-1.0, 9.0, 2**15)


def thermometer_spectrum(thermo, temperature_k, alkyl_ppm, *, coupled=False, noise=0.0, seed=0, extra=()):
    """Spectrum of a thermometer at a stated temperature: the true dd from the published calibration."""
    dd = thermo.shift_difference(temperature_k)
    fwhm = 1.0 / MHZ  # 1 Hz lines
    j = 5.0 / MHZ if coupled else 0.0  # vicinal H-C-O-H coupling of a few Hz (common practice)
    n_alkyl = 3 if thermo is METHANOL else 4
    n_oh = 1 if thermo is METHANOL else 2
    y = multiplet(AXIS, alkyl_ppm, 1 if coupled else 0, j, fwhm, n_alkyl)
    y += multiplet(AXIS, alkyl_ppm + dd, 3 if coupled and thermo is METHANOL else 0, j, 3 * fwhm, n_oh)
    for centre, area in extra:
        y += area * lorentzian(AXIS, centre, fwhm)
    rng = np.random.default_rng(seed)
    return y + 5.0 + noise * rng.normal(size=AXIS.size), dd


@pytest.mark.parametrize("thermo, temperature", [(METHANOL, 185.0), (METHANOL, 240.0), (METHANOL, 320.0), (ETHYLENE_GLYCOL, 300.0), (ETHYLENE_GLYCOL, 400.0)])
def test_temperature_from_synthetic_spectrum(thermo, temperature):
    y, dd = thermometer_spectrum(thermo, temperature, 3.40, noise=2.0)
    reading = temperature_from_spectrum(AXIS[::-1], y[::-1], thermo, frequency_mhz=MHZ)  # high to low ppm
    assert reading.shift_difference_ppm == pytest.approx(dd, abs=2e-4)
    assert reading.temperature_k == pytest.approx(temperature, abs=0.05)
    assert reading.alkyl_ppm == pytest.approx(3.40, abs=1e-4)
    assert reading.integral_ratio == pytest.approx(thermo.proton_ratio, rel=0.1)
    assert reading.notes == ()


def test_resolved_multiplets_are_centred():
    # very dry methanol: CH3 doublet and OH quartet (J about 5 Hz); the centroid of each is its shift
    y, dd = thermometer_spectrum(METHANOL, 220.0, 3.30, coupled=True)
    reading = temperature_from_spectrum(AXIS, y, "methanol", frequency_mhz=MHZ)
    assert reading.shift_difference_ppm == pytest.approx(dd, abs=2e-4)
    assert reading.temperature_k == pytest.approx(220.0, abs=0.05)


def test_other_lines_are_noted_not_used():
    y, dd = thermometer_spectrum(METHANOL, 260.0, 3.35, extra=[(1.2, 0.5)])
    reading = temperature_from_spectrum(AXIS, y, "methanol", frequency_mhz=MHZ)
    assert reading.temperature_k == pytest.approx(260.0, abs=0.05)
    assert any("1.20 ppm" in note for note in reading.notes)


def test_spectrum_without_thermometer_lines_is_refused():
    one_line = lorentzian(AXIS, 3.3, 0.0025)
    with pytest.raises(InputError, match="fewer than two lines"):
        temperature_from_spectrum(AXIS, one_line, "methanol")
    upfield_only = 3 * lorentzian(AXIS, 3.3, 0.0025) + lorentzian(AXIS, 1.5, 0.0025)
    with pytest.raises(InputError, match="no line found downfield of the CH3 line"):
        temperature_from_spectrum(AXIS, upfield_only, "methanol")
    too_hot = 3 * lorentzian(AXIS, 3.3, 0.0025) + lorentzian(AXIS, 4.3, 0.0025)  # dd = 1.0 ppm
    with pytest.raises(InputError, match="outside its calibrated range"):
        temperature_from_spectrum(AXIS, too_hot, "methanol", source="hot.csv")


def test_temperature_from_a_spectrum_file(tmp_path):
    y, _ = thermometer_spectrum(ETHYLENE_GLYCOL, 350.0, 3.55)
    path = tmp_path / "glycol_350.csv"
    np.savetxt(path, np.column_stack([AXIS[::-1], y[::-1]]), delimiter=",", header="ppm,intensity", comments="")
    assert temperature_from_file(path, "glycol").temperature_k == pytest.approx(350.0, abs=0.05)
    run = CliRunner().invoke(cli, ["thermometer", "glycol", "--spectrum", str(path), "--json"])
    assert run.exit_code == 0, run.output
    out = json.loads(run.stdout)
    assert out["readings"][0]["temperature_k"] == pytest.approx(350.0, abs=0.05)
    assert out["cautions"] == THERMOMETER_CAUTIONS


# ---------------------------------------------------------------------------------------------
# Set-point calibration
# ---------------------------------------------------------------------------------------------

SETPOINTS = np.array([220.0, 240.0, 260.0, 280.0, 300.0, 320.0])
MEASURED = np.array([223.9, 242.6, 261.8, 280.4, 299.7, 318.2])  # a sample reads warmer below room temperature


@pytest.mark.parametrize("degree", [1, 2])
def test_calibration_matches_statsmodels(degree):
    # reference library: statsmodels OLS on the polynomial design; mean-curve covariance from cov_params,
    # a new run's error from the prediction interval (se_obs)
    cal = fit_temperature_calibration(SETPOINTS, MEASURED, degree)
    queries = np.array([230.0, 255.0, 310.0])
    design = np.vander(SETPOINTS - SETPOINTS.mean(), degree + 1, increasing=True)
    ref = sm.OLS(MEASURED, design).fit()
    q_design = np.vander(queries - SETPOINTS.mean(), degree + 1, increasing=True)
    prediction = ref.get_prediction(q_design)
    applied = cal.true_temperature(queries)
    assert applied.temperature_k == pytest.approx(prediction.predicted_mean, rel=1e-12)
    assert applied.stderr == pytest.approx(prediction.se_obs, rel=1e-9)
    curve_cov = q_design @ ref.cov_params() @ q_design.T
    off_diagonal = ~np.eye(3, dtype=bool)
    assert applied.covariance[off_diagonal] == pytest.approx(curve_cov[off_diagonal], rel=1e-9)


def test_calibration_refuses_extrapolation_and_too_few_points():
    cal = fit_temperature_calibration(SETPOINTS, MEASURED)
    with pytest.raises(InputError, match="outside the calibrated range 220-320 K"):
        cal.true_temperature([330.0])
    with pytest.raises(InputError, match="at least 4 different set-points"):
        fit_temperature_calibration([250.0, 270.0, 290.0], [251.0, 270.0, 289.0], 2)


def test_calibration_table_from_thermometer_shifts(tmp_path):
    # the true temperatures come from methanol shift differences through the 1982 calibration
    truth = np.array([225.0, 245.0, 265.0, 285.0])
    rows = [f"{s},{float(METHANOL.shift_difference(t))!r}" for s, t in zip([220, 240, 260, 280], truth)]
    path = tmp_path / "calibration.csv"
    path.write_text("setpoint_k,shift_difference_ppm\n" + "\n".join(rows) + "\n")
    cal = read_temperature_calibration(path, thermometer="methanol")
    assert cal.temperature_k == pytest.approx(truth, rel=1e-12)
    with pytest.raises(InputError, match="say which thermometer"):
        read_temperature_calibration(path)
    celsius = tmp_path / "celsius.csv"
    celsius.write_text("setpoint_k,temperature_k\n-20,-18\n0,1\n20,21\n")
    with pytest.raises(InputError, match=r"line 2: setpoint_k = -20 looks like degrees Celsius"):
        read_temperature_calibration(celsius)


def _eyring_rates(temperatures):
    # Eyring equation written out with CODATA constants (scipy.constants); dH 50 kJ/mol, dS -20 J/(mol K)
    from scipy import constants

    t = np.asarray(temperatures)
    return constants.k * t / constants.h * np.exp(-20.0 / constants.R) * np.exp(-50e3 / (constants.R * t))


def test_calibration_is_carried_into_the_eyring_analysis(tmp_path):
    cal = fit_temperature_calibration(SETPOINTS, MEASURED)
    true_t = cal.true_temperature(SETPOINTS[:-1] + 10).temperature_k
    k = _eyring_rates(true_t)
    rates = tmp_path / "rates.csv"
    rates.write_text(
        "temperature_k,rate_per_s,rate_stderr\n" + "\n".join(f"{s},{float(v)!r},{0.03 * float(v)!r}" for s, v in zip(SETPOINTS[:-1] + 10, k)) + "\n"
    )
    (plain,) = eyring_fit_file(rates)
    (calibrated,) = eyring_fit_file(rates, calibration=cal)
    assert calibrated.temperature_k == pytest.approx(true_t)
    assert calibrated.enthalpy_kj_mol == pytest.approx(50.0, rel=1e-9)
    assert abs(plain.enthalpy_kj_mol - 50.0) > 0.5  # set-points taken as sample temperatures: biased
    assert calibrated.enthalpy_stderr > plain.enthalpy_stderr
    assert calibrated.temperature_error_sources == ("calibration",)
    assert calibrated.error_shares()["gibbs_298"]["calibration"] > 0
    beyond = tmp_path / "beyond.csv"
    beyond.write_text("temperature_k,rate_per_s\n240,1.0\n260,5.0\n335,900\n")
    with pytest.raises(InputError, match=r"beyond.csv: line 4: set-point 335 K is outside the calibrated range"):
        eyring_fit_file(beyond, calibration=cal)
    cal_file = tmp_path / "cal.csv"
    cal_file.write_text("setpoint_k,temperature_k\n" + "\n".join(f"{s},{t}" for s, t in zip(SETPOINTS, MEASURED)) + "\n")
    run = CliRunner().invoke(cli, ["eyring", str(rates), "--calibration", str(cal_file), "--json"])
    assert run.exit_code == 0, run.output
    out = json.loads(run.stdout)
    assert out["enthalpy_kj_mol"] == pytest.approx(50.0, rel=1e-9)
    assert out["calibration"]["degree"] == 1


# ---------------------------------------------------------------------------------------------
# Command line and cautions
# ---------------------------------------------------------------------------------------------


def test_cli_thermometer_from_shift_difference_shows_cautions():
    run = CliRunner().invoke(cli, ["thermometer", "methanol", "--shift-difference-ppm", "1.5", "--shift-difference-ppm", "2.0"])
    assert run.exit_code == 0, run.output
    assert "305.03 K" in run.stdout and "248.52 K" in run.stdout
    assert "toxic" in run.stdout and "flammable" in run.stdout and "local safety rules" in run.stdout


def test_cli_thermometer_out_of_range_exits_2_with_one_line():
    run = CliRunner().invoke(cli, ["thermometer", "glycol", "--shift-difference-ppm", "2.5"])
    assert run.exit_code == 2
    assert run.stderr.strip().count("\n") == 0 and "outside its calibrated range" in run.stderr
    nothing = CliRunner().invoke(cli, ["thermometer", "methanol"])
    assert nothing.exit_code == 2 and "--shift-difference-ppm" in nothing.stderr


def test_calibration_error_is_shared_not_scatter(tmp_path):
    # The sample temperatures stray from the calibration curve as the calibration says (its curve error is
    # shared by all set-points, its scatter is not); rates 3 % noisy. With the shared part counted as
    # correlated the reduced chi-square averages 1 (chi-square distribution, statistics): over 150 series
    # of 7 - 2 degrees of freedom its mean scatters by sqrt(2/5/150) = 0.05, allow 4 of them. Counted as
    # independent scatter it would average well below 1 and warn that the rates scatter too little.
    cal = fit_temperature_calibration(SETPOINTS, MEASURED + np.array([0.0, 1.5, -1.2, 0.4, 1.1, -1.6]))
    setpoints = np.linspace(225.0, 315.0, 7)
    applied = cal.true_temperature(setpoints)
    rng = np.random.default_rng(5)
    rates = tmp_path / "rates.csv"
    reduced, warned = [], 0
    for _ in range(150):
        true_t = rng.multivariate_normal(applied.temperature_k, applied.covariance)
        k = _eyring_rates(true_t) * np.exp(rng.normal(0.0, 0.03, true_t.size))
        rates.write_text("temperature_k,rate_per_s,rate_stderr\n"
                         + "\n".join(f"{s},{float(v)!r},{0.03 * float(v)!r}" for s, v in zip(setpoints, k)) + "\n")
        (result,) = eyring_fit_file(rates, calibration=cal)
        reduced.append(result.to_dict()["reduced_chi_square"])
        warned += any("much less than their errors" in w for w in result.warnings)
    assert np.mean(reduced) == pytest.approx(1.0, abs=4 * math.sqrt(2 / 5 / 150))
    assert warned <= 6  # the warning fires at p > 0.99: about 1 % of honest series


# ---------------------------------------------------------------------------------------------
# A calibration built from thermometer spectra (dnmr thermometer --calibrate)
# ---------------------------------------------------------------------------------------------


def _methanol_dd(temperature_k: float) -> float:
    """dd (ppm) at which the 1982 methanol formula (from memory) gives `temperature_k`: the positive root of
    21.85 dd^2 + 36.54 dd - (409.0 - T) = 0 by the quadratic formula, solved here by hand."""
    return (-36.54 + math.sqrt(36.54**2 + 4 * 21.85 * (409.0 - temperature_k))) / (2 * 21.85)


def _write_methanol_spectrum(path, temperature_k: float) -> None:
    dd = _methanol_dd(temperature_k)
    y = 3 * lorentzian(AXIS, 3.35, 1.0 / MHZ) + lorentzian(AXIS, 3.35 + dd, 3.0 / MHZ) + 5.0
    np.savetxt(path, np.column_stack([AXIS[::-1], y[::-1]]), delimiter=",", header="ppm,intensity", comments="")


def test_calibration_built_from_thermometer_spectra(tmp_path):
    # an invented probe: the sample runs at T = 1.02 s - 3.0 K for a set-point s
    setpoints = [220.0, 240.0, 260.0, 280.0, 300.0]
    truth = [1.02 * s - 3.0 for s in setpoints]
    (tmp_path / "spectra").mkdir()
    for s, t in zip(setpoints, truth):
        _write_methanol_spectrum(tmp_path / "spectra" / f"meoh_{s:.0f}.csv", t)
    listing = tmp_path / "thermometer.csv"
    listing.write_text("setpoint_k,file\n" + "".join(f"{s:g},spectra/meoh_{s:.0f}.csv\n" for s in setpoints))
    out = tmp_path / "calibration.csv"
    run = CliRunner().invoke(cli, ["thermometer", "methanol", "--calibrate", str(listing), "-o", str(out)])
    assert run.exit_code == 0, run.output
    assert THERMOMETER_CAUTIONS in run.output and "Temperature calibration (degree 1, 5 points)" in run.output
    cal = read_temperature_calibration(out)  # the table the other commands read with --calibration
    assert cal.temperature_k == pytest.approx(truth, abs=0.05)
    assert cal.true_temperature([250.0]).temperature_k[0] == pytest.approx(1.02 * 250.0 - 3.0, abs=0.05)
    again = CliRunner().invoke(cli, ["thermometer", "methanol", "--calibrate", str(listing), "-o", str(out)])
    assert again.exit_code == 2 and "--overwrite" in again.output  # never silently over an existing table


def test_calibration_from_spectra_keeps_the_others_when_one_fails(tmp_path):
    setpoints = [230.0, 250.0, 270.0, 290.0]
    for s in setpoints:
        _write_methanol_spectrum(tmp_path / f"m{s:.0f}.csv", s + 1.0)
    listing = tmp_path / "list.csv"
    listing.write_text("setpoint_k,file\n" + "".join(f"{s:g},m{s:.0f}.csv\n" for s in setpoints) + "310,missing.csv\n")
    run = CliRunner().invoke(cli, ["thermometer", "methanol", "--calibrate", str(listing), "--json"])
    assert run.exit_code == 2
    out = json.loads(run.stdout)
    assert [r["setpoint_k"] for r in out["readings"]] == setpoints
    assert len(out["skipped"]) == 1 and "line 6 (missing.csv)" in out["skipped"][0]
    assert out["calibration_fit"]["n_points"] == 4 and out["cautions"] == THERMOMETER_CAUTIONS
    celsius = tmp_path / "celsius.csv"
    celsius.write_text("setpoint_k,file\n-20,m230.csv\n")
    bad = CliRunner().invoke(cli, ["thermometer", "methanol", "--calibrate", str(celsius)])
    assert bad.exit_code == 2 and "looks like degrees Celsius" in bad.output


def test_thermometer_readings_is_what_the_command_reports():
    """`dnmr thermometer` is one call of dnmr.thermometer_readings: hand readings first, then files; nothing
    given is one clear error (the command's own message)."""
    readings = dnmr.thermometer_readings("methanol", [1.5, 2.0])
    assert [r.temperature_k for r in readings] == [dnmr.thermometer_reading(dd, "methanol").temperature_k
                                                   for dd in (1.5, 2.0)]
    with pytest.raises(dnmr.InputError, match="--shift-difference"):
        dnmr.thermometer_readings("methanol")
