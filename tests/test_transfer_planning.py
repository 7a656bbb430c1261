"""Planning across both regimes: the magnetisation-transfer range below the lineshapes and the transfer
temperatures with their delays and mixing times (dnmr.planning.transferplan), `dnmr plan` and
`dnmr timescale`.

References: the Eyring equation with CODATA constants (Eyring, J. Chem. Phys. 3, 107 (1935);
tests/reference_eyring.py); the two-site Bloch–McConnell equations for z-magnetisation (McConnell,
J. Chem. Phys. 28, 430 (1958)) written out here and propagated with scipy's matrix exponential, for the
mixing time at which the cross peak is largest.  The range's edges (R1/5 and a few tens s^-1) and the
5 T1 of a full recovery are common practice.
"""
from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner
from scipy.linalg import expm
from scipy.optimize import minimize_scalar

from dnmr.cli import cli
from dnmr.errors import InputError
from dnmr.model import Model
from dnmr.modelparts import Exchange, Spectrometer, State
from dnmr.planning.plan import plan_experiment
from dnmr.planning.timescale import timescale_view
from dnmr.planning.transferplan import TYPICAL_R1_PER_S, best_mixing_time
from reference_eyring import eyring_rate

DH, DS = 60.0, -12.0  # invented activation parameters, kJ/mol and J/(mol K)


def rotamers(r1=(1.6, 1.9), p_syn=0.62) -> Model:
    """Invented two-site rotation (syn <-> anti) of one singlet, 36 Hz apart at 400 MHz."""
    relax = r1 if r1 is not None else (None, None)
    return Model(Spectrometer(400.0), (
        State("syn", {"H": 3.83}, linewidth_hz=1.0, population=p_syn, r1_per_s=relax[0]),
        State("anti", {"H": 3.74}, linewidth_hz=1.0, population=1 - p_syn, r1_per_s=relax[1])),
        (Exchange("syn", "anti", enthalpy_kj_mol=DH, entropy_j_mol_k=DS, name="rotation"),),
        temperature_k=300.0, points=2048)


def cross_peak(t, r1, kf, kr):
    """Magnetisation arriving at site b from site a after mixing time t: the (b, a) element of
    expm(-(R1 + K) t) times M_a,eq (two-site Bloch–McConnell equations, McConnell 1958)."""
    L = np.array([[r1 + kf, -kr], [-kf, r1 + kr]])
    p_a = kr / (kf + kr)
    return expm(-L * t)[1, 0] * p_a


@pytest.mark.parametrize("r1, kf, kr", [(1.0, 0.3, 0.3), (1.7, 5.0, 8.1), (0.8, 40.0, 25.0)])
def test_best_mixing_time_maximises_the_two_site_cross_peak(r1, kf, kr):
    found = minimize_scalar(lambda t: -cross_peak(t, r1, kf, kr), bounds=(1e-5, 20.0 / r1), method="bounded",
                            options={"xatol": 1e-10})
    assert best_mixing_time(r1, kf + kr) == pytest.approx(found.x, rel=1e-5)


def test_best_mixing_time_is_near_one_over_k_plus_r1_in_slow_exchange():
    # the common rule of thumb t_m ~ 1/(k + R1) holds while exchange is slower than relaxation
    for k in (0.05, 0.2):
        assert best_mixing_time(1.0, 2 * k) * (k + 1.0) == pytest.approx(1.0, abs=0.05)


def test_transfer_range_edges_follow_the_eyring_equation():
    view = timescale_view(rotamers())
    (span,) = view.transfer
    r1 = (1.6 + 1.9) / 2  # the mean of the model's r1_per_s over its sites
    assert span.r1_per_s == pytest.approx(r1) and "model file" in span.r1_source
    assert eyring_rate(span.low_k, DH, DS) == pytest.approx(r1 / 5, rel=1e-5)
    assert eyring_rate(span.high_k, DH, DS) == pytest.approx(30.0, rel=1e-5)
    assert "Magnetisation transfer" in view.report() and "k 0.35-30 s^-1" in view.report()
    assert view.to_dict()["magnetisation_transfer"][0]["low_k"] == pytest.approx(span.low_k)


def test_r1_comes_from_a_stated_typical_value_or_an_override():
    (typical,) = timescale_view(rotamers(r1=None)).transfer
    assert typical.r1_per_s == TYPICAL_R1_PER_S and "typical value" in typical.r1_source
    (given,) = timescale_view(rotamers(), r1_per_s=0.5).transfer
    assert given.r1_per_s == 0.5 and given.r1_source == "given"
    assert eyring_rate(given.low_k, DH, DS) == pytest.approx(0.1, rel=1e-5)
    with pytest.raises(InputError, match="r1_per_s: R1 must be a positive rate"):
        timescale_view(rotamers(), r1_per_s=-1.0)


def test_plan_gives_transfer_temperatures_times_and_a_joined_range():
    plan = plan_experiment(rotamers(), spectra=3)
    (transfer,) = plan.transfer
    span = transfer.rate_range
    temps = [run.temperature_k for run in transfer.runs]
    assert len(temps) == 4 and temps == sorted(temps)
    assert span.low_k - 0.5 <= temps[0] and temps[-1] <= span.high_k + 0.5
    for run in transfer.runs:
        assert run.rate_per_s == pytest.approx(eyring_rate(run.temperature_k, DH, DS), rel=1e-9)
        # reverse rate by detailed balance at the model's populations (p_syn 0.62, fixed)
        total = run.rate_per_s * (1 + 0.62 / 0.38)
        assert run.exchange_sum_per_s == pytest.approx(total, rel=1e-9)
        assert run.mixing_time_s == pytest.approx(np.log1p(total / span.r1_per_s) / total, rel=1e-12)
        assert run.inversion_delays_s[-1] == pytest.approx(5.0 / span.r1_per_s, rel=0.03)  # 5 T1
        assert run.inversion_delays_s[0] < run.mixing_time_s < run.inversion_delays_s[-1]
        assert run.saturation_s == pytest.approx(5.0 / (span.r1_per_s + total))
    low, high = transfer.combined_range_k
    assert high - low >= 60.0
    d = plan.to_dict()
    assert set(d["coalescence"][0]) >= {"process", "frequency_mhz", "rate_per_s", "temperature_k"}  # the contract
    mt = d["magnetisation_transfer"][0]
    assert mt["combined_span_k"] == pytest.approx(high - low) and len(mt["runs"]) == 4
    text = plan.report()
    assert "Magnetisation transfer below the lineshape range" in text and "inversion delays (s):" in text
    assert f"together: {low:.0f}-{high:.0f} K" in text


def test_narrow_usable_range_is_said():
    plan = plan_experiment(rotamers(), spectra=3, probe_range_k=(270.0, 300.0))
    (transfer,) = plan.transfer
    assert all(270.0 <= run.temperature_k <= 300.0 for run in transfer.runs)
    assert any("under 60 K" in n for n in transfer.notes)
    cold = plan_experiment(rotamers(), spectra=3, probe_range_k=(320.0, 380.0))
    assert not cold.transfer[0].runs and any("outside the usable range" in n for n in cold.transfer[0].notes)


def test_cli_plan_and_timescale_show_both_ranges(tmp_path):
    model = tmp_path / "model.toml"
    model.write_text('title = "invented rotamers"\n[spectrometer]\nnucleus = "1H"\nfrequency_mhz = 400.0\n'
                     '[conditions]\ntemperature_k = 300.0\n'
                     '[[state]]\nname = "syn"\npopulation = 0.62\nlinewidth_hz = 1.0\nshifts_ppm = { H = 3.83 }\n'
                     '[[state]]\nname = "anti"\npopulation = 0.38\nlinewidth_hz = 1.0\nshifts_ppm = { H = 3.74 }\n'
                     '[[exchange]]\nname = "rotation"\nfrom = "syn"\nto = "anti"\nenthalpy_kj_mol = 60.0\n'
                     'entropy_j_mol_k = -12.0\n')
    run = CliRunner().invoke(cli, ["plan", str(model), "--spectra", "3", "--json", "--r1-per-s", "0.8",
                                   "--transfer-runs", "3"])
    assert run.exit_code == 0, run.output
    mt = json.loads(run.stdout)["magnetisation_transfer"][0]
    assert mt["r1_per_s"] == 0.8 and len(mt["runs"]) == 3
    assert eyring_rate(mt["low_k"], DH, DS) == pytest.approx(0.16, rel=1e-5)
    shown = CliRunner().invoke(cli, ["timescale", str(model), "--plot", str(tmp_path / "bands.png")])
    assert shown.exit_code == 0 and "typical value" in shown.output and (tmp_path / "bands.png").is_file()
    bad = CliRunner().invoke(cli, ["timescale", str(model), "--r1-per-s", "0"])
    assert bad.exit_code == 2 and len(bad.output.strip().splitlines()) == 1
