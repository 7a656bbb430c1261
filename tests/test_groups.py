"""Magnetically equivalent groups (total-spin factorisation) against independent references.

References: the same systems written out spin by spin (the plain spins-1/2 engine, itself checked against
QuTiP in test_engine.py), QuTiP with every member an explicit spin (tests/reference_qutip.py), the
Clebsch-Gordan series, first-order multiplets and the integral invariant of CONTRACT.md section 2.
"""
from __future__ import annotations

import textwrap
from itertools import combinations

import numpy as np
import pytest
from closed_forms import ab_quartet, lorentzian_lines
from model_errors import assert_one_line_error
from reference_qutip import jumps_with_reverse, qutip_spectrum

import dnmr
from dnmr.engine.blocks import lineshape_terms
from dnmr.engine.spinsystems import group_sectors, spin_systems

SF = 400.0  # MHz


def relative_error(a, b):
    return np.abs(a - b).max() / np.abs(b).max()


def members(group: str, count: int) -> list[str]:
    return [f"{group}{i}" for i in range(1, count + 1)]


def written_out(state: dnmr.State, groups: dict[str, int], inner_hz: float = -12.4) -> dnmr.State:
    """`state` with every group written out member by member; `inner_hz` couples members of one group
    (it must not matter) and every coupling to a group becomes the same coupling to each member."""
    expand = {name: members(name, groups[name]) if name in groups else [name] for name in state.spins}
    shifts = {m: state.shifts_ppm[name] for name in state.spins for m in expand[name]}
    couplings = {f"{x}-{y}": inner_hz for name in groups for x, y in combinations(expand[name], 2)}
    for a, b in combinations(state.spins, 2):
        for x in expand[a]:
            for y in expand[b]:
                couplings[f"{x}-{y}"] = state.coupling(a, b)
    return dnmr.State(state.name, shifts, couplings, linewidth_hz=state.linewidth_hz, population=state.population)


def member_mapping(mapping: dict[str, str], groups: dict[str, int], crossed: bool = False) -> dict[str, str]:
    """A group -> group mapping written member by member (in reverse member order when `crossed`)."""
    out = {}
    for src, dst in mapping.items():
        if src in groups:
            targets = members(dst, groups[dst])
            out.update(zip(members(src, groups[src]), targets[::-1] if crossed else targets))
        else:
            out[src] = dst
    return out


def written_out_model(model: dnmr.Model, crossed: bool = False) -> dnmr.Model:
    """The grouped `model` with every nucleus an explicit spin-1/2."""
    states = [written_out(s, model.groups) for s in model.states]
    exchanges = [dnmr.Exchange(ex.from_state, ex.to_state, member_mapping(ex.spins, model.groups, crossed),
                               rate_per_s=ex.rate_per_s) for ex in model.exchanges]
    return dnmr.Model(model.spectrometer, states, exchanges)


# --- the Clebsch-Gordan series -----------------------------------------------------------------------

def test_sector_multiplicities_follow_the_clebsch_gordan_series():
    """Three spins-1/2 give S = 3/2 once and S = 1/2 twice; four give S = 2, 1, 0 with 1, 3, 2 copies
    (addition of angular momenta, textbook result, from memory).  The shares are f(n,S)(2S+1)/2^n and
    sum to 1 because the sectors fill the 2^n states."""
    three, four = group_sectors(0, 3), group_sectors(0, 4)
    assert three.values == (1.5, 0.5)
    assert np.allclose(np.array(three.weights) * 8 / (2 * np.array(three.values) + 1), [1, 2])
    assert four.values == (2.0, 1.0, 0.0)
    assert np.allclose(np.array(four.weights) * 16 / (2 * np.array(four.values) + 1), [1, 3, 2])
    for n in range(1, 10):
        assert sum(group_sectors(0, n).weights) == pytest.approx(1.0, abs=1e-15)


# --- a methyl group and one more proton -------------------------------------------------------------

def methyl_model(k: float, close: bool = True) -> dnmr.Model:
    """An invented CH3-CH fragment in two conformers; `close` puts the shifts within a few J (strong
    coupling).  The methyl moves as a whole: the site exchange keeps every name."""
    d = 0.06 if close else 2.0
    a = dnmr.State("gauche", {"Me": 2.10, "Ha": 2.10 + d}, {"Me-Ha": 7.1}, linewidth_hz=0.9, population=0.6)
    b = dnmr.State("anti", {"Me": 2.04, "Ha": 2.13 + d}, {"Me-Ha": 5.3}, linewidth_hz=1.3, population=0.4)
    return dnmr.Model(dnmr.Spectrometer(SF), [a, b], [dnmr.Exchange("gauche", "anti", rate_per_s=k)],
                      groups={"Me": 3})


def probe_hz(model: dnmr.Model, count: int = 400) -> np.ndarray:
    shifts = model.shifts_hz()
    return np.linspace(shifts.min() - 40.0, shifts.max() + 40.0, count) + 0.123


@pytest.mark.parametrize("k", [0.0, 2.0, 45.0, 3000.0])
def test_methyl_group_matches_the_spins_written_out(k):
    """CH3 + one proton, strongly coupled, with and without exchange: the same system as four explicit
    spins-1/2 (couplings inside the methyl have no effect)."""
    model = methyl_model(k)
    hz = probe_hz(model)
    grouped = lineshape_terms(model).evaluate(hz)
    explicit = lineshape_terms(written_out_model(model)).evaluate(hz)
    assert relative_error(grouped, explicit) < 1e-8


@pytest.mark.parametrize("k", [0.7, 60.0])
def test_methyl_group_matches_qutip(k):
    """The same CH3 + proton model against QuTiP with all four nuclei explicit spins (Lindblad exchange)."""
    model = methyl_model(k)
    explicit = written_out_model(model)
    names = explicit.spins
    states = [{"shifts_hz": [s.shifts_ppm[n] * SF for n in names],
               "couplings_hz": np.array([[s.coupling(a, b) if a != b else 0.0 for b in names] for a in names]),
               "linewidth_hz": s.linewidth_hz, "population": s.population} for s in explicit.states]
    exchanges = [{"source": 0, "target": 1, "permutation": list(range(len(names))), "rate": k}]
    hz = probe_hz(model, 160)
    ref = qutip_spectrum(hz, states, jumps_with_reverse(states, exchanges))
    assert relative_error(lineshape_terms(model).evaluate(hz), ref) < 1e-8


def test_methyl_quartet_in_the_first_order_limit():
    """A proton next to a methyl group, far apart in shift: a 1:3:3:1 quartet spaced by J, the methyl a
    doublet of intensity 3 (first-order multiplets, common practice).  At J / dnu = 0.009 the second-order
    corrections (line shifts of order J^2 / dnu = 0.06 Hz, the roof effect of order J / dnu in the
    intensities) bound the agreement."""
    J = 7.1
    gauche = methyl_model(0.0, close=False).states[0]
    model = dnmr.Model(dnmr.Spectrometer(SF), [gauche], groups={"Me": 3})
    terms = lineshape_terms(model)
    freq, area = terms.line_frequencies_hz, terms.amplitudes.real / 2
    visible = area > 1e-6
    proton = visible & (np.abs(freq - 4.10 * SF) < 3 * J)
    expected = 4.10 * SF + J * np.array([-1.5, -0.5, 0.5, 1.5])
    nearest = np.abs(freq[proton][:, None] - expected[None, :]).min(axis=1)
    assert nearest.max() < 0.15
    bins = [area[proton & (np.abs(freq - f) < 0.15)].sum() for f in expected]
    assert np.allclose(bins, np.array([1, 3, 3, 1]) / 8, atol=5e-3)
    assert area[proton].sum() == pytest.approx(1.0, abs=1e-6)
    methyl = visible & (np.abs(freq - 2.10 * SF) < 3 * J)
    assert np.abs(freq[methyl][:, None] - (2.10 * SF + J * np.array([-0.5, 0.5]))).min(axis=1).max() < 0.15
    assert area[methyl].sum() == pytest.approx(3.0, abs=1e-6)


# --- two groups swapped by exchange -----------------------------------------------------------------

def swapping_pairs_model(k: float) -> dnmr.Model:
    """An invented A2B2X system: two equivalent pairs (CH2-like groups P and Q) swapped by a mutual
    exchange, both coupled to X and to each other."""
    state = dnmr.State("s", {"P": 3.20, "Q": 3.28, "X": 3.12}, {"P-X": 6.5, "Q-X": 1.2, "P-Q": 2.4},
                       linewidth_hz=1.0, population=1)
    swap = dnmr.Exchange("s", "s", {"P": "Q", "Q": "P"}, rate_per_s=k)
    return dnmr.Model(dnmr.Spectrometer(SF), [state], [swap], groups={"P": 2, "Q": 2})


@pytest.mark.parametrize("k", [0.0, 25.0, 900.0])
@pytest.mark.parametrize("crossed", [False, True])
def test_swapped_groups_match_the_spins_written_out(k, crossed):
    """Two pairs exchanging as wholes, strongly coupled to a fifth spin: the same as five explicit
    spins, whichever member of one pair the exchange puts in the place of which member of the other."""
    model = swapping_pairs_model(k)
    hz = probe_hz(model)
    grouped = lineshape_terms(model).evaluate(hz)
    explicit = lineshape_terms(written_out_model(model, crossed)).evaluate(hz)
    assert relative_error(grouped, explicit) < 1e-8


# --- an uncoupled group is one line ----------------------------------------------------------------

def test_uncoupled_tert_butyl_is_one_line_and_cheap():
    """Nine equivalent protons coupled to nothing give one line of area 9 at their shift (common
    practice), beside the AB quartet of the other two protons (Pople, Schneider & Bernstein, 1959); the
    factorisation never builds the 2^9 product space (its largest particle is S = 9/2)."""
    tbu = dnmr.State("s", {"tBu": 1.27, "Ha": 7.10, "Hb": 7.32}, {"Ha-Hb": 8.4}, linewidth_hz=0.7, population=1)
    model = dnmr.Model(dnmr.Spectrometer(SF), [tbu], groups={"tBu": 9})
    hz = np.linspace(1.2 * SF, 7.4 * SF, 4001)
    positions, intensities = ab_quartet(7.10 * SF, 7.32 * SF, 8.4)
    expected = lorentzian_lines(hz, [1.27 * SF, *positions], [9.0, *intensities], 0.7)
    assert relative_error(lineshape_terms(model).evaluate(hz), expected) < 1e-12
    assert max(system.blocks[0].dimension for system in spin_systems(model)) == 10


@pytest.mark.parametrize("model", [methyl_model(13.0), swapping_pairs_model(140.0)], ids=["methyl", "pairs"])
def test_integral_counts_every_member(model):
    """The absorption integrates to sum of population x observed nuclei, each group member counted
    (CONTRACT.md section 2)."""
    assert lineshape_terms(model).integral() == pytest.approx(model.observed_nuclei, rel=1e-12)
    assert model.observed_nuclei == len(written_out_model(model).spins)


# --- the model file ---------------------------------------------------------------------------------

GROUPED = textwrap.dedent("""\
    [spectrometer]
    frequency_mhz = 400.0
    [groups]
    P = 2
    Q = 2
    [[state]]
    name = "s"
    population = 1
    shifts_ppm = { P = 3.20, Q = 3.28, X = 3.12 }
    couplings_hz = { "P-X" = 6.5, "Q-X" = 1.2, "P-Q" = 2.4 }
    [[exchange]]
    from = "s"
    to = "s"
    spins = { P = "Q", Q = "P" }
    rate_per_s = 25.0
    """)


def test_groups_table_loads(tmp_path):
    path = tmp_path / "pairs.toml"
    path.write_text(GROUPED)
    model = dnmr.load_model(path)
    assert model.groups == {"P": 2, "Q": 2} and model.observed_nuclei == 5
    hz = probe_hz(model)
    assert relative_error(lineshape_terms(model).evaluate(hz), lineshape_terms(swapping_pairs_model(25.0)).evaluate(hz)) < 1e-14


@pytest.mark.parametrize("old, new, key", [
    ("Q = 2\n", "Q = 3\n", "exchange[0].spins.P"),                       # group size mismatch in a mapping
    ('spins = { P = "Q", Q = "P" }', 'spins = { P = "X", X = "P" }', "exchange[0].spins.P"),  # group onto a spin
    ("Q = 2\n", "Q = 2\nR = 3\n", "groups.R"),                           # a group that names no spin
    ("P = 2\n", "P = 0\n", "groups.P"),
    ("P = 2\n", "P = 2.5\n", "groups.P"),
    ("P = 2\n", 'P = "two"\n', "groups.P"),
    ("[groups]\nP = 2\nQ = 2\n", "groups = 2\n", "groups"),
])
def test_bad_groups_are_one_clear_line(tmp_path, old, new, key):
    assert old in GROUPED
    assert_one_line_error(tmp_path, GROUPED.replace(old, new, 1), key)
