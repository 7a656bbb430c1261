"""Regimes of exchange, the fast-exchange averaged spin system and its equivalences, `dnmr timescale`.

References: the slow- and fast-exchange limits of the McConnell equations and the A2 spectrum
(tests/closed_forms.py), the Eyring equation with CODATA constants (tests/reference_eyring.py), and the definitions of
chemical and magnetic equivalence (Pople, Schneider & Bernstein, High-resolution NMR (1959)).
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from click.testing import CliRunner
from scipy.optimize import brentq, minimize_scalar

from closed_forms import (a2_line, fast_exchange_excess_width, lorentzian_lines, mcconnell_two_site,
                          slow_exchange_broadening)
from reference_eyring import eyring_rate
from dnmr import simulate
from dnmr.cli import cli
from dnmr.model import Model
from dnmr.modelparts import Exchange, Spectrometer, State
from dnmr.activation.parameters import ActivationParameters
from dnmr.planning.fastexchange import averaged_model, fast_exchange_limit
from dnmr.planning.pairs import exchanging_pairs
from dnmr.planning.regimes import rate_range, range_temperatures
from dnmr.planning.timescale import timescale_view

SF = 400.0


def ab_swap(j_hz=-14.0, rate=10.0, width=1.0):
    """Invented AB pair whose spins trade places (mutual exchange)."""
    return Model(Spectrometer(SF), (State("s", {"A": 3.0, "B": 3.25}, {"A-B": j_hz}, width, 1.0),),
                 (Exchange("s", "s", {"A": "B", "B": "A"}, rate_per_s=rate, name="swap"),))


def two_sites(p_a=0.7, dnu=100.0, width=1.0):
    """Invented two-site exchange of one spin, site b `dnu` Hz above site a."""
    return Model(Spectrometer(SF), (State("a", {"H": 3.0}, linewidth_hz=width, population=p_a),
                                    State("b", {"H": 3.0 + dnu / SF}, linewidth_hz=width, population=1 - p_a)),
                 (Exchange("a", "b", rate_per_s=10.0, name="hop"),))


def fwhm(absorption, low, high):
    """Position and full width at half height (Hz) of the one maximum of `absorption` in [low, high]."""
    peak = minimize_scalar(lambda f: -absorption(f), bounds=(low, high), method="bounded",
                           options={"xatol": 1e-9}).x
    half = absorption(peak) / 2
    return peak, brentq(lambda f: absorption(f) - half, peak, high) - brentq(lambda f: absorption(f) - half, low, peak)


def engine_absorption(model):
    return lambda f: float(simulate(model, np.array([f / SF, f / SF + 1e-9])).intensity[0])


# --- fast-exchange limit of an AB pair: the A2 spectrum ---------------------------------------

def test_averaged_ab_pair_is_a2_one_line_and_hides_its_coupling():
    # Pople, Schneider & Bernstein (1959): two equivalent coupled spins give one line at their shift,
    # whatever J.
    limit = fast_exchange_limit(ab_swap(j_hz=-14.0))
    (state,) = limit.model.states
    assert state.shifts_ppm == pytest.approx({"A": 3.125, "B": 3.125})
    (group,) = limit.groups
    assert group.magnetically_equivalent and group.by_exchange
    (hidden,) = limit.hidden_couplings
    assert hidden.spins == ("A", "B") and hidden.coupling_hz == pytest.approx(-14.0)
    hz = np.linspace(1220.0, 1280.0, 2001) + 0.01
    positions, intensities = a2_line(3.125 * SF)
    expected = lorentzian_lines(hz, positions, intensities, 1.0).real
    assert simulate(limit.model, hz / SF).intensity == pytest.approx(expected, rel=1e-9, abs=1e-12)


def test_engine_at_high_rates_converges_to_the_averaged_spectrum():
    # The McConnell fast limit: the excess width falls as 1/k, so the difference from the averaged
    # (A2) spectrum falls tenfold per decade of rate.
    hz = np.linspace(1220.0, 1280.0, 2001) + 0.01
    averaged = simulate(averaged_model(ab_swap()), hz / SF).intensity
    gaps = [np.abs(simulate(ab_swap(rate=k), hz / SF).intensity - averaged).max() / averaged.max()
            for k in (1e6, 1e7, 1e8)]
    assert gaps[2] < 1e-3
    assert gaps[1] / gaps[0] == pytest.approx(0.1, rel=0.05)
    assert gaps[2] / gaps[1] == pytest.approx(0.1, rel=0.05)


def test_averaged_two_site_line_sits_at_the_population_weighted_shift():
    # McConnell (1958), fast limit: one line at p_a nu_a + p_b nu_b.
    limit = fast_exchange_limit(two_sites(0.7, dnu=100.0))
    (state,) = limit.model.states
    assert state.shifts_ppm["H"] * SF == pytest.approx(0.7 * 1200.0 + 0.3 * 1300.0, rel=1e-12)
    peak, _ = fwhm(lambda f: mcconnell_two_site(np.array([f]), 1200.0, 1300.0, 1e7, 0.7, 1.0, 1.0).real[0],
                   1220.0, 1240.0)
    assert peak == pytest.approx(state.shifts_ppm["H"] * SF, abs=1e-3)


# --- equivalence -------------------------------------------------------------------------------

def aa_xx_model():
    """Invented A2X2-type fragment in two conformers that interconvert, relabelling A1/A2 and X1/X2."""
    shifts = {"A1": 3.0, "A2": 3.2, "X1": 1.0, "X2": 1.1}
    couplings = {"A1-A2": -12.0, "X1-X2": -13.0, "A1-X1": 7.0, "A2-X2": 7.0, "A1-X2": 2.0, "A2-X1": 2.0}
    return Model(Spectrometer(SF), (State("c", shifts, couplings, 1.0, 1.0),),
                 (Exchange("c", "c", {"A1": "A2", "A2": "A1", "X1": "X2", "X2": "X1"}, rate_per_s=1.0, name="flip"),))


def test_equal_shifts_with_unequal_couplings_are_only_chemically_equivalent():
    # Pople, Schneider & Bernstein (1959): A1 and A2 share their shift but couple differently to X1
    # (7 and 2 Hz), so they are chemically, not magnetically, equivalent (an AA'XX' system), and
    # their coupling J(A1,A2) still shapes the spectrum.
    limit = fast_exchange_limit(aa_xx_model())
    groups = {g.spins: g for g in limit.groups}
    assert set(groups) == {("A1", "A2"), ("X1", "X2")}
    assert not groups[("A1", "A2")].magnetically_equivalent
    assert groups[("A1", "A2")].magnetic_classes == (("A1",), ("A2",))
    assert limit.hidden_couplings == ()
    (state,) = limit.model.states
    changed = state.__class__(state.name, state.shifts_ppm, {**state.couplings_hz, "A1-A2": -3.0},
                              state.linewidth_hz, state.population)
    grid = np.linspace(0.5, 3.6, 8001)
    a = simulate(limit.model, grid).intensity
    b = simulate(limit.model.replace(states=(changed,)), grid).intensity
    assert np.abs(a - b).max() > 1e-3 * a.max()


def test_coupling_within_magnetically_equivalent_nuclei_does_not_show():
    # Pople, Schneider & Bernstein (1959): the coupling among magnetically equivalent nuclei leaves the
    # spectrum unchanged (here an A2X spectrum with J(A,A) from 0 to -14 Hz).
    model = Model(Spectrometer(SF), (State("s", {"A": 3.0, "B": 3.25, "X": 1.0}, {"A-B": -14.0, "A-X": 6.0,
                                                                                  "B-X": 2.0}, 1.0, 1.0),),
                  (Exchange("s", "s", {"A": "B", "B": "A"}, rate_per_s=1.0),))
    limit = fast_exchange_limit(model)
    (group,) = limit.groups
    assert group.spins == ("A", "B") and group.magnetically_equivalent
    assert [h.spins for h in limit.hidden_couplings] == [("A", "B")]
    (state,) = limit.model.states
    assert state.coupling("A", "X") == pytest.approx(4.0) and state.coupling("B", "X") == pytest.approx(4.0)
    without = state.__class__(state.name, state.shifts_ppm, {"A-X": 4.0, "B-X": 4.0}, 1.0, 1.0)
    grid = np.linspace(0.8, 3.3, 8001)
    assert simulate(limit.model, grid).intensity == pytest.approx(
        simulate(limit.model.replace(states=(without,)), grid).intensity, rel=1e-8, abs=1e-12)


def test_three_site_rotation_makes_three_equivalent_spins():
    # A threefold rotation averages three shifts to their mean (fast limit of the exchange).
    model = Model(Spectrometer(SF), (State("s", {"H1": 1.0, "H2": 1.2, "H3": 1.5}, {}, 1.0, 1.0),),
                  (Exchange("s", "s", {"H1": "H2", "H2": "H3", "H3": "H1"}, rate_per_s=1.0),))
    limit = fast_exchange_limit(model)
    (group,) = limit.groups
    assert group.spins == ("H1", "H2", "H3") and group.magnetically_equivalent
    assert group.shift_ppm == pytest.approx((1.0 + 1.2 + 1.5) / 3)


def test_coincident_shifts_are_not_equivalent_by_exchange():
    model = Model(Spectrometer(SF), (
        State("a", {"H": 3.0, "M": 1.5}, {}, 1.0, 0.5), State("b", {"H": 3.2, "M": 1.5}, {}, 1.0, 0.5)),
        (Exchange("a", "b", rate_per_s=1.0),))
    assert [p.second[1] for p in exchanging_pairs(model)] == ["H"]  # M does not move
    limit = fast_exchange_limit(model.replace(states=(
        State("a", {"H": 1.4, "M": 1.5}, {}, 1.0, 0.5), State("b", {"H": 1.6, "M": 1.5}, {}, 1.0, 0.5))))
    (group,) = limit.groups
    assert group.spins == ("H", "M") and not group.by_exchange


# --- regime boundaries -----------------------------------------------------------------------

def test_slow_threshold_is_the_slow_exchange_broadening():
    # McConnell (1958), slow limit: a line broadens by k_out / pi; at the threshold the faster-leaving
    # (minor) site broadens by the detectable fraction of its width; the engine agrees.
    model = two_sites(0.7, dnu=100.0, width=2.0)
    (pair,) = exchanging_pairs(model)
    span = rate_range(model, pair, 0.1)
    k_ba = span.slow_rate_per_s * 0.7 / 0.3
    assert slow_exchange_broadening(k_ba) == pytest.approx(0.1 * 2.0, rel=1e-12)
    _, width = fwhm(engine_absorption(model.with_rates([span.slow_rate_per_s])), 1280.0, 1320.0)
    assert width - 2.0 == pytest.approx(0.2, rel=0.02)


def test_fast_threshold_is_the_fast_exchange_excess_width():
    # McConnell (1958), fast limit: excess width p_a p_b (2 pi dnu)^2 / (pi (k_ab + k_ba)).
    model = two_sites(0.7, dnu=100.0, width=2.0)
    (pair,) = exchanging_pairs(model)
    span = rate_range(model, pair, 0.1)
    assert fast_exchange_excess_width(100.0, span.fast_rate_per_s, 0.7) == pytest.approx(0.2, rel=1e-12)
    _, width = fwhm(engine_absorption(model.with_rates([span.fast_rate_per_s])), 1220.0, 1240.0)
    assert width - 2.0 == pytest.approx(0.2, rel=0.02)
    assert span.regime(0.5 * span.slow_rate_per_s) == "slow"
    assert span.regime(2.0 * span.fast_rate_per_s) == "fast"
    assert span.regime(math.sqrt(span.slow_rate_per_s * span.fast_rate_per_s)) == "intermediate"


def test_regime_temperatures_follow_eyring():
    # Eyring equation, transmission 1, CODATA constants (scipy.constants).
    model = two_sites(0.5, dnu=100.0)
    (pair,) = exchanging_pairs(model)
    t_slow, t_fast = range_temperatures(model, pair, ActivationParameters.from_gibbs(60.0))
    span = rate_range(model, pair)
    for t, k in ((t_slow, span.slow_rate_per_s), (t_fast, span.fast_rate_per_s)):
        assert eyring_rate(t, 60.0) == pytest.approx(k, rel=1e-5)


def test_fast_threshold_rises_with_field():
    # The fast-exchange excess width grows with dnu^2, so fast exchange needs higher rates at higher field.
    view = timescale_view(two_sites(0.5), ActivationParameters.from_gibbs(60.0), frequencies_mhz=[300, 600])
    low, high = view.pairs
    assert high.rate_range.fast_rate_per_s == pytest.approx(4 * low.rate_range.fast_rate_per_s, rel=1e-9)
    assert high.fast_above_k > low.fast_above_k
    assert high.slow_below_k == pytest.approx(low.slow_below_k)


def test_view_at_a_high_temperature_averages_the_fast_process():
    view = timescale_view(ab_swap(), ActivationParameters.from_gibbs(50.0), temperature_k=420.0)
    (snap,) = view.snapshots
    assert snap.regimes == {"swap": "fast"}
    assert snap.averaged.averaged_processes == ("swap",)
    assert "does not show" in view.report()


def test_cli_timescale_json_and_figure(tmp_path):
    path = tmp_path / "model.toml"
    path.write_text("""
[spectrometer]
frequency_mhz = 400.0
[[state]]
name = "s"
population = 1
shifts_ppm = { A = 3.0, B = 3.25 }
couplings_hz = { "A-B" = -14.0 }
[[exchange]]
name = "swap"
from = "s"
to = "s"
spins = { A = "B", B = "A" }
rate_per_s = 5.0
""")
    figure = tmp_path / "bands.png"
    result = CliRunner().invoke(cli, ["timescale", str(path), "--barrier-kj-mol", "60", "--json",
                                      "--frequencies-mhz", "300,600", "--plot", str(figure)])
    assert result.exit_code == 0, result.output
    out = json.loads(result.stdout)
    assert [p["frequency_mhz"] for p in out["pairs"]] == [300.0, 600.0]
    assert out["fast_limit"]["hidden_couplings"][0]["spins"] == ["A", "B"]
    assert figure.stat().st_size > 0
    bad = CliRunner().invoke(cli, ["timescale", str(path), "--enthalpy-kj-mol", "60"])
    assert bad.exit_code == 2 and len(bad.stderr.strip().splitlines()) == 1


# --- heteronuclear partners and equivalent groups in the averaged system --------------------------

def hetero_hop(rate=10.0):
    """Invented proton hopping between two conformers with different couplings to a 19F and a 31P."""
    return Model(Spectrometer(SF), (State("a", {"H": 3.0}, {"H-F": 40.0, "H-P": 8.0}, 1.0, 0.6),
                                    State("b", {"H": 3.5}, {"H-F": 10.0, "H-P": 12.0}, 1.0, 0.4)),
                 (Exchange("a", "b", rate_per_s=rate, name="hop"),), heteronuclei={"F": "19F", "P": "31P"})


def test_averaged_model_keeps_and_averages_heteronuclear_couplings():
    # McConnell (1958) fast limit for each heteronuclear spin configuration (m is conserved across
    # nuclei in the weak-coupling limit): one line at the weighted shift, split by the weighted couplings;
    # a doublet of doublets of four equal lines (first-order multiplet, common practice).
    (state,) = averaged_model(hetero_hop()).states
    j_hf, j_hp = 0.6 * 40.0 + 0.4 * 10.0, 0.6 * 8.0 + 0.4 * 12.0
    assert state.coupling("H", "F") == pytest.approx(j_hf, rel=1e-12)
    assert state.coupling("H", "P") == pytest.approx(j_hp, rel=1e-12)
    hz = np.linspace(1230.0, 1330.0, 4001) + 0.01
    centre = 0.6 * 1200.0 + 0.4 * 1400.0
    positions = [centre + sf * j_hf / 2 + sp * j_hp / 2 for sf in (-1, 1) for sp in (-1, 1)]
    expected = lorentzian_lines(hz, positions, [0.25] * 4, 1.0).real
    averaged = simulate(averaged_model(hetero_hop()), hz / SF).intensity
    assert averaged == pytest.approx(expected, rel=1e-9, abs=1e-12)
    # the exact engine far into fast exchange (k = 1e8 s^-1) approaches it: excess width ~1e-3 Hz
    exact = simulate(hetero_hop(rate=1e8), hz / SF).intensity
    assert np.abs(exact - averaged).max() < 3e-3 * averaged.max()


def hetero_aa_xx(j_aa=-3.0, rate=1.0):
    """Invented A2X2 fragment, X = 19F: the exchange swaps A1/A2 and F1/F2 together."""
    couplings = {"A1-A2": j_aa, "A1-F1": 50.0, "A2-F2": 50.0, "A1-F2": 5.0, "A2-F1": 5.0}
    return Model(Spectrometer(SF), (State("c", {"A1": 3.0, "A2": 3.2}, couplings, 1.0, 1.0),),
                 (Exchange("c", "c", {"A1": "A2", "A2": "A1", "F1": "F2", "F2": "F1"}, rate_per_s=rate,
                           name="flip"),), heteronuclei={"F1": "19F", "F2": "19F"})


def test_couplings_to_heteronuclei_decide_magnetic_equivalence():
    # Pople, Schneider & Bernstein (1959): A1 and A2 share their averaged shift but couple differently to
    # F1 (50 and 5 Hz), so they are only chemically equivalent (AA'XX'), and J(A1,A2) still shows.
    limit = fast_exchange_limit(hetero_aa_xx())
    (group,) = limit.groups
    assert group.spins == ("A1", "A2") and group.nuclei == 2
    assert group.magnetic_classes == (("A1",), ("A2",))
    assert limit.hidden_couplings == ()
    (state,) = limit.model.states
    assert state.coupling("A1", "F1") == pytest.approx(50.0) and state.coupling("A1", "F2") == pytest.approx(5.0)
    grid = np.linspace(2.9, 3.3, 4001)
    averaged = simulate(limit.model, grid).intensity
    other = simulate(averaged_model(hetero_aa_xx(j_aa=-9.0)), grid).intensity
    assert np.abs(averaged - other).max() > 1e-2 * averaged.max()
    # the exact engine far into fast exchange agrees with the averaged system
    exact = simulate(hetero_aa_xx(rate=1e8), grid).intensity
    assert np.abs(exact - averaged).max() < 3e-3 * averaged.max()


def methyl_conformers(rate=10.0):
    """Invented CH3-CH fragment in two conformers (0.7 / 0.3) with different vicinal couplings."""
    return Model(Spectrometer(SF), (State("a", {"Me": 1.0, "H": 6.9}, {"Me-H": 7.0}, 1.0, 0.7),
                                    State("b", {"Me": 1.2, "H": 7.1}, {"Me-H": 5.0}, 1.0, 0.3)),
                 (Exchange("a", "b", rate_per_s=rate, name="turn"),), groups={"Me": 3})


def test_averaged_methyl_next_to_one_proton_is_a_quartet_and_a_doublet():
    # First-order multiplets (common practice): the proton a 1:3:3:1 quartet spaced by the averaged
    # J = 0.7 * 7 + 0.3 * 5 Hz, the methyl a 1:1 doublet of intensity 3, at the weighted shifts
    # (McConnell (1958) fast limit).  J / dnu = 0.003 here: second-order line shifts (J^2 / dnu ~ 0.02 Hz)
    # and the roof effect (~J / dnu in the intensities) bound the agreement.
    from dnmr.engine.blocks import lineshape_terms

    model = averaged_model(methyl_conformers())
    (state,) = model.states
    j = 0.7 * 7.0 + 0.3 * 5.0
    assert state.coupling("Me", "H") == pytest.approx(j, rel=1e-12)
    terms = lineshape_terms(model)
    freq, area = terms.line_frequencies_hz, terms.amplitudes.real / 2
    for centre, offsets, areas in ((0.7 * 6.9 + 0.3 * 7.1, [-1.5, -0.5, 0.5, 1.5], np.array([1, 3, 3, 1]) / 8),
                                   (0.7 * 1.0 + 0.3 * 1.2, [-0.5, 0.5], [1.5, 1.5])):
        expected = centre * SF + j * np.array(offsets)
        near = (area > 1e-6) & (np.abs(freq - centre * SF) < 3 * j)
        assert np.abs(freq[near][:, None] - expected[None, :]).min(axis=1).max() < 0.05
        bins = [area[near & (np.abs(freq - f) < 0.05)].sum() for f in expected]
        assert np.allclose(bins, areas, rtol=0.03)
    # and the exact engine far into fast exchange agrees
    grid = np.linspace(0.9, 7.2, 20001)
    averaged = simulate(model, grid).intensity
    exact = simulate(methyl_conformers(rate=1e9), grid).intensity
    assert np.abs(exact - averaged).max() < 3e-3 * averaged.max()


def test_methyl_groups_give_the_timescale_of_the_same_system_written_spin_by_spin():
    # Invented N,N-dimethyl fragment: MeE and MeZ trade places, MeE couples 1.2 Hz to a 19F.  Written
    # nucleus by nucleus (tests/test_groups.py) it is six protons; the pairs, their rate ranges and the
    # averaged system must agree (its six protons equivalent, counted as six nuclei either way).
    from test_groups import written_out_model

    state = State("s", {"MeE": 2.94, "MeZ": 3.05}, {"MeE-F": 1.2}, 0.8, 1.0)
    grouped = Model(Spectrometer(SF), (state,), (Exchange("s", "s", {"MeE": "MeZ", "MeZ": "MeE"}, rate_per_s=1.0),),
                    groups={"MeE": 3, "MeZ": 3}, heteronuclei={"F": "19F"})
    spins = written_out_model(grouped.replace(heteronuclei={}, states=(State("s", state.shifts_ppm, {}, 0.8, 1.0),)))
    member_couplings = {**spins.states[0].couplings_hz, **{f"MeE{i}-F": 1.2 for i in (1, 2, 3)}}
    spins = spins.replace(states=(State("s", spins.states[0].shifts_ppm, member_couplings, 0.8, 1.0),),
                          heteronuclei={"F": "19F"})
    (pair,) = exchanging_pairs(grouped)
    ranges = {(rate_range(spins, p).slow_rate_per_s, rate_range(spins, p).fast_rate_per_s)
               for p in exchanging_pairs(spins)}
    assert ranges == {(rate_range(grouped, pair).slow_rate_per_s, rate_range(grouped, pair).fast_rate_per_s)}
    limit, limit_spins = fast_exchange_limit(grouped), fast_exchange_limit(spins)
    (group,), (group_spins,) = limit.groups, limit_spins.groups
    assert group.nuclei == group_spins.nuclei == 6
    assert group.magnetically_equivalent and group_spins.magnetically_equivalent
    assert "(6 nuclei)" in limit.report()
    grid = np.linspace(2.9, 3.1, 2001)
    assert simulate(limit.model, grid).intensity == pytest.approx(simulate(limit_spins.model, grid).intensity,
                                                                  rel=1e-8, abs=1e-10)


def test_report_quotes_the_separation_as_a_magnitude():
    # A shift difference quoted to a chemist is the separation |Δν| in Hz (common practice); the JSON
    # keeps the signed value (arriving minus leaving) beside it.
    view = timescale_view(two_sites(0.5, dnu=-100.0), ActivationParameters.from_gibbs(60.0))
    (pair,) = view.pairs
    assert pair.shift_difference_hz == pytest.approx(-100.0) and pair.separation_hz == pytest.approx(100.0)
    row = next(line for line in view.report().splitlines() if pair.pair.label in line)
    assert " 100.00 " in row and "-100.00" not in row
    assert "|Δν|/Hz" in view.report()
    out = view.to_dict()["pairs"][0]
    assert out["separation_hz"] == pytest.approx(100.0) and out["shift_difference_hz"] == pytest.approx(-100.0)


# --- coupling-averaging exchange: equal shifts, changed couplings -----------------------------------

def fluorine_swap(rate=10.0, j1=50.0, j2=10.0, barrier=None):
    """Invented CHF2-type fragment: a rotation swaps F1 and F2, coupled j1 and j2 Hz to the proton; with a
    barrier (kJ/mol) the rate is Eyring's at 298.15 K."""
    kinetics = {"rate_per_s": rate} if barrier is None else {"barrier_kj_mol": barrier}
    return Model(Spectrometer(SF), (State("s", {"H": 3.0}, {"H-F1": j1, "H-F2": j2}, 1.0, 1.0),),
                 (Exchange("s", "s", {"F1": "F2", "F2": "F1"}, name="swap", **kinetics),),
                 heteronuclei={"F1": "19F", "F2": "19F"}, temperature_k=None if barrier is None else 298.15,
                 points=2048)


def test_swap_of_two_fluorines_is_a_pair_whose_regimes_use_the_coupling_difference():
    # First order (common practice): the proton doublet of doublets has components at +-(J1 + J2)/2, which
    # the swap leaves in place, and at +-(J1 - J2)/2, which it interconverts: two sites |dJ| = 40 Hz apart,
    # equal populations, so the McConnell (1958) slow and fast limits apply with dnu = |dJ|.  (Large J1, J2
    # keep the unmoved lines 110 Hz away, so that their tails do not widen the lines measured.)
    model = fluorine_swap(j1=150.0, j2=110.0)
    (pair,) = exchanging_pairs(model)
    assert pair.shift_difference_hz(model) == 0.0 and pair.component_shift_hz == pytest.approx(40.0)
    assert [c.difference_hz for c in pair.coupling_changes] == [-40.0, 40.0]
    span = rate_range(model, pair, 0.1)
    assert slow_exchange_broadening(span.slow_rate_per_s) == pytest.approx(0.1, rel=1e-12)
    assert fast_exchange_excess_width(40.0, span.fast_rate_per_s, 0.5) == pytest.approx(0.1, rel=1e-12)
    # the exact engine: an inner component broadened by 0.1 Hz at the slow threshold, the merged
    # central line 0.1 Hz wider than the intrinsic width at the fast one
    _, slow = fwhm(engine_absorption(model.with_rates([span.slow_rate_per_s])), 1215.0, 1225.0)
    _, fast = fwhm(engine_absorption(model.with_rates([span.fast_rate_per_s])), 1195.0, 1205.0)
    assert slow - 1.0 == pytest.approx(0.1, rel=0.02) and fast - 1.0 == pytest.approx(0.1, rel=0.02)


def test_timescale_view_reports_the_fluorine_swap_and_averages_it_to_a_triplet_when_fast():
    # Fast limit (McConnell 1958, per fluorine configuration): both couplings average to (J1 + J2)/2 = 30 Hz,
    # a 1:2:1 triplet (first-order multiplet, common practice), which the exact engine approaches at 1e8 s^-1.
    view = timescale_view(fluorine_swap(), ActivationParameters.from_gibbs(50.0), temperature_k=420.0)
    (row,) = view.pairs
    assert row.separation_hz == pytest.approx(40.0) and row.shift_difference_hz == 0.0
    out = view.to_dict()["pairs"][0]
    assert out["kind"] == "coupling" and out["separation_hz"] == pytest.approx(40.0)
    assert [c["partner"] for c in out["coupling_changes"]] == ["F1", "F2"]
    (snap,) = view.snapshots
    assert snap.regimes == {"swap": "fast"} and snap.averaged.averaged_processes == ("swap",)
    (state,) = snap.averaged.model.states
    assert state.coupling("H", "F1") == pytest.approx(30.0) and state.coupling("H", "F2") == pytest.approx(30.0)
    hz = np.linspace(1150.0, 1250.0, 4001) + 0.01
    averaged = simulate(snap.averaged.model, hz / SF).intensity
    expected = lorentzian_lines(hz, [1170.0, 1200.0, 1230.0], [0.25, 0.5, 0.25], 1.0).real
    assert averaged == pytest.approx(expected, rel=1e-9, abs=1e-12)
    exact = simulate(fluorine_swap(rate=1e8), hz / SF).intensity
    assert np.abs(exact - averaged).max() < 3e-3 * averaged.max()
    assert "H(s) (J to F1, F2)" in view.report()


def test_equal_shift_spins_that_trade_couplings_give_coupling_averaging_pairs():
    # A1 and A2 share a shift but couple 7 and 2 Hz to X; swapping them moves each A doublet component by
    # |dJ| / 2 = 2.5 Hz and the inner components of the X doublet of doublets by |dJ| = 5 Hz (first order,
    # common practice); fast exchange leaves X a 1:2:1 triplet of spacing 4.5 Hz.
    model = Model(Spectrometer(SF), (State("s", {"A1": 3.0, "A2": 3.0, "X": 1.0}, {"A1-X": 7.0, "A2-X": 2.0}, 1.0, 1.0),),
                  (Exchange("s", "s", {"A1": "A2", "A2": "A1"}, rate_per_s=1.0, name="swap"),))
    pairs = {p.first[1]: p for p in exchanging_pairs(model)}
    assert set(pairs) == {"A1", "X"}
    assert pairs["A1"].second == ("s", "A2") and pairs["A1"].component_shift_hz == pytest.approx(2.5)
    assert pairs["X"].component_shift_hz == pytest.approx(5.0)
    assert pairs["X"].exit_factors(model) == (1.0, 1.0)
    (state,) = averaged_model(model).states
    assert state.coupling("A1", "X") == pytest.approx(4.5) and state.coupling("A2", "X") == pytest.approx(4.5)
