"""Input hints found on a trial: each slip is reported where the user wrote it, in one line, and values
that are only implausible are warned about, not refused (the project's rules on bad input)."""
from __future__ import annotations

import pytest
from click.testing import CliRunner

from dnmr.cli import cli
from dnmr.errors import InputError
from dnmr.series import load_series
from test_series import TEMPERATURES, write_series

SERIES_PARAMETERS = 'linewidth = "fixed"\nparameters = { linewidth_hz_c = { value = 1.0 } }'


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
    series.write_text(series.read_text() + "parameters = { linewidth_hz_c = { value = 1.0 } }\n")  # the last [[spectrum]]
    with pytest.raises(InputError) as caught:
        load_series(series)
    assert caught.value.where == "spectrum[1].parameters.linewidth_hz_c"
