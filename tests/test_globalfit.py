"""Global fit of a VT series (dnmr.fitting.globalfit and `dnmr fit --global`) on invented series.

The spectra are made by the McConnell closed form (J. Chem. Phys. 28, 430 (1958); tests/closed_forms.py),
not by dnmr's engine, with rates from the Eyring equation (Eyring, J. Chem. Phys. 3, 107 (1935)) with
CODATA constants from scipy.constants, for invented activation parameters, plus normal noise.  The
coverage tests use tests/realistic_series.py (McConnell; populations by van 't Hoff): first-guess shifts
off by a few Hz, shifts and referencing drifting with T, phase errors, sloping baselines, a linewidth
changing with T, and a known truth.
"""
from __future__ import annotations

import dataclasses
import json
import math
import re
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from scipy import constants

from closed_forms import mcconnell_two_site
from realistic_series import SCENARIOS, write_series
from reference_eyring import eyring_rate
from dnmr.cli import cli
from dnmr.errors import InputError
from dnmr.fitting.globalfit import fit_global_from_two_step, fit_series_global
from dnmr.fitting.globaltreatment import Treatment
from dnmr.fitting.series import fit_series
from dnmr.fitting.seriesfile import load_series
from dnmr.activation.temperature_calibration import fit_temperature_calibration

SF = 400.0
ENTHALPY_KJ_MOL, ENTROPY_J_MOL_K = 55.0, -12.0  # invented
TEMPERATURES = [262.0, 272.0, 282.0, 292.0, 302.0, 312.0]
PPM = np.linspace(2.55, 3.45, 1000)
NOISE = 0.03

MODEL = """title = "invented two-site test system"
[spectrometer]
nucleus = "1H"
frequency_mhz = 400.0
[[state]]
name = "a"
population = 0.5
linewidth_hz = 1.5
shifts_ppm = { H = 2.92 }
[[state]]
name = "b"
population = 0.5
linewidth_hz = 1.5
shifts_ppm = { H = 3.08 }
[[exchange]]
name = "flip"
from = "a"
to = "b"
rate_per_s = 100.0
"""


@pytest.fixture(scope="module")
def series_file(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("vt")
    (folder / "model.toml").write_text(MODEL)
    lines = ['model = "model.toml"', "[fit]", "region_ppm = [2.7, 3.3]", 'linewidth = "shared"']
    rng = np.random.default_rng(20240611)
    for t in TEMPERATURES:
        k = eyring_rate(t, ENTHALPY_KJ_MOL, ENTROPY_J_MOL_K)
        s = mcconnell_two_site(PPM * SF, 2.92 * SF, 3.08 * SF, k, 0.5, 1.5, 1.5)
        y = 40.0 * s.real + 0.1 + rng.normal(0.0, NOISE, PPM.size)
        name = f"t{t:.0f}.txt"
        (folder / name).write_text("ppm\tintensity\n" + "\n".join(f"{p:.6f}\t{v:.7f}" for p, v in zip(PPM, y)) + "\n")
        lines += ["[[spectrum]]", f'file = "{name}"', f"temperature_k = {t}"]
    (folder / "series.toml").write_text("\n".join(lines) + "\n")
    return folder / "series.toml"


@pytest.fixture(scope="module")
def result(series_file, tmp_path_factory):
    return fit_series_global(series_file, tmp_path_factory.mktemp("out") / "g", workers=2, progress=False)


def test_recovers_activation_parameters_within_errors(result):
    # truth: the invented ΔH‡/ΔS‡ the spectra were made with (Eyring 1935, CODATA constants)
    a = result.activation[0]
    assert abs(a.enthalpy_kj_mol - ENTHALPY_KJ_MOL) < 3 * a.enthalpy_stderr
    assert abs(a.entropy_j_mol_k - ENTROPY_J_MOL_K) < 3 * a.entropy_stderr
    g, se = a.gibbs(constants.zero_Celsius + 25.0)
    assert abs(g - (ENTHALPY_KJ_MOL - 298.15 * ENTROPY_J_MOL_K / 1e3)) < 3 * se


def test_agrees_with_two_step_eyring(result):
    # the two routes analyse the same spectra: they must agree within the (larger) error of either
    a, e = result.activation[0], result.two_step[0]
    assert abs(a.enthalpy_kj_mol - e.enthalpy_kj_mol) < max(a.enthalpy_stderr, e.enthalpy_stderr)
    assert abs(a.entropy_j_mol_k - e.entropy_j_mol_k) < max(a.entropy_stderr, e.entropy_stderr)


def test_enthalpy_entropy_correlation_near_one(result):
    # Grieger, Hunter & Krug, Nature 261, 566 (1976): ΔH‡ and ΔS‡ of one series correlate close to +1
    assert result.activation[0].correlation > 0.95
    # and ΔG‡ at the harmonic-mean temperature is much better determined than at 298.15 K
    a = result.activation[0]
    assert a.gibbs(result.harmonic_mean_temperature_k)[1] < a.gibbs(298.15)[1]


def test_outputs_written(result):
    data = json.loads((result.outdir / "global.json").read_text())
    for key in ("enthalpy_kj_mol", "enthalpy_stderr", "entropy_j_mol_k", "entropy_stderr", "gibbs_298_kj_mol",
                "gibbs_298_stderr"):
        assert math.isfinite(data[key])
    assert data["enthalpy_kj_mol"] == pytest.approx(result.activation[0].enthalpy_kj_mol)
    assert {r["quantity"] for r in data["comparison"]} >= {"enthalpy_kj_mol", "entropy_j_mol_k"}
    assert "two-step" in (result.outdir / "global.txt").read_text()
    assert (result.outdir / "global_fits.png").stat().st_size > 0
    assert (result.outdir / "two-step" / "rates.csv").exists()


def test_refuses_existing_outdir_and_bad_choice(result, series_file):
    with pytest.raises(InputError):
        fit_series_global(series_file, result.outdir)
    with pytest.raises(InputError):
        fit_series_global(series_file, result.outdir.parent / "other", shift_trend="cubic")


def test_cli_global(series_file, tmp_path):
    out = tmp_path / "cli"
    run = CliRunner().invoke(cli, ["fit", str(series_file), "-o", str(out), "--global",
                                   "--shift-trend", "linear", "--linewidth-trend", "linear"])
    assert run.exit_code == 0, run.output
    # stderr is not a terminal here: plain progress lines of the two-step fit and of the global fit
    assert re.search(r": \d+ of \d+ done \(\d+ K\), \d+ s elapsed", run.stderr), run.stderr
    assert f"global fit of {len(TEMPERATURES)} spectra: finished after " in run.stderr, run.stderr
    assert json.loads((out / "global.json").read_text())["options"]["shift_trend"] == "linear"
    assert (out / "report.html").is_file() and "report:" in run.output
    again = CliRunner().invoke(cli, ["fit", str(series_file), "-o", str(out), "--global"])
    assert again.exit_code == 2
    assert len(again.output.strip().splitlines()) == 1
    rewritten = CliRunner().invoke(cli, ["report", str(out), "--overwrite"])
    assert rewritten.exit_code == 0, rewritten.output
    calibrated = CliRunner().invoke(cli, ["report", str(out), "--overwrite", "--calibration", str(series_file)])
    assert calibrated.exit_code == 2 and "--global --calibration" in calibrated.output


def test_report_of_global_folder(result):
    # dnmr report on a global-fit folder: the global fit's own numbers, the two-step comparison, the figures
    # embedded, nothing fetched from elsewhere
    from dnmr.reporting.report import write_report

    page = write_report(result.outdir, output=result.outdir / "page.html").read_text()
    a = result.activation[0]
    assert f'data-key="enthalpy_kj_mol" data-value="{a.enthalpy_kj_mol!r}"' in page
    assert "Global against two-step" in page and "two-step (rates, then Eyring)" in page
    assert page.count("data:image/png;base64,") >= 2
    assert "http://" not in page and "https://" not in page and "<script" not in page
    for q in result.spectra:
        assert Path(q.file).name in page


def test_weights_are_the_measured_noise_and_the_chi_square_is_honest(result):
    # a model that describes the data fits to the noise: reduced chi-square near 1 (its spread for
    # 6 x 600 points is about 0.02; common practice), and every spectrum's chi-square per point too
    assert abs(result.reduced_chi_square - 1.0) < 0.1
    assert result.error_scale == 1.0
    assert all(abs(q.per_point - 1.0) < 0.2 and not q.misfit for q in result.spectra)


# --- coverage on realistic series (tests/realistic_series.py) -----------------------------------------------


def _short(kind: str):
    """A CI-sized version of a realistic scenario: every other temperature (5 of 10), 2048 points."""
    scenario = SCENARIOS[kind]
    return scenario.replace(temperatures_k=scenario.temperatures_k[::2], points=2048)


def _written(folder: Path, kind: str, seed: int):
    """A realistic series; its two-step stage without chi-square profiles (the global fit does not use them)."""
    truth = write_series(folder, _short(kind), seed)
    with open(truth.series_file, "a") as handle:
        handle.write("\n[fit]\nprofile = false\n")
    return truth


@pytest.mark.parametrize("kind", ["mutual-pair", "two-state"])
def test_default_global_fit_recovers_truth_on_realistic_series(kind, tmp_path):
    # truth: the scenario's ΔH‡, ΔS‡ (invented); spectra from McConnell's closed form with the nuisances of
    # realistic_series.py. A calibrated fit gives |z| < 3 in 99.7 % of replicas and an rms z near 1; the
    # per-spectrum route with the guessed shifts is off by tens of standard errors on the same series
    z = []
    for replica in range(3):
        truth = _written(tmp_path / f"data{replica}", kind, 700 + replica)
        result = fit_series_global(truth.series_file, tmp_path / f"global{replica}", workers=1, progress=False)
        a = result.activation[0]
        z.append([(a.enthalpy_kj_mol - truth.enthalpy_kj_mol) / a.enthalpy_stderr,
                  (a.entropy_j_mol_k - truth.entropy_j_mol_k) / a.entropy_stderr])
        assert abs(result.reduced_chi_square - 1.0) < 0.1, result.notes
    z = np.array(z)
    assert np.all(np.abs(z) < 3.0), z
    assert np.sqrt(np.mean(z ** 2)) < 2.0, z


def test_misfit_names_the_spectra_and_the_option(tmp_path):
    # shifts that drift with T (realistic_series: slopes of -0.0002 and +0.0001 ppm/K, 7 and 3.6 Hz over the
    # range) cannot be held constant: the fit says so, names the misfitting spectra and the option to use
    truth = _written(tmp_path / "data", "mutual-pair", 800)
    result = fit_series_global(truth.series_file, tmp_path / "g", shift_trend="constant", workers=1, progress=False)
    assert result.reduced_chi_square > 1.5 and result.error_scale > 1.0
    text = " ".join(result.notes)
    assert "--shift-trend linear" in text and "cannot follow" in text
    misfits = [q for q in result.spectra if q.misfit]
    assert misfits and all(Path(q.file).name in text for q in misfits)
    assert "noise estimate" not in text  # the measured noise is not blamed for a model that cannot follow


# invented calibration points (set-point, true sample temperature), K: a VT unit reading about 1.5 K high
CALIBRATION_SETPOINTS = [255.0, 265.0, 275.0, 285.0, 295.0, 305.0, 315.0, 325.0]
CALIBRATION_TRUE = [253.3, 263.8, 273.4, 283.6, 293.2, 303.7, 313.3, 323.6]


@pytest.fixture(scope="module")
def calibrated(series_file, tmp_path_factory):
    """The global fit with a calibration whose points lie on its curve (scatter 0): its whole temperature
    covariance is the curve's, V C_theta V^T, which two coefficient directions span."""
    cal = fit_temperature_calibration(CALIBRATION_SETPOINTS, CALIBRATION_TRUE)
    cal = dataclasses.replace(cal, scatter_k=0.0)
    return cal, fit_series_global(series_file, tmp_path_factory.mktemp("cal") / "g", calibration=cal, workers=2,
                                  progress=False)


def test_calibration_error_matches_refits_at_perturbed_calibrations(calibrated):
    # Brute force against the propagated covariance: refit at the calibration's coefficients moved by
    # +-2 along each column L_j of the Cholesky factor of their covariance; for a response linear over
    # that range sum_j d_j d_j^T, d_j = (x(+) - x(-)) / 4, is exactly the propagated covariance
    # (first-order error propagation, common practice).
    cal, result = calibrated
    series = load_series(result.series.source)
    two = fit_series(series, result.outdir / "two-step", resume=True, workers=1, progress=False)
    chol = np.linalg.cholesky(cal.coefficient_covariance)
    brute = np.zeros((2, 2))
    for j in range(chol.shape[1]):
        ends = []
        for sign in (2.0, -2.0):
            moved = dataclasses.replace(cal, coefficients=cal.coefficients + sign * chol[:, j])
            a = fit_global_from_two_step(series, two, result.outdir, moved, Treatment(), 2).activation[0]
            ends.append(np.array([a.enthalpy_kj_mol, a.entropy_j_mol_k]))
        d = (ends[0] - ends[1]) / 4.0
        brute += np.outer(d, d)
    a = result.activation[0]
    propagated = a.calibration_covariance
    assert np.sqrt(np.diag(propagated)) == pytest.approx(np.sqrt(np.diag(brute)), rel=0.05)
    assert propagated[0, 1] / np.sqrt(propagated[0, 0] * propagated[1, 1]) == pytest.approx(
        brute[0, 1] / np.sqrt(brute[0, 0] * brute[1, 1]), abs=0.02)
    # the reported errors hold the fit's part and the calibration's: both are positive
    assert np.all(np.diag(a.covariance) > np.diag(propagated)) and np.all(np.diag(propagated) > 0)


def test_calibration_error_reported(calibrated, result):
    _, fit = calibrated
    data = json.loads((fit.outdir / "global.json").read_text())
    assert data["calibration_error_included"] is True and data["options"]["calibration_error_included"] is True
    share, own = data["calibration_share_stderr"], data["spectra_share_stderr"]
    for key, total in (("enthalpy_kj_mol", "enthalpy_stderr"), ("gibbs_298_kj_mol", "gibbs_298_stderr")):
        assert 0 < share[key] < data[total]
        assert math.hypot(share[key], own[key]) == pytest.approx(data[total])  # the parts add in quadrature
    assert "temperature calibration alone" in (fit.outdir / "global.txt").read_text()
    # without a calibration nothing is claimed
    plain = json.loads((result.outdir / "global.json").read_text())
    assert plain["calibration_error_included"] is False and "calibration_share_stderr" not in plain


# --- issue 12 item 4: the reference line and the couplings in the global fit ---------------------------------


@pytest.fixture(scope="module")
def referenced(tmp_path_factory):
    """The N-methyl scenario (tests/realistic_series.py) with a non-exchanging singlet at 2.5 ppm named as the
    series' reference line, and its global fit with the defaults."""
    scenario = SCENARIOS["mutual-pair"].replace(temperatures_k=SCENARIOS["mutual-pair"].temperatures_k[::2],
                                                points=4096, reference_line_ppm=2.5)
    folder = tmp_path_factory.mktemp("reference")
    truth = write_series(folder / "data", scenario, seed=91)
    truth.series_file.write_text(truth.series_file.read_text().replace(
        'model = "model.toml"\n', 'model = "model.toml"\n[fit]\nprofile = false\n[fit.reference_line]\nppm = 2.5\n'
                                  "window_ppm = [2.4, 2.6]\n"))
    return truth, fit_series_global(truth.series_file, folder / "g", workers=1, progress=False)


def test_reference_line_gives_each_spectrum_its_linewidth(referenced):
    # truth: the N-methyl scenario's ΔH‡, ΔS‡ (invented) and its intrinsic width, linear in T (broader when
    # cold), shared by a non-exchanging singlet at 2.5 ppm; spectra from McConnell's closed form (J. Chem.
    # Phys. 28, 430 (1958)) and a Lorentzian (Bloch equations) for the singlet (tests/realistic_series.py)
    truth, result = referenced
    scenario = truth.scenario
    data = json.loads((result.outdir / "global.json").read_text())
    assert data["options"]["linewidth_trend"] == "reference-line" and data["options"]["reference_line"]["ppm"] == 2.5
    assert "reference line at 2.5 ppm" in (result.outdir / "global.txt").read_text()
    # every spectrum's linewidth is held at its reference width, which follows the true width
    held = {n: p for n, p in result.parameters.items() if n.startswith("s") and "linewidth_hz" in n}
    assert len(held) == len(truth.temperatures_k) and all(p["fixed"] and p["stderr"] > 0 for p in held.values())
    for t, p in zip(result.temperatures_k, held.values()):
        assert abs(p["estimate"] - scenario.linewidth_at(t)) < 4 * p["stderr"]
    # within 2 standard errors of the truth, the widths' errors among them
    a = result.activation[0]
    assert abs(a.enthalpy_kj_mol - truth.enthalpy_kj_mol) < 2 * a.enthalpy_stderr
    assert abs(a.entropy_j_mol_k - truth.entropy_j_mol_k) < 2 * a.entropy_stderr
    assert any("reference widths' errors alone" in n for n in result.notes), result.notes
    assert abs(result.reduced_chi_square - 1.0) < 0.1, result.notes
    # rates past coalescence (Gutowsky & Holm: k_c = pi dnu / sqrt 2, about 133 s^-1 for 60 Hz) are values,
    # in the global fit and in its two-step stage with the same reference widths
    dnu = abs(np.subtract(*scenario.shifts_ppm)) * scenario.frequency_mhz
    past = [(r, k) for r, k in zip(data["processes"][0]["rates"], truth.rates_per_s) if k > math.pi * dnu / math.sqrt(2.0)]
    assert len(past) >= 2
    for r, k in past:
        assert r["two_step_status"] == "determined" and 0 < r["rate_stderr"] < 0.2 * r["rate_per_s"]
        assert abs(r["rate_per_s"] - k) < 3 * r["rate_stderr"]


def test_reference_width_errors_match_refits_at_moved_widths(referenced):
    # Brute force against the propagated covariance (first-order error propagation, common practice): refit
    # with each reference width moved by its standard error; sum_i d_i d_i^T, d_i the move of (ΔH‡, ΔS‡),
    # is the widths' share of the covariance for a response linear over one standard error
    import copy

    truth, result = referenced
    series = load_series(truth.series_file)
    two = fit_series(series, result.outdir / "two-step", resume=True, workers=1, progress=False)
    a = result.activation[0]
    brute = np.zeros((2, 2))
    for i, o in enumerate(two.outcomes):
        ((name, setting),) = o.reference["setting"].items()
        moved = copy.copy(o)
        moved.reference = copy.deepcopy(o.reference)
        moved.reference["setting"][name]["start"] = setting["start"] + setting["stderr"]
        refit = fit_global_from_two_step(series, dataclasses.replace(two, outcomes=[*two.outcomes[:i], moved, *two.outcomes[i + 1:]]),
                                         result.outdir, None, Treatment(linewidth_trend="reference-line"), 1).activation[0]
        d = np.array([refit.enthalpy_kj_mol - a.enthalpy_kj_mol, refit.entropy_j_mol_k - a.entropy_j_mol_k])
        brute += np.outer(d, d)
    shares = re.search(r"ΔH‡ ± ([0-9.]+) kJ/mol, ΔS‡ ± ([0-9.]+) J", " ".join(result.notes))
    assert float(shares.group(1)) == pytest.approx(math.sqrt(brute[0, 0]), rel=0.1)
    assert float(shares.group(2)) == pytest.approx(math.sqrt(brute[1, 1]), rel=0.1)
    # and the share is part of the reported error, not all of it
    assert 0 < math.sqrt(brute[0, 0]) < a.enthalpy_stderr


def test_reference_line_trend_needs_a_reference_line(series_file, tmp_path):
    with pytest.raises(InputError, match=r"\[fit.reference_line\]"):
        fit_series_global(series_file, tmp_path / "g", linewidth_trend="reference-line", workers=1, progress=False)


def test_couplings_start_from_the_two_step_fit_and_are_recovered(tmp_path):
    # an AB pair on ring inversion whose model-file J is 0.5 Hz off (tests/realistic_series.py: QuTiP's
    # Lindblad Liouvillian as the reference lineshape, J = -12.5 Hz + 0.002 Hz/K (T - 298.15 K), invented)
    from dnmr.fitting.globalproblem import GlobalMember, GlobalProblem

    truth = _written(tmp_path / "data", "ab-pair", 901)
    scenario = truth.scenario
    series = load_series(truth.series_file)
    two = fit_series(series, tmp_path / "two", workers=1, progress=False)
    members = [GlobalMember.from_two_step(i, o.spectrum.temperature_k, o.fit, series.model)
               for i, o in enumerate(two.outcomes)]
    problem = GlobalProblem(members, series.model, Treatment(), False, {"swap": (55.0, -8.0)})
    (name,) = [n for n in problem.params if n.startswith("coupling_hz_") and not n.endswith(("_per_k", "_per_k2"))]
    t_ref, model_j = problem.reference_k, series.model.states[0].couplings_hz["Ha-Hb"]
    assert abs(model_j - scenario.coupling_at(t_ref)) > 0.45  # the model file's guess
    assert abs(problem.params[name].value - scenario.coupling_at(t_ref)) < 0.15  # the start: the two-step fit's
    result = fit_series_global(series, tmp_path / "g", workers=1, progress=False)
    j = result.parameters[name]
    assert abs(j["estimate"] - scenario.coupling_at(t_ref)) < 3 * j["stderr"]
    a = result.activation[0]
    assert abs(a.enthalpy_kj_mol - truth.enthalpy_kj_mol) < 2 * a.enthalpy_stderr
    assert abs(a.entropy_j_mol_k - truth.entropy_j_mol_k) < 2 * a.entropy_stderr


# --- issue 18: the global fit's Jacobian from the lineshape's exact derivatives -----------------------------


@pytest.mark.parametrize("kind", ["two-state", "ab-pair"])
def test_exact_quantity_derivatives_match_central_differences(kind, tmp_path):
    # every lineshape quantity of the global problem (log10 k, shifts in ppm, the linewidth, the coupling, ln K
    # of van 't Hoff populations, the frequency offset) against central differences of the predicted spectrum
    # (at each quantity's forward-difference step: truncation and rounding both far below 1e-6 of the
    # column: common practice)
    from dnmr.fitting.globalproblem import GlobalMember, GlobalProblem

    scenario = SCENARIOS[kind]
    truth = write_series(tmp_path / "data", scenario.replace(temperatures_k=scenario.temperatures_k[::3], points=1024), 11)
    with open(truth.series_file, "a") as handle:
        handle.write("\n[fit]\nprofile = false\n")
    series = load_series(truth.series_file)
    two = fit_series(series, tmp_path / "two", workers=1, progress=False)
    members = [GlobalMember.from_two_step(i, o.spectrum.temperature_k, o.fit, series.model)
               for i, o in enumerate(two.outcomes)]
    process = series.model.process_names()[0]
    problem = GlobalProblem(members, series.model, Treatment(), kind == "two-state",
                            {process: (truth.enthalpy_kj_mol, truth.entropy_j_mol_k)})
    assert all(problem.exact)
    families = {q.family for q in problem.quantities}
    assert families >= {"rate", "shift", "linewidth", "offset", "population" if kind == "two-state" else "coupling"}
    x = np.array([problem.params[n].value for n in problem.free])
    g = problem.vector(x)
    for k, m in enumerate(problem.members):
        exact, turned, values = problem.quantity_derivatives(k, x, range(len(problem.quantities)))
        q, turned_here, _ = problem.parts(m, problem.maps[k], g)
        assert np.allclose(turned, turned_here, rtol=0, atol=1e-10 * np.abs(turned_here).max())
        rotation = values["amplitude"] * np.exp(1j * m.problem.phase(values))
        for r, quantity in enumerate(problem.quantities):
            h = quantity.step
            ends = []
            for sign in (1.0, -1.0):
                moved = q.copy()
                moved[r] += sign * h
                ends.append((rotation * problem.shape(m, moved)).real)
            central = (ends[0] - ends[1]) / (2 * h)
            # to 1e-6 of the column, or of the spectrum's largest column where it nearly vanishes (a coupling
            # averaged away in fast exchange: there the differences' rounding, 1e-16 / step, dominates)
            floor = 1e-6 * np.linalg.norm(exact, axis=0).max()
            assert np.linalg.norm(exact[:, r] - central) <= max(1e-6 * np.linalg.norm(central), floor), (k, quantity.name)


def test_exact_jacobian_gives_the_finite_difference_fit(result, monkeypatch):
    # the same optimum and errors as the global fit with forward differences (both stop within 0.01 joint
    # standard errors of the optimum; their Jacobians differ by the differences' truncation, ~1e-5)
    from dnmr.fitting import globalproblem

    series = load_series(result.series.source)
    two = fit_series(series, result.outdir / "two-step", resume=True, workers=1, progress=False)
    monkeypatch.setattr(globalproblem, "USE_EXACT_JACOBIAN", False)
    differences = fit_global_from_two_step(series, two, result.outdir, None, Treatment(), 1)
    a, b = result.activation[0], differences.activation[0]
    assert abs(a.enthalpy_kj_mol - b.enthalpy_kj_mol) < 0.01 * a.enthalpy_stderr
    assert abs(a.entropy_j_mol_k - b.entropy_j_mol_k) < 0.01 * a.entropy_stderr
    assert a.enthalpy_stderr == pytest.approx(b.enthalpy_stderr, rel=1e-3)
    assert a.entropy_stderr == pytest.approx(b.entropy_stderr, rel=1e-3)
