"""Model files (CONTRACT.md section 1), the simulate command (sections 2 and 5) and their errors."""
from __future__ import annotations

import csv
import subprocess
import sys
import textwrap

import numpy as np
import pytest
from click.testing import CliRunner

import dnmr
from dnmr.cli import cli

GOOD = textwrap.dedent("""\
    title = "invented amide rotamers"
    [spectrometer]
    nucleus = "1H"
    frequency_mhz = 400.13
    [window]
    ppm = [3.8, 2.5]
    points = 2048
    [conditions]
    temperature_k = 298.15
    [[state]]
    name = "E"
    population = 70
    linewidth_hz = 1.0
    shifts_ppm = { Ha = 3.12, Hb = 3.31 }
    couplings_hz = { "Ha-Hb" = -14.2 }
    [[state]]
    name = "Z"
    population = 30
    linewidth_hz = 1.4
    shifts_ppm = { Ha = 2.95, Hb = 3.40 }
    couplings_hz = { "Hb-Ha" = -14.0 }
    [[exchange]]
    name = "rotation"
    from = "E"
    to = "Z"
    barrier_kj_mol = 65.0
    [[exchange]]
    name = "flip"
    from = "E"
    to = "E"
    spins = { Ha = "Hb", Hb = "Ha" }
    rate_per_s = 85.0
    """)


def write(tmp_path, text, name="model.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_good_model_loads(tmp_path):
    model = dnmr.load_model(write(tmp_path, GOOD))
    assert model.spins == ["Ha", "Hb"]
    assert model.populations() == pytest.approx([0.7, 0.3])  # relative weights normalised
    assert model.window_ppm == (2.5, 3.8)  # either order
    assert model.states[1].coupling("Ha", "Hb") == -14.0
    # barrier_kj_mol is evaluated by the Eyring equation at conditions.temperature_k
    assert model.rates()[0] == pytest.approx(dnmr.kinetics.eyring_rate(65.0, 298.15))


def test_free_energy_populations_follow_boltzmann(tmp_path):
    text = GOOD.replace("population = 70", "free_energy_kj_mol = 0.0").replace(
        "population = 30", "free_energy_kj_mol = 2.0")
    p = dnmr.load_model(write(tmp_path, text)).populations()
    R, T = 8.314462618, 298.15  # CODATA gas constant (J/(mol K))
    assert p[1] / p[0] == pytest.approx(np.exp(-2000.0 / (R * T)), rel=1e-9)


BAD = [
    ("rate_per_s = 85.0", "rate_per_s = -1", "exchange[1].rate_per_s"),
    ("population = 70", "populaton = 70", 'did you mean "population"'),
    ('spins = { Ha = "Hb", Hb = "Ha" }', 'spins = { Ha = "Hb" }', "not one-to-one"),
    ('couplings_hz = { "Ha-Hb" = -14.2 }', 'couplings_hz = { "Ha-Hx" = -14.2 }', "state[0].couplings_hz"),
    ("population = 70", "population = -70", "state[0].population"),
    ('to = "Z"', 'to = "Q"', "exchange[0].to"),
    ("frequency_mhz = 400.13", 'frequency_mhz = "fast"', "spectrometer.frequency_mhz"),
    ("shifts_ppm = { Ha = 2.95, Hb = 3.40 }", "shifts_ppm = { Ha = 2.95, Hb = 3.40, Hc = 1.0 }", "same spins"),
    ("[window]", "[window", "TOML syntax error"),
    ("temperature_k = 298.15", "temperature_k = 0", "conditions.temperature_k"),
    ("barrier_kj_mol = 65.0", "barrier_kj_mol = nan", "exchange[0].barrier_kj_mol"),
    ('nucleus = "1H"', 'nucleus = "2H"', "spin-1/2"),
]


@pytest.mark.parametrize("old, new, expected", BAD)
def test_bad_model_is_one_clear_line(tmp_path, old, new, expected):
    assert old in GOOD
    path = write(tmp_path, GOOD.replace(old, new, 1), "bad.toml")
    with pytest.raises(dnmr.InputError) as info:
        dnmr.load_model(path)
    message = str(info.value)
    assert "bad.toml" in message and expected in message and "\n" not in message


def test_all_zero_populations_are_refused(tmp_path):
    path = write(tmp_path, GOOD.replace("population = 70", "population = 0").replace("population = 30", "population = 0"))
    with pytest.raises(dnmr.InputError, match="all zero"):
        dnmr.load_model(path)


def test_simulate_writes_contract_columns_at_full_precision(tmp_path):
    model_path = write(tmp_path, GOOD)
    out = tmp_path / "spectrum.csv"
    result = CliRunner().invoke(cli, ["simulate", str(model_path), "-o", str(out), "--plot", str(tmp_path / "s.png")])
    assert result.exit_code == 0, result.output
    rows = list(csv.DictReader(out.open()))
    assert {"ppm", "hz", "intensity"} <= set(rows[0])
    spec = dnmr.simulate(dnmr.load_model(model_path))
    read = np.array([float(r["intensity"]) for r in rows])[::-1]  # file runs high to low ppm
    assert np.array_equal(read, spec.intensity)  # every value reads back as the same float
    hz = np.array([float(r["hz"]) for r in rows])
    ppm = np.array([float(r["ppm"]) for r in rows])
    assert np.allclose(hz, ppm * 400.13, rtol=1e-15, atol=0)
    assert (tmp_path / "s.png").stat().st_size > 1000


def test_simulate_refuses_to_overwrite(tmp_path):
    model_path = write(tmp_path, GOOD)
    out = tmp_path / "spectrum.csv"
    out.write_text("keep me")
    result = CliRunner().invoke(cli, ["simulate", str(model_path), "-o", str(out)])
    assert result.exit_code == 2 and "already exists" in result.output
    assert out.read_text() == "keep me"


def test_bad_input_exits_2_without_traceback(tmp_path):
    """Exit status 2 and one line naming the file (CONTRACT.md section 5), through the real console script."""
    path = write(tmp_path, GOOD.replace("rate_per_s = 85.0", "rate_per_s = -1"), "bad.toml")
    before = path.read_bytes()
    run = subprocess.run([sys.executable, "-m", "dnmr", "simulate", str(path), "-o", str(tmp_path / "x.csv")],
                         capture_output=True, text=True)
    assert run.returncode == 2
    assert "bad.toml" in run.stderr and "Traceback" not in run.stderr
    assert len(run.stderr.strip().splitlines()) == 1
    assert path.read_bytes() == before and not (tmp_path / "x.csv").exists()


def test_stack_figure_over_temperatures(tmp_path):
    model_path = write(tmp_path, GOOD)
    out = tmp_path / "stack.png"
    result = CliRunner().invoke(cli, ["stack", str(model_path), "--temperatures-k", "260,290,320,350", "-o", str(out)])
    assert result.exit_code == 0, result.output
    assert out.stat().st_size > 1000


def test_stack_over_temperatures_needs_rates_that_depend_on_temperature(tmp_path):
    # Eyring equation: a rate given as rate_per_s is the same at every temperature, so a stack over
    # temperatures of such a model would repeat one trace; refused in one line naming the fix
    fixed = GOOD.replace("barrier_kj_mol = 65.0", "rate_per_s = 20.0")
    run = CliRunner().invoke(cli, ["stack", str(write(tmp_path, fixed)), "--temperatures-k", "260,290",
                                   "-o", str(tmp_path / "s.png")])
    assert run.exit_code == 2 and run.stderr.strip().count("\n") == 0
    assert "do not depend on temperature" in run.stderr and "barrier_kj_mol" in run.stderr and "--rates-per-s" in run.stderr
    assert not (tmp_path / "s.png").exists()


def test_activation_parameters_without_conditions_take_the_given_temperature(tmp_path):
    # a model with a barrier but no [conditions]: loads, stacks over --temperatures-k, and in Python takes the
    # temperature from at_temperature (rate from the Eyring equation at that temperature)
    no_conditions = GOOD.replace("[conditions]\ntemperature_k = 298.15\n", "")
    path = write(tmp_path, no_conditions)
    model = dnmr.load_model(path)
    assert model.temperature_k is None
    assert model.at_temperature(250.0).rates()[0] == pytest.approx(dnmr.kinetics.eyring_rate(65.0, 250.0))
    run = CliRunner().invoke(cli, ["stack", str(path), "--temperatures-k", "260,290", "-o", str(tmp_path / "s.png")])
    assert run.exit_code == 0, run.output
    simulate = CliRunner().invoke(cli, ["simulate", str(path), "-o", str(tmp_path / "x.csv")])
    assert simulate.exit_code == 2 and simulate.stderr.strip().count("\n") == 0
    assert str(path) in simulate.stderr and "exchange[0]" in simulate.stderr
    assert "[conditions] temperature_k" in simulate.stderr and "--temperatures-k" in simulate.stderr
