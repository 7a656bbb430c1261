"""Input hints found on a trial: each slip is reported where the user wrote it, in one line, and values
that are only implausible are warned about, not refused (the project's rules on bad input)."""
from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from dnmr.cli import cli
from dnmr.errors import InputError
from dnmr.fitting.seriesfile import load_series
from dnmr.io.tables import celsius_hints
from test_series import TEMPERATURES, write_series

SERIES_PARAMETERS = 'linewidth = "fixed"\nparameters = { linewidth_hz_c = { start = 1.0 } }'


def test_a_slip_in_fit_parameters_is_reported_there(tmp_path):
    series = write_series(tmp_path, TEMPERATURES[:2])
    text = series.read_text()
    series.write_text(text.replace('linewidth = "fixed"', SERIES_PARAMETERS))
    with pytest.raises(InputError) as caught:
        load_series(series)
    assert caught.value.where == "fit.parameters.linewidth_hz_c"
    result = CliRunner().invoke(cli, ["fit", str(series), "-o", str(tmp_path / "out"), "--quiet"])
    assert result.exit_code == 2 and len(result.stderr.strip().splitlines()) == 1
    assert ": fit.parameters.linewidth_hz_c: " in result.stderr and "spectrum[0]" not in result.stderr


def test_a_slip_in_a_spectrum_parameters_is_reported_at_that_spectrum(tmp_path):
    series = write_series(tmp_path, TEMPERATURES[:2])
    series.write_text(series.read_text() + "parameters = { linewidth_hz_c = { start = 1.0 } }\n")  # the last [[spectrum]]
    with pytest.raises(InputError) as caught:
        load_series(series)
    assert caught.value.where == "spectrum[1].parameters.linewidth_hz_c"


def test_a_region_the_user_never_wrote_says_where_it_came_from(tmp_path):
    # the model's shifts (1.9, 2.1 ppm) lie outside the spectra (2.5-3.5 ppm) and no region_ppm is given:
    # the message names the window about the model's shifts as the source, and what the spectrum covers
    series = write_series(tmp_path, TEMPERATURES[:1], fit_table='linewidth = "fixed"')
    model = tmp_path / "model.toml"
    model.write_text(model.read_text().replace("H = 2.9", "H = 1.9").replace("H = 3.1", "H = 2.1"))
    result = CliRunner().invoke(cli, ["fit", str(series), "-o", str(tmp_path / "out"), "--serial", "--quiet",
                                      "--no-report"])
    assert result.exit_code == 2
    [line] = [x for x in result.stderr.splitlines() if x.startswith("dnmr: error:")]
    assert "spectrum[0]" in line and "region_ppm: the fit region 1.78 to 2.22 ppm comes from a window about the " \
        "model's shifts (no region_ppm, no [window])" in line and "covers 2.5 to 3.5 ppm" in line, line
    model.write_text(model.read_text() + "[window]\nppm = [1.5, 2.4]\n")
    again = CliRunner().invoke(cli, ["fit", str(series), "-o", str(tmp_path / "out"), "--overwrite", "--serial",
                                     "--quiet", "--no-report"])
    assert "from the model's [window] (no region_ppm given)" in again.stderr, again.stderr


def test_shifts_outside_a_given_region_are_flagged(tmp_path):
    series = write_series(tmp_path, TEMPERATURES[:1], fit_table='region_ppm = [3.3, 3.5]\nlinewidth = "fixed"')
    result = CliRunner().invoke(cli, ["fit", str(series), "-o", str(tmp_path / "out"), "--serial", "--quiet",
                                      "--no-report"])
    assert "shifts-outside-region" in result.output
    [spectrum] = json.loads((tmp_path / "out" / "results.json").read_text())["spectra"]
    assert ("none of the model's shifts (2.9 to 3.1 ppm) lies in the fitted region 3.3 to 3.5 ppm (from region_ppm); "
            "check the region or the model's shifts") in spectrum["fit"]["notes"]


def test_celsius_hints_rule():
    # 0 °C = 273.15 K (SI Brochure, 9th ed., 2019); the 200 K line is a rule of thumb (common practice)
    assert celsius_hints([250.0, 190.0]) == []  # one cold spectrum among warm ones: no hint
    assert celsius_hints([]) == []
    [hint] = celsius_hints([107.0, 117.0, 127.0], 298.0)
    assert hint.startswith("every temperature_k is below 200 K (107 to 127 K) while the model's [conditions] "
                           "temperature_k is 298 K")
    assert "107 °C = 380.15 K" in hint and hint.endswith("fitted as kelvin")
    assert "model" not in celsius_hints([150.0, 160.0])[0]  # no model temperature to compare with


def test_celsius_looking_series_is_warned_about_not_refused(tmp_path):
    series = write_series(tmp_path, [117.0, 127.0])  # °C values typed as kelvin (rates made at those numbers)
    assert load_series(series).warnings == tuple(celsius_hints([117.0, 127.0]))
    result = CliRunner().invoke(cli, ["fit", str(series), "-o", str(tmp_path / "out"), "--serial", "--quiet",
                                      "--no-report"])
    assert result.exit_code == 0, result.stderr
    [warning] = result.stderr.splitlines()
    assert warning.startswith(f"dnmr: warning: {series}: every temperature_k is below 200 K (117 to 127 K)")
    assert "note: every temperature_k is below 200 K" in result.stdout  # in the report as well
    assert load_series(write_series(tmp_path / "warm", TEMPERATURES)).warnings == ()
