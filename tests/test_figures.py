"""Figures the command line only saves are closed after saving; figures the Python API returns stay open.

(matplotlib keeps every pyplot figure until it is closed and warns beyond 20; a command that writes a
figure file has no further use for it, a notebook user shows and edits the one returned.)  The model is
the invented AB pair of tests/test_planning.py; the rates for `dnmr eyring` follow the Eyring equation
(Eyring, J. Chem. Phys. 3, 107 (1935); tests/reference_eyring.py) for invented activation parameters.
"""
from __future__ import annotations

import matplotlib.pyplot as plt
import numpy as np
import pytest
from click.testing import CliRunner

import dnmr
from dnmr.cli import cli
from dnmr.output import save_figure
from reference_eyring import eyring_rate
from test_planning import MODEL_TOML

TEMPERATURES_K = np.array([250.0, 265.0, 280.0, 295.0, 310.0])


@pytest.fixture
def inputs(tmp_path):
    model = tmp_path / "model.toml"
    model.write_text(MODEL_TOML)
    k = eyring_rate(TEMPERATURES_K, 60.0, -5.0)
    rates = tmp_path / "rates.csv"
    rates.write_text("temperature_k,rate_per_s,rate_stderr\n"
                     + "".join(f"{t:.2f},{r:.17g},{0.05 * r:.17g}\n" for t, r in zip(TEMPERATURES_K, k)))
    return model, rates


COMMANDS = {  # command line (MODEL, RATES and OUT replaced), figure files it writes
    "simulate": (["simulate", "MODEL", "-o", "OUT/s.csv", "--plot", "OUT/s.png"], ["s.png"]),
    "stack": (["stack", "MODEL", "--rates", "10,100,1000", "-o", "OUT/stack.png"], ["stack.png"]),
    "plan": (["plan", "MODEL", "--barrier-kj-mol", "60", "--spectra", "3", "--plot", "OUT/plan.png"], ["plan.png"]),
    "timescale": (["timescale", "MODEL", "--barrier-kj-mol", "60", "--plot", "OUT/bands.png"], ["bands.png"]),
    "eyring": (["eyring", "RATES", "--plot", "OUT/eyring.png", "--posterior", "--posterior-steps", "100"],
               ["eyring.png", "eyring_posterior.png"]),
}


@pytest.mark.parametrize("command", sorted(COMMANDS))
def test_cli_closes_the_figures_it_saves(command, inputs, tmp_path):
    model, rates = inputs
    words, written = COMMANDS[command]
    swap = {"MODEL": str(model), "RATES": str(rates)}
    args = [swap.get(w, w.replace("OUT", str(tmp_path))) for w in words]
    before = set(plt.get_fignums())
    result = CliRunner().invoke(cli, args)
    assert result.exit_code == 0, result.output
    assert all((tmp_path / name).stat().st_size > 1000 for name in written)
    assert set(plt.get_fignums()) == before


def test_figures_returned_to_python_stay_open(inputs, tmp_path):
    ax = dnmr.simulate(dnmr.load_model(inputs[0])).plot()
    assert ax.figure.number in plt.get_fignums()
    save_figure(ax.figure, tmp_path / "kept.png")  # saving alone keeps it for the notebook
    assert ax.figure.number in plt.get_fignums()
    with pytest.raises(dnmr.InputError, match="already exists"):  # a refused write still closes when asked
        save_figure(ax.figure, tmp_path / "kept.png", close=True)
    assert ax.figure.number not in plt.get_fignums()
