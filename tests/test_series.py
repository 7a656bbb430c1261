"""VT series fits (dnmr.fitting.series and `dnmr fit`) on tiny invented series written as text files.

The spectra are made from stated truths by the McConnell closed form (J. Chem. Phys. 28, 430 (1958);
tests/closed_forms.py), not by dnmr's engine; the rates follow the Eyring equation (Eyring, J. Chem.
Phys. 3, 107 (1935)) with constants from scipy.constants (CODATA) for invented activation parameters.
"""
from __future__ import annotations

import hashlib
import json
import math
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from closed_forms import mcconnell_two_site
from reference_eyring import eyring_rate
from dnmr.cli import cli
from dnmr.errors import InputError
from dnmr.fitting.series import fit_series
from dnmr.fitting.seriesfile import load_series
from dnmr.fitting.trends import StaticTrend, regress_trend

SF = 400.0
ENTHALPY_KJ_MOL, ENTROPY_J_MOL_K = 60.0, 0.0  # invented
TEMPERATURES = [250.0, 270.0, 290.0, 310.0]
PPM = np.linspace(2.5, 3.5, 800)

MODEL = """title = "invented two-site test system"
[spectrometer]
nucleus = "1H"
frequency_mhz = 400.0
[[state]]
name = "a"
population = 0.5
linewidth_hz = 1.2
shifts_ppm = {{ H = {a} }}
[[state]]
name = "b"
population = 0.5
linewidth_hz = 1.2
shifts_ppm = {{ H = {b} }}
[[exchange]]
name = "flip"
from = "a"
to = "b"
rate_per_s = 1000.0
"""


def write_spectrum(path: Path, k: float, seed: int, site_a: float = 2.9, site_b: float = 3.1) -> None:
    s = mcconnell_two_site(PPM * SF, site_a * SF, site_b * SF, k, 0.5, 1.2, 1.2)
    y = 50.0 * s.real + 0.2 + np.random.default_rng(seed).normal(0.0, 0.02, PPM.size)
    path.write_text("ppm\tintensity\n" + "\n".join(f"{p:.6f}\t{v:.6f}" for p, v in zip(PPM[::-1], y[::-1])) + "\n")


def write_series(folder: Path, temperatures, fit_table: str = 'region_ppm = [2.7, 3.3]\nlinewidth = "fixed"',
                 sites=lambda t: (2.9, 3.1)) -> Path:
    (folder / "spectra").mkdir(parents=True, exist_ok=True)
    (folder / "model.toml").write_text(MODEL.format(a=2.9, b=3.1))
    lines = ['model = "model.toml"', "[fit]", fit_table]
    for i, t in enumerate(temperatures):
        write_spectrum(folder / "spectra" / f"t{t:.0f}.txt", eyring_rate(t, ENTHALPY_KJ_MOL, ENTROPY_J_MOL_K),
                       seed=100 + i, site_a=sites(t)[0], site_b=sites(t)[1])
        lines += ["[[spectrum]]", f'file = "spectra/t{t:.0f}.txt"', f"temperature_k = {t}"]
    (folder / "series.toml").write_text("\n".join(lines) + "\n")
    return folder / "series.toml"


def read_rates(path: Path) -> list[dict]:
    import csv

    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def digests(folder: Path) -> dict:
    return {p: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """One run of `dnmr fit` (parallel workers) on a four-spectrum series."""
    folder = tmp_path_factory.mktemp("series")
    series = write_series(folder / "inputs", TEMPERATURES)
    before = digests(folder / "inputs")
    result = CliRunner().invoke(cli, ["fit", str(series), "-o", str(folder / "out"), "--quiet"])
    return folder, series, before, result


def test_series_through_the_cli_recovers_the_rates(run):
    folder, series, before, result = run
    assert result.exit_code == 0, result.output + result.stderr
    assert "elapsed" not in result.stderr  # --quiet: no progress lines either
    rows = read_rates(folder / "out" / "rates.csv")
    assert list(rows[0])[:6] == ["temperature_k", "process", "rate_per_s", "rate_stderr", "rate_lower", "rate_upper"]
    assert [float(r["temperature_k"]) for r in rows] == TEMPERATURES
    for r in rows:
        assert r["process"] == "flip" and r["status"] == "determined"
        k, err = float(r["rate_per_s"]), float(r["rate_stderr"])
        assert abs(k - eyring_rate(float(r["temperature_k"]), ENTHALPY_KJ_MOL, ENTROPY_J_MOL_K)) <= 4 * err
        assert r["rate_lower"] == r["rate_upper"] == ""
    assert digests(folder / "inputs") == before  # inputs never modified


def test_series_outputs_are_complete(run):
    folder, series, before, result = run
    out = folder / "out"
    data = json.loads((out / "results.json").read_text())
    assert set(data["versions"]) >= {"dnmr", "python", "numpy", "scipy", "lmfit"}
    assert data["series"]["sha256"] == hashlib.sha256(series.read_bytes()).hexdigest()
    for entry in data["spectra"]:
        assert entry["sha256"] == hashlib.sha256(Path(entry["file"]).read_bytes()).hexdigest()
        assert entry["status"] == "fitted" and entry["fit"]["rates"][0]["status"] == "determined"
    assert len(list((out / "figures").glob("*.png"))) == 4
    assert (out / "series_fits.png").stat().st_size > 0
    assert "flip" in result.output and "250.00" in result.output


def test_stored_fits_are_json_laid_out_as_the_json_module_lays_it_out_with_curves_on_one_line(run):
    """Python's json module is the reference: a stored fit reads back as the data written, and its text is the one
    ``json.dumps(data, indent=1)`` gives but for each curve (thousands of numbers), which is one line."""
    from dnmr.fitting.resultsfolder import NUMBERS_ON_ONE_LINE, json_text

    folder = run[0]
    for path in sorted((folder / "out" / "fits").glob("*.json")):
        text = path.read_text()
        data = json.loads(text)
        assert text == json_text(data) + "\n"
        assert all(len(curve) > NUMBERS_ON_ONE_LINE for curve in data["curves"].values())
        for name, curve in data["curves"].items():
            assert f'"{name}": {json.dumps(curve)}' in text
        without_curves = {k: v for k, v in data.items() if k != "curves"}
        assert json_text(without_curves) == json.dumps(without_curves, indent=1)
    short = {"a": [1, 2.5, None, "x", True, {"b": []}, {}], "c": {"d": "é\n\"", "e": [[1, 2], []]}, "f": list(range(64))}
    assert json_text(short) == json.dumps(short, indent=1)
    assert json.loads(json_text({"x": [1.0] * 64 + [math.nan]})) == {"x": [1.0] * 64 + [None]}  # JSON has no NaN


def test_existing_output_folder_is_refused_then_resumed(run, tmp_path):
    folder, series, before, _ = run
    out = folder / "out"
    refused = CliRunner().invoke(cli, ["fit", str(series), "-o", str(out), "--quiet"])
    assert refused.exit_code == 2
    assert "already exists" in refused.stderr and len(refused.stderr.strip().splitlines()) == 1
    first = read_rates(out / "rates.csv")
    stored = sorted((out / "fits").glob("*.json"))
    stored[1].unlink()  # as if the run had been interrupted before this fit finished
    resumed = CliRunner().invoke(cli, ["fit", str(series), "-o", str(out), "--resume", "--serial"])
    assert resumed.exit_code == 0, resumed.stderr
    # stderr is not a terminal here: plain progress lines, one per fit, saying which were kept
    progress = [line for line in resumed.stderr.splitlines() if line.endswith(" elapsed")]
    kept = [line for line in progress if "K, from the earlier run)" in line]
    assert len(progress) >= 4 and 1 <= len(progress) - len(kept) < len(progress), resumed.stderr
    reused = [s["reused"] for s in json.loads((out / "results.json").read_text())["spectra"]]
    assert reused == [True, False, True, True]
    again = read_rates(out / "rates.csv")
    for a, b in zip(first, again):
        assert float(b["rate_per_s"]) == pytest.approx(float(a["rate_per_s"]), rel=1e-4)
    both = CliRunner().invoke(cli, ["fit", str(series), "-o", str(out), "--resume", "--overwrite"])
    assert both.exit_code == 2


def test_one_corrupt_spectrum_fails_alone(tmp_path):
    series = write_series(tmp_path, TEMPERATURES[:3])
    (tmp_path / "spectra" / "t270.txt").write_text("ppm\tintensity\n2.9\tnot-a-number\n" * 5)
    result = CliRunner().invoke(cli, ["fit", str(series), "-o", str(tmp_path / "out"), "--serial", "--quiet"])
    assert result.exit_code == 2  # bad input, though the other spectra were fitted and written
    assert "spectrum[1]" in result.stderr and "t270.txt" in result.stderr
    rows = read_rates(tmp_path / "out" / "rates.csv")
    assert [r["status"] for r in rows] == ["determined", "failed", "determined"]
    assert rows[1]["rate_per_s"] == "" and "failed" in rows[1]["flags"] and "not a number" in rows[1]["notes"]
    again = CliRunner().invoke(cli, ["fit", str(series), "-o", str(tmp_path / "out"), "--overwrite", "--serial",
                                     "--quiet"])
    assert again.exit_code == 2 and len(list((tmp_path / "out" / "figures").glob("*.png"))) == 2


def test_bad_series_files_are_one_line_errors(tmp_path):
    series = write_series(tmp_path, TEMPERATURES[:2])
    text = series.read_text()
    cases = {
        "Celsius": text.replace("temperature_k = 250.0", "temperature_k = 25.0"),
        'did you mean "temperature_k"': text.replace("temperature_k = 270.0", "temperatur_k = 270.0"),
        'no fit parameter "linewidth_hz_c"': text.replace(
            'linewidth = "fixed"', 'linewidth = "fixed"\nparameters = { linewidth_hz_c = { start = 1.0 } }'),
        "slow-exchange-trend": text.replace('linewidth = "fixed"', 'shifts = "trend"'),
    }
    for expected, content in cases.items():
        series.write_text(content)
        result = CliRunner().invoke(cli, ["fit", str(series), "-o", str(tmp_path / "out")])
        assert result.exit_code == 2, expected
        assert expected in result.stderr and len(result.stderr.strip().splitlines()) == 1
        assert "Traceback" not in result.output + result.stderr
    assert not (tmp_path / "out").exists()


def test_duplicate_temperatures_are_flagged(tmp_path):
    series = write_series(tmp_path, [250.0, 270.0])
    series.write_text(series.read_text().replace("temperature_k = 270.0", "temperature_k = 250.0"))
    loaded = load_series(series)
    assert all("duplicate-temperature" in s.flags for s in loaded.spectra)
    assert any("250 K" in n for n in loaded.notes)
    with pytest.raises(InputError, match="spectrum"):
        (tmp_path / "s2.toml").write_text('model = "model.toml"\n')
        load_series(tmp_path / "s2.toml")


def test_fast_spectra_take_their_shifts_from_the_slow_exchange_trend(tmp_path):
    # The sites drift linearly with temperature (invented slopes); the model holds the 230 K shifts.  In
    # fast exchange the excess width p_a p_b (2 pi dnu)^2 / (pi (k_ab + k_ba)) (McConnell 1958) depends on
    # dnu, so shifts that are off bias the rate; the trend from the slow spectra must remove that bias.
    slopes = (3.0e-4, -1.0e-4)  # ppm/K
    sites = lambda t: (2.9 + slopes[0] * (t - 230.0), 3.1 + slopes[1] * (t - 230.0))  # noqa: E731
    temps = [230.0, 240.0, 250.0, 320.0, 330.0]
    trend = fit_series(write_series(tmp_path / "trend", temps, 'region_ppm = [2.7, 3.3]\nlinewidth = "fixed"\n'
                                    'shifts = "slow-exchange-trend"', sites), tmp_path / "out1", workers=1, progress=False)
    fixed = fit_series(write_series(tmp_path / "fixed", temps, 'region_ppm = [2.7, 3.3]\nlinewidth = "fixed"\n'
                                    'shifts = "fixed"\npopulations = "fixed"', sites), tmp_path / "out2", workers=1,
                       progress=False)
    for name, slope in zip(("shift_ppm_a_H", "shift_ppm_b_H"), slopes):
        line = trend.trend.lines[name]
        assert line.temperatures_k == (230.0, 240.0, 250.0)
        assert abs(line.coefficients[1] - slope) <= 4 * math.sqrt(line.covariance[1][1])
    for t in (320.0, 330.0):
        with_trend = next(o for o in trend.outcomes if o.spectrum.temperature_k == t)
        with_model = next(o for o in fixed.outcomes if o.spectrum.temperature_k == t)
        assert with_trend.stage == "held" and with_trend.treatment["shifts"] == "trend"
        assert with_model.treatment["shifts"] == "model"
        r = with_trend.fit.rate(0)
        assert abs(r.rate_per_s - eyring_rate(t, ENTHALPY_KJ_MOL, ENTROPY_J_MOL_K)) <= 4 * r.rate_stderr
        # both fit equally well (the fast spectrum cannot tell the shifts), but only one rate is right
        assert with_trend.fit.chi_square == pytest.approx(with_model.fit.chi_square, rel=0.01)
        biased = with_model.fit.rate(0)
        assert abs(biased.rate_per_s - eyring_rate(t, ENTHALPY_KJ_MOL, ENTROPY_J_MOL_K)) > 4 * biased.rate_stderr
        # the held shifts' error is one draw for both fast spectra: rates.csv gives it as shared parts, on
        # the independent errors of the values the three slow-exchange fits measured
        shared = with_trend.shared_rate_errors[0]
        assert {f"slow_exchange_{j}" for j in (1, 2, 3)} <= set(shared)
        assert sum(v * v for v in shared.values()) == pytest.approx(r.log10_rate_stderr_held**2, rel=1e-9)
    header = (tmp_path / "out1" / "rates.csv").read_text().splitlines()[0].split(",")
    assert {"log10_rate_shared_slow_exchange_1", "log10_rate_shared_slow_exchange_3"} <= set(header)


def test_shared_rate_errors_follow_the_trend_covariance():
    # Linear error propagation (common practice): a held value at T is a + b (T - x0), so the errors of the
    # values held at T1 and T2 have the covariance d1^T C d2 (d = (T, 1) in numpy.polyfit's order, C its
    # "unscaled" covariance, the reference).  A rate moving by `share` (log10 k) per standard error of its
    # held value gets shared parts whose squares add up to share^2 and whose products across two
    # temperatures give share1 share2 corr(T1, T2).
    temps, widths, errors = [230.0, 240.0, 250.0], [1.30, 1.25, 1.21], [0.05, 0.04, 0.06]
    line = regress_trend("linewidth_hz_M", "linear-in-T", temps, widths, errors)
    _, c = np.polyfit(temps, widths, 1, w=1 / np.array(errors), cov="unscaled")
    trend = StaticTrend({line.name: line})
    shares = {290.0: 0.02, 330.0: -0.05}
    parts = {t: trend.shared_errors(t, {line.name: s, "linewidth_hz_reference": 0.3}) for t, s in shares.items()}
    d = {t: np.array([t, 1.0]) for t in shares}
    for t, s in shares.items():
        assert set(parts[t]) == {"linewidth_hz_M_1", "linewidth_hz_M_2"}  # nothing from outside the trend
        assert sum(v * v for v in parts[t].values()) == pytest.approx(s * s, rel=1e-9)
    corr = d[290.0] @ c @ d[330.0] / math.sqrt(d[290.0] @ c @ d[290.0] * (d[330.0] @ c @ d[330.0]))
    product = sum(parts[290.0][k] * parts[330.0][k] for k in parts[290.0])
    assert product == pytest.approx(shares[290.0] * shares[330.0] * corr, rel=1e-6)


def test_a_free_fit_whose_interval_reaches_coalescence_is_not_slow_exchange():
    # Found in a replica of the 13C two-state series (seed 1059): at 295 K, 15 K below coalescence, the free
    # fit fell into two broad unresolved lines (23 Hz wide) at k = 35 s^-1, 68 % interval 8.6 to 127 s^-1
    # (truth 124); counted as slow exchange on its best fit alone, its wrong shifts and linewidth went into
    # the trends and gave a false lower bound at 345 K.  Coalescence of lines 86 Hz apart: pi dnu / sqrt 2
    # (Gutowsky & Holm 1956).
    from types import SimpleNamespace
    from dnmr.fitting.rates import RateEstimate
    from dnmr.fitting.treatments import SLOW_EXCHANGE_FRACTION, rates_are_slow
    coalescence = math.pi * 86.0 / math.sqrt(2.0)

    def fit(k, ci68):
        rate = RateEstimate("swap", k, 0.5 * (ci68[1] - ci68[0]), math.nan, math.nan, ci68, math.log10(k),
                            0.1, "determined")
        return SimpleNamespace(rates=[rate])

    assert 35.0 < SLOW_EXCHANGE_FRACTION * coalescence < 127.0
    assert not rates_are_slow(fit(35.0, (8.6, 127.0)), coalescence)
    assert rates_are_slow(fit(20.0, (19.1, 20.8)), coalescence)
