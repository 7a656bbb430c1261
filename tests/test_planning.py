"""Coalescence from the engine, coalescence temperatures, the information-based plan, and `dnmr plan`.

References: the published coalescence conditions (tests/closed_forms.py), the McConnell two-site
lineshape, the Eyring equation with CODATA constants from scipy, the IUPAC frequency ratios, and the
classical D-optimal design for a straight line.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from click.testing import CliRunner
from scipy import constants

from closed_forms import (gutowsky_holm_rate, kurland_rubin_wise_rate, mcconnell_two_site,
                          shanan_atidi_bar_eli_rates)
from reference_eyring import eyring_rate
from dnmr.cli import cli
from dnmr.errors import InputError
from dnmr.model import Model
from dnmr.modelparts import Exchange, Spectrometer, State
from dnmr.planning.cautions import CAUTIONS
from dnmr.planning.coalescence import coalescence, predict_coalescence
from dnmr.planning.design import (d_optimal_temperatures, information_profile, interpolated_information,
                                  ln_rate_information)
from dnmr.planning.plan import plan_experiment
from dnmr.planning.solvents import solvent
from dnmr.activation.parameters import ActivationParameters
from dnmr.planning.conditions import model_at

SF = 400.0


def two_sites(p_a=0.5, dnu=100.0, width=1.0, barrier=None, free_energy=None, nucleus="1H", sf=SF):
    """Invented two-site exchange of one uncoupled spin, b lying `dnu` Hz above a."""
    populations = ({"population": p_a}, {"population": 1 - p_a}) if free_energy is None else (
        {"free_energy_kj_mol": 0.0}, {"free_energy_kj_mol": free_energy})
    kinetics = {"rate_per_s": 10.0} if barrier is None else {"barrier_kj_mol": barrier}
    return Model(Spectrometer(sf, nucleus), (
        State("a", {"H": 3.0}, linewidth_hz=width, **populations[0]),
        State("b", {"H": 3.0 + dnu / sf}, linewidth_hz=width, **populations[1])),
        (Exchange("a", "b", rate_per_s=kinetics.get("rate_per_s"), barrier_kj_mol=kinetics.get("barrier_kj_mol"),
                  name="hop"),),
        temperature_k=None if barrier is None and free_energy is None else 298.15, points=2048)


def ab_swap(dnu=100.0, j_hz=10.0, width=1.0):
    """Invented AB pair under mutual exchange (the two spins trade places)."""
    return Model(Spectrometer(SF), (State("s", {"A": 3.0, "B": 3.0 + dnu / SF}, {"A-B": j_hz}, width, 1.0),),
                 (Exchange("s", "s", {"A": "B", "B": "A"}, rate_per_s=10.0, name="swap"),), points=2048)


# --- coalescence rates against the published conditions (narrow-line limit) -----------------

def test_gutowsky_holm_equal_populations():
    # Gutowsky & Holm, J. Chem. Phys. 25, 1228 (1956): k_c = pi dnu / sqrt 2.
    (c,) = coalescence(two_sites(0.5, dnu=100.0))
    assert c.narrow_limit_rate_per_s == pytest.approx(gutowsky_holm_rate(100.0), rel=1e-4)


@pytest.mark.parametrize("dp", [0.1, 0.3, 0.6])
def test_shanan_atidi_bar_eli_unequal_populations(dp):
    # Shanan-Atidi & Bar-Eli, J. Phys. Chem. 74, 961 (1970); the process runs from the major site a.
    (c,) = coalescence(two_sites((1 + dp) / 2, dnu=80.0))
    k_ab, _ = shanan_atidi_bar_eli_rates(dp, 80.0)
    assert c.narrow_limit_rate_per_s == pytest.approx(k_ab, rel=1e-4)


@pytest.mark.parametrize("dnu, j_hz", [(100.0, 10.0), (60.0, 25.0)])
def test_kurland_rubin_wise_ab_pair(dnu, j_hz):
    # Kurland, Rubin & Wise, J. Chem. Phys. 40, 2426 (1964): k_c = (pi/sqrt 2) sqrt(dnu^2 + 6 J^2).
    (c,) = coalescence(ab_swap(dnu, j_hz))
    assert c.narrow_limit_rate_per_s == pytest.approx(kurland_rubin_wise_rate(dnu, j_hz), rel=1e-4)


def test_finite_linewidth_moves_coalescence_as_mcconnell_says():
    # McConnell, J. Chem. Phys. 28, 430 (1958) with the intrinsic width: the centre of the two-site
    # line (equal populations) is a minimum just below the rate found and a maximum just above.
    dnu, width = 40.0, 6.0
    (c,) = coalescence(two_sites(0.5, dnu=dnu, width=width))
    assert c.rate_per_s < c.narrow_limit_rate_per_s
    centre = np.array([-1e-3, 0.0, 1e-3])

    def curvature(k):
        y = mcconnell_two_site(centre, -dnu / 2, dnu / 2, k, 0.5, width, width).real
        return y[0] - 2 * y[1] + y[2]

    assert curvature(0.999 * c.rate_per_s) > 0 > curvature(1.001 * c.rate_per_s)


@pytest.mark.parametrize("dnu, resolved", [(2.0, False), (4.0, True)])
def test_lines_too_close_for_their_width_have_no_coalescence(dnu, resolved):
    # Two equal Lorentzians of FWHM w show a dip between them only when they are more than
    # w / sqrt 3 apart (from memory; follows from the second derivative at the midpoint).
    (c,) = coalescence(two_sites(0.5, dnu=dnu, width=5.0))
    assert (c.rate_per_s is not None) == resolved
    assert c.narrow_limit_rate_per_s == pytest.approx(gutowsky_holm_rate(dnu), rel=1e-4)
    if not resolved:
        assert "slow exchange" in " ".join(c.notes)


def test_observed_nucleus_frequency_from_iupac_ratio():
    # Harris et al., Pure Appl. Chem. 73, 1795 (2001): Xi(13C) = 25.145020 %.
    model = two_sites(0.5, dnu=10.0, nucleus="13C", sf=100.0)
    (c,) = coalescence(model, frequencies_mhz=[600.0])
    assert c.frequency_mhz == pytest.approx(600.0 * 0.25145020, rel=1e-12)
    dppm = 10.0 / 100.0
    assert c.shift_difference_hz == pytest.approx(dppm * 600.0 * 0.25145020, rel=1e-9)
    assert c.narrow_limit_rate_per_s == pytest.approx(gutowsky_holm_rate(c.shift_difference_hz), rel=1e-4)


# --- coalescence temperatures ----------------------------------------------------------------

def test_coalescence_temperature_rises_with_field_and_obeys_eyring():
    # At a fixed barrier a larger shift difference in Hz needs a faster rate, so a higher T_c; at T_c
    # the Gutowsky-Holm rate put into the Eyring equation gives back the barrier:
    # dG = R T_c ln(sqrt 2 kB T_c / (pi h dnu)) (PHYSICS notes; CODATA constants from scipy).
    found = predict_coalescence(two_sites(0.5, dnu=100.0, width=0.5), ActivationParameters.from_gibbs(60.0),
                                frequencies_mhz=[300.0, 400.0, 600.0])
    temps = [c.narrow_limit_temperature_k for c in found]
    assert temps[0] < temps[1] < temps[2]
    for c in found:
        t, dnu = c.narrow_limit_temperature_k, c.shift_difference_hz
        gibbs = constants.R * t * math.log(math.sqrt(2) * constants.k * t / (math.pi * constants.h * dnu)) / 1e3
        assert gibbs == pytest.approx(60.0, abs=1e-3)
        assert eyring_rate(c.temperature_k, 60.0) == pytest.approx(c.rate_per_s, rel=1e-4)


def test_populations_follow_temperature_at_coalescence():
    # Boltzmann populations at T_c (CODATA R) and Shanan-Atidi & Bar-Eli (1970) for those populations.
    (c,) = predict_coalescence(two_sites(free_energy=2.0, dnu=100.0, barrier=55.0), frequencies_mhz=[400.0])
    t = c.narrow_limit_temperature_k
    p_b = 1.0 / (1.0 + math.exp(2000.0 / (constants.R * t)))
    k_ab, _ = shanan_atidi_bar_eli_rates(1 - 2 * p_b, 100.0)
    assert c.narrow_limit_rate_per_s == pytest.approx(k_ab, rel=1e-3)
    assert eyring_rate(t, 55.0) == pytest.approx(c.narrow_limit_rate_per_s, rel=1e-3)


def test_enthalpy_and_entropy_give_the_gibbs_energy_at_coalescence():
    # Eyring with ΔH‡ and ΔS‡ (tests/reference_eyring.py).
    act = ActivationParameters(50.0, -20.0)
    (c,) = predict_coalescence(two_sites(0.5, dnu=100.0), act)
    t = c.temperature_k
    assert eyring_rate(t, 50.0, -20.0) == pytest.approx(c.rate_per_s, rel=1e-4)


# --- information and design ------------------------------------------------------------------

def test_ln_rate_information_matches_the_mcconnell_lineshape():
    # Fisher information about ln k from the McConnell (1958) two-site lineshape, with the intensity
    # scale projected out, computed here independently of the engine.
    model = two_sites(0.6, dnu=60.0, width=2.0).with_rates([30.0])
    hz = np.linspace(1100.0, 1300.0, 801) + 0.0123
    noise = 1e-3
    nu_a, nu_b = 3.0 * SF, 3.0 * SF + 60.0

    def y(k):
        return mcconnell_two_site(hz, nu_a, nu_b, k, 0.6, 2.0, 2.0).real

    h = 1e-4
    d_rate = (y(30.0 * math.exp(h)) - y(30.0 * math.exp(-h))) / (2 * h) / noise
    d_scale = y(30.0) / noise
    expected = d_rate @ d_rate - (d_rate @ d_scale) ** 2 / (d_scale @ d_scale)
    (info,) = ln_rate_information(model, [0], hz, noise)
    assert info[0] == pytest.approx(expected, rel=1e-3)  # dnmr steps forward by 1e-4 in ln k


def test_interpolated_information_is_close_to_the_exact_one():
    # The plan computes the information at a few temperatures, refines where it changes fast and
    # interpolates in between; midway between the final nodes it stays within 5 % of the engine's value
    # (a bound on the approximation).
    model = two_sites(0.5, dnu=100.0, barrier=60.0)
    hz = np.linspace(1150.0, 1350.0, 1601)
    act = {0: ActivationParameters.from_gibbs(60.0)}

    def exact(t):
        return ln_rate_information(model_at(model, t, act), [0], hz, 1e-3)

    nodes, values = information_profile(exact, 240.0, 360.0)
    between = 0.5 * (np.array(nodes[1:]) + np.array(nodes[:-1]))
    for t, approx in zip(between, interpolated_information(nodes, values, between)):
        assert approx[0, 0] == pytest.approx(exact(t)[0, 0], rel=0.05)


def test_d_optimal_design_of_a_straight_line_puts_points_at_both_ends():
    # D-optimal design for a straight line on an interval: equal numbers of points at its two ends
    # (Atkinson & Donev, Optimum Experimental Designs (1992)); with constant information about ln k,
    # ln k is a straight line in 1/T.
    temps = np.arange(250.0, 351.0, 5.0)
    info = []
    for t in temps:
        g = np.array([[-1e3 / (constants.R * t), 1.0 / constants.R]])
        info.append(g.T @ g)
    assert [temps[i] for i in d_optimal_temperatures(temps, info, 2, 0.0)] == [250.0, 350.0]
    assert [temps[i] for i in d_optimal_temperatures(temps, info, 4, 5.0)] == [250.0, 255.0, 345.0, 350.0]


def test_plan_stays_in_the_liquid_range_and_carries_the_cautions():
    # Chloroform-d boils at about 61 deg C (from memory); the plan keeps 10 K away from it.
    cdcl3 = solvent("CDCl3")
    plan = plan_experiment(two_sites(0.5, dnu=100.0), ActivationParameters.from_gibbs(62.0), solvent=cdcl3,
                           spectra=6)
    (field,) = plan.fields
    assert len(field.temperatures) == 6
    assert all(cdcl3.melting_point_k + 10 <= t <= cdcl3.boiling_point_k - 10 for t in field.temperatures_k)
    assert min(np.diff(field.temperatures_k)) >= 5.0
    assert all(p.reason for p in field.temperatures)
    (errors,) = field.errors
    assert errors.enthalpy_stderr > 0 and errors.correlation_enthalpy_entropy > 0.9  # Grieger, Hunter & Krug (1976)
    text = plan.report()
    for word in ("burst", "crack", "liquid nitrogen", "pacemakers", "facility"):
        assert word in text
    assert plan.to_dict()["cautions"] == list(CAUTIONS)


def test_plan_warns_when_coalescence_is_past_the_boiling_point():
    # Dichloromethane-d2 boils at about 40 deg C (from memory); a 75 kJ/mol barrier coalesces far above.
    plan = plan_experiment(two_sites(0.5, dnu=100.0), ActivationParameters.from_gibbs(75.0),
                           solvent=solvent("CD2Cl2"), spectra=4)
    kinds = {w.kind for w in plan.solvent_warnings}
    assert kinds == {"above boiling"}
    assert any("outside the usable range" in n for n in plan.notes)
    assert "dichloromethane-d2" not in plan.covering_solvents


def test_plan_needs_activation_parameters():
    with pytest.raises(InputError, match="activation parameters"):
        plan_experiment(two_sites(0.5))


# --- command line ----------------------------------------------------------------------------

MODEL_TOML = """
title = "invented AB pair that trades places"
[spectrometer]
nucleus = "1H"
frequency_mhz = 400.0
[window]
ppm = [2.5, 3.5]
points = 2048
[[state]]
name = "s"
population = 1.0
linewidth_hz = 1.0
shifts_ppm = { Ha = 2.9, Hb = 3.1 }
couplings_hz = { "Ha-Hb" = 12.0 }
[[exchange]]
name = "flip"
from = "s"
to = "s"
spins = { Ha = "Hb", Hb = "Ha" }
rate_per_s = 40.0
"""


@pytest.fixture()
def model_file(tmp_path):
    path = tmp_path / "model.toml"
    path.write_text(MODEL_TOML)
    return path


def test_cli_plan_json_has_the_contract_keys(model_file):
    result = CliRunner().invoke(cli, ["plan", str(model_file), "--barrier-kj-mol", "60",
                                      "--frequencies-mhz", "300,600", "--solvent", "toluene-d8", "--json"])
    assert result.exit_code == 0, result.output
    out = json.loads(result.stdout)
    assert [c["frequency_mhz"] for c in out["coalescence"]] == [300.0, 600.0]
    for c in out["coalescence"]:
        assert {"process", "frequency_mhz", "rate_per_s", "temperature_k"} <= set(c)
        assert c["process"] == "flip"
        # Kurland, Rubin & Wise (1964) in the narrow-line limit; dnu = 0.2 ppm at this field.
        krw = kurland_rubin_wise_rate(0.2 * c["frequency_mhz"], 12.0)
        assert c["narrow_limit_rate_per_s"] == pytest.approx(krw, rel=1e-4)
        assert eyring_rate(c["temperature_k"], 60.0) == pytest.approx(c["rate_per_s"], rel=1e-4)
    assert {"plan", "solvent", "cautions", "measurable_range"} <= set(out)
    assert out["solvent"]["name"] == "toluene-d8"


def test_cli_plan_report_and_figure(model_file, tmp_path):
    figure = tmp_path / "stack.png"
    result = CliRunner().invoke(cli, ["plan", str(model_file), "--barrier-kj-mol", "60", "--spectra", "4",
                                      "--plot", str(figure)])
    assert result.exit_code == 0, result.output
    assert "Coalescence" in result.stdout and "Cautions" in result.stdout
    assert figure.stat().st_size > 0


def test_cli_plan_writes_a_series_file_with_the_linewidth_treatment_it_assumes(model_file, tmp_path):
    from dnmr.io.modelfile import read_toml

    series = tmp_path / "plan" / "series.toml"
    series.parent.mkdir()
    result = CliRunner().invoke(cli, ["plan", str(model_file), "--barrier-kj-mol", "60", "--spectra", "5",
                                      "--series", str(series), "--json"])
    assert result.exit_code == 0, result.output
    out = json.loads(result.stdout)
    assert out["linewidth_treatment"] == "slow-exchange-trend" and "linewidth" in out["linewidth_assumption"]
    data = read_toml(series)
    assert data["model"] == "../model.toml" and data["fit"]["linewidth"] == out["linewidth_treatment"]
    assert [s["temperature_k"] for s in data["spectrum"]] == pytest.approx(out["plan"][0]["temperatures_k"], abs=0.05)
    again = CliRunner().invoke(cli, ["plan", str(model_file), "--barrier-kj-mol", "60", "--series", str(series)])
    assert again.exit_code == 2  # an existing file is not overwritten without --overwrite


@pytest.mark.parametrize("options", [
    ["--barrier-kj-mol", "60", "--solvent", "no-such-solvent"],
    ["--barrier-kj-mol", "60", "--frequencies-mhz", "400,abc"],
    ["--barrier-kj-mol", "60", "--enthalpy-kj-mol", "50", "--entropy-j-mol-k", "0"],
    ["--barrier-kj-mol", "60", "--melting-point-k", "200"],
])
def test_cli_plan_bad_option_is_one_line_and_exit_2(model_file, options):
    result = CliRunner().invoke(cli, ["plan", str(model_file), *options])
    assert result.exit_code == 2
    assert len(result.stderr.strip().splitlines()) == 1
    assert "Traceback" not in result.stderr


def test_coalescence_of_pairs_whose_averaged_signal_is_still_a_multiplet():
    """Two unequally populated AB rotamers swapped by the exchange: the averaged spectrum is again an AB
    quartet, so the exchanging pair merges into a doublet, not a single maximum.  The coalescence rate must
    exist and approach Shanan-Atidi & Bar-Eli (J. Phys. Chem. 74, 961 (1970)) for the uncoupled pair as the
    geminal coupling goes to zero (common practice: weak couplings barely move coalescence)."""
    from closed_forms import shanan_atidi_bar_eli_rates

    import dnmr
    from dnmr.planning.coalescence import coalescence_rate
    from dnmr.planning.pairs import exchanging_pairs

    def rotamers(j_hz):
        states = [dnmr.State("syn", {"Ha": 4.62, "Hb": 4.47}, {"Ha-Hb": j_hz}, 1.0, population=0.64),
                  dnmr.State("anti", {"Ha": 4.38, "Hb": 4.71}, {"Ha-Hb": j_hz}, 1.0, population=0.36)]
        return dnmr.Model(dnmr.Spectrometer(400.0), states,
                          [dnmr.Exchange("syn", "anti", {"Ha": "Hb", "Hb": "Ha"}, rate_per_s=1.0)])

    model = rotamers(-15.0)
    pair = exchanging_pairs(model)[0]
    k_coupled, note = coalescence_rate(model, pair, narrow_limit=True)
    assert k_coupled is not None, note
    weak = rotamers(-0.01)
    k_weak, _ = coalescence_rate(weak, exchanging_pairs(weak)[0], narrow_limit=True)
    dnu = abs(pair.shift_difference_hz(weak))
    k_ab, _ = shanan_atidi_bar_eli_rates(0.28, dnu)
    assert k_weak == pytest.approx(k_ab, rel=2e-2)
    assert k_coupled != pytest.approx(k_weak, rel=1e-3)  # the coupling does move it


# --- equivalent groups and heteronuclear partners ----------------------------------------------

def swapping_ch2_groups(j_hz=7.0, dnu=30.0):
    """Invented X-CH2-CH2-Y fragment whose two CH2 groups (equivalent pairs) trade places, J = 7 Hz."""
    state = State("s", {"A": 3.0, "B": 3.0 + dnu / SF}, {"A-B": j_hz}, 1.0, 1.0)
    return Model(Spectrometer(SF), (state,), (Exchange("s", "s", {"A": "B", "B": "A"}, rate_per_s=1.0, name="swap"),),
                 groups={"A": 2, "B": 2})


def test_coalescence_of_coupled_groups_matches_the_system_written_spin_by_spin():
    # Coalescence is where two maxima between the shifts become one (Gutowsky & Holm 1956; Kurland,
    # Rubin & Wise 1964).  For two coupled CH2 groups (A2B2, not AB) the exact spectrum of the same
    # system written nucleus by nucleus (tests/test_groups.py) must show that change at the rate found.
    from test_groups import written_out_model

    from dnmr import simulate
    from dnmr.planning.coalescence import count_maxima

    model = swapping_ch2_groups()
    (c,) = coalescence(model)
    spins = written_out_model(model)
    hz = np.linspace(3.0 * SF, 3.0 * SF + 30.0, 4001)

    def maxima(k):
        return count_maxima(simulate(spins.with_rates([k]), hz / SF).intensity)

    assert maxima(0.995 * c.rate_per_s) == 2 and maxima(1.005 * c.rate_per_s) == 1
    # the A2B2 rate differs from the AB pair's (Kurland, Rubin & Wise) by more than the test's resolution
    assert c.narrow_limit_rate_per_s != pytest.approx(kurland_rubin_wise_rate(30.0, 7.0), rel=0.02)


def test_unequal_couplings_to_a_heteronucleus_are_named_in_the_note():
    # A proton hopping between sites whose couplings to a 19F differ (40 and 10 Hz): in first order each
    # fluorine component has its own shift difference, dnu +/- (J_b - J_a)/2 (common practice), so no
    # single rate describes the coalescence; the rate given is that of the shifts alone (Gutowsky & Holm).
    model = Model(Spectrometer(SF), (State("a", {"H": 3.0}, {"H-F": 40.0}, 1.0, 0.5),
                                     State("b", {"H": 3.25}, {"H-F": 10.0}, 1.0, 0.5)),
                  (Exchange("a", "b", rate_per_s=1.0, name="hop"),), heteronuclei={"F": "19F"}, points=2048)
    (c,) = coalescence(model)
    assert "H-F 40 -> 10 Hz" in " ".join(c.notes)
    assert c.narrow_limit_rate_per_s == pytest.approx(gutowsky_holm_rate(100.0), rel=1e-4)
    same = model.replace(states=tuple(s.__class__(s.name, s.shifts_ppm, {"H-F": 40.0}, 1.0, 0.5)
                                      for s in model.states))
    assert coalescence(same)[0].notes == ()


def test_plan_report_quotes_the_separation_as_a_magnitude():
    # The shift difference a chemist quotes is the separation |Δν| (Hz; common practice).
    plan = plan_experiment(two_sites(0.5, dnu=-100.0), ActivationParameters.from_gibbs(60.0), spectra=3)
    (c,) = plan.coalescence
    assert c.shift_difference_hz == pytest.approx(-100.0)
    row = next(line for line in plan.report().splitlines() if c.pair.label in line and "MHz" not in line)
    assert " 100.00 " in row and "-100.00" not in row
    assert plan.to_dict()["coalescence"][0]["separation_hz"] == pytest.approx(100.0)


# --- coupling-averaging exchange: equal shifts, changed couplings -----------------------------------

def test_coalescence_of_a_fluorine_swap_is_gutowsky_holm_of_the_coupling_difference():
    # The swap interconverts the inner components +-(J1 - J2)/2 of the proton doublet of doublets (first
    # order, common practice): Gutowsky & Holm (1956) with dnu = |J1 - J2| = 40 Hz.  The exact engine on
    # the full model shows four maxima (dd) just below the rate found and three (1:2:1 triplet) above it.
    from test_timescale import fluorine_swap

    from dnmr import simulate
    from dnmr.planning.coalescence import count_maxima

    model = fluorine_swap()
    (c,) = coalescence(model)
    assert c.narrow_limit_rate_per_s == pytest.approx(gutowsky_holm_rate(40.0), rel=1e-4)
    assert c.separation_hz == pytest.approx(40.0) and c.shift_difference_hz == 0.0 and c.notes == ()
    assert c.to_dict()["kind"] == "coupling"
    hz = np.linspace(3.0 * SF - 40.0, 3.0 * SF + 40.0, 8001)

    def maxima(k):
        return count_maxima(simulate(model.with_rates([k]), hz / SF).intensity)

    assert maxima(0.995 * c.rate_per_s) == 4 and maxima(1.005 * c.rate_per_s) == 3


def test_coalescence_of_a_coupling_that_differs_between_sites_of_equal_shift():
    # One shift, two sites whose coupling to a 19F is 40 and 10 Hz: each fluorine component is a two-site
    # exchange across |dJ| / 2 = 15 Hz (first order, common practice).  Their McConnell (1958) lineshapes
    # (tests/closed_forms.py) turn from four maxima into two at the rate found.
    from dnmr.planning.coalescence import count_maxima

    model = Model(Spectrometer(SF), (State("a", {"H": 3.0}, {"H-F": 40.0}, 1.0, 0.5),
                                     State("b", {"H": 3.0}, {"H-F": 10.0}, 1.0, 0.5)),
                  (Exchange("a", "b", rate_per_s=1.0, name="hop"),), heteronuclei={"F": "19F"})
    (c,) = coalescence(model)
    assert c.separation_hz == pytest.approx(15.0)
    hz = np.linspace(-40.0, 40.0, 8001)

    def maxima(k):
        return count_maxima(sum(mcconnell_two_site(hz, m * 20.0, m * 5.0, k, 0.5, 1.0, 1.0).real for m in (1, -1)))

    assert maxima(0.995 * c.rate_per_s) == 4 and maxima(1.005 * c.rate_per_s) == 2


def test_components_that_move_by_different_amounts_are_noted():
    # A proton coupled 12 and 2 Hz to two CF3 groups that trade places: its quartet-of-quartets components
    # (m_a, m_b) go to (m_b, m_a), a move of |dJ (m_b - m_a)| = 10, 20 or 30 Hz (first order, common
    # practice), so they merge at different rates and the plan must say which one it gives.
    model = Model(Spectrometer(SF), (State("s", {"H": 3.0}, {"H-Fa": 12.0, "H-Fb": 2.0}, 1.0, 1.0),),
                  (Exchange("s", "s", {"Fa": "Fb", "Fb": "Fa"}, rate_per_s=1.0, name="rot"),),
                  groups={"Fa": 3, "Fb": 3}, heteronuclei={"Fa": "19F", "Fb": "19F"})
    (c,) = coalescence(model)
    assert c.pair.component_moves_hz == (10.0, 20.0, 30.0)
    assert "move by 10, 20, 30 Hz" in " ".join(c.notes) and "last of them" in " ".join(c.notes)
    assert c.to_dict()["component_moves_hz"] == [10.0, 20.0, 30.0]
    from test_timescale import fluorine_swap

    (single,) = coalescence(fluorine_swap())  # one move only (40 Hz): no such note
    assert single.pair.component_moves_hz == (40.0,) and single.notes == ()


def test_plan_covers_an_exchange_that_only_swaps_fluorines():
    # Eyring (tests/reference_eyring.py) at the coalescence temperature gives back the coalescence rate.
    from test_timescale import fluorine_swap

    plan = plan_experiment(fluorine_swap(barrier=60.0), spectra=3)
    (c,) = plan.coalescence
    assert eyring_rate(c.temperature_k, 60.0) == pytest.approx(c.rate_per_s, rel=1e-4)
    (timescale,) = plan.timescales
    assert timescale.slow_below_k < c.temperature_k < timescale.fast_above_k
    (field_plan,) = plan.fields
    assert len(field_plan.temperatures_k) == 3
    assert "H(s) (J to F1, F2)" in plan.report()
