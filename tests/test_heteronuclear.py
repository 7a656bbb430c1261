"""Heteronuclear coupling partners (weak coupling across nuclei) against independent references.

References: QuTiP with every heteronucleus an explicit spin in the product space and the secular
weak-coupling Hamiltonian J Iz Sz across nuclei (tests/reference_hetero.py), first-order multiplets of the
textbook and the trade, and the integral invariant of CONTRACT.md section 2.
"""
from __future__ import annotations

import textwrap

import numpy as np
import pytest
import reference_hetero
from closed_forms import lorentzian_lines
from model_errors import assert_one_line_error

import dnmr
from dnmr.engine.blocks import lineshape_terms

SF = 400.0  # MHz
HALF, ONE = 0.5, 1.0


def relative_error(a, b):
    return np.abs(a - b).max() / np.abs(b).max()


def reference_states(model: dnmr.Model) -> list[dict]:
    """The model's states in reference_hetero's dict form, spins in ``model.all_spins`` order."""
    names = model.all_spins
    return [{"shifts_hz": [s.shifts_ppm.get(n, 0.0) * SF for n in names],
             "couplings_hz": [[s.coupling(a, b) if a != b else 0.0 for b in names] for a in names],
             "linewidth_hz": s.linewidth_hz, "population": s.population} for s in model.states]


def reference_spins(model: dnmr.Model, spins: dict[str, float]) -> list[dict]:
    """Spin quantum numbers (from the trade's isotope tables, given here by the test) per spin."""
    return [{"spin": spins.get(n, HALF), "observed": n in model.spins} for n in model.all_spins]


def reference_jumps(model: dnmr.Model, populations: list[float]) -> list[dict]:
    """Every process written out (CONTRACT.md section 1): reverse by detailed balance, a mutual
    permutation with its inverse at the same rate."""
    names = model.all_spins
    jumps = []
    for ex in model.exchanges:
        a, b = model.state_index(ex.from_state), model.state_index(ex.to_state)
        perm = [names.index(ex.spins.get(n, n)) for n in names]
        inverse = [perm.index(i) for i in range(len(perm))]
        jumps.append({"source": a, "target": b, "permutation": perm, "rate": ex.rate_per_s})
        if a != b:
            jumps.append({"source": b, "target": a, "permutation": inverse,
                          "rate": ex.rate_per_s * populations[a] / populations[b]})
        elif inverse != perm:
            jumps.append({"source": a, "target": a, "permutation": inverse, "rate": ex.rate_per_s})
    return jumps


def qutip_reference(model: dnmr.Model, spins: dict[str, float], hz: np.ndarray) -> np.ndarray:
    pops = [s.population for s in model.states]
    return reference_hetero.spectrum(hz, reference_spins(model, spins), reference_states(model),
                                     reference_jumps(model, pops))


# --- first-order multiplets ---------------------------------------------------------------------

def one_proton(couplings: dict[str, float], heteronuclei: dict[str, str], groups=None) -> dnmr.Model:
    state = dnmr.State("s", {"H": 5.20}, couplings, linewidth_hz=0.6, population=1)
    return dnmr.Model(dnmr.Spectrometer(SF), [state], heteronuclei=heteronuclei, groups=groups or {})


@pytest.mark.parametrize("couplings, heteronuclei, groups, offsets, intensities", [
    # a proton on one 19F: doublet split by J_HF, equal halves (first-order multiplet, textbook)
    ({"H-F": 48.0}, {"F": "19F"}, None, [-24.0, 24.0], [1 / 2, 1 / 2]),
    # on one 2H (spin 1): 1:1:1 triplet spaced by J_HD (common practice)
    ({"H-D": 2.3}, {"D": "2H"}, None, [-2.3, 0.0, 2.3], [1 / 3, 1 / 3, 1 / 3]),
    # on a CF3 group: 1:3:3:1 quartet (binomial, common practice)
    ({"H-CF3": 9.0}, {"CF3": "19F"}, {"CF3": 3}, [-13.5, -4.5, 4.5, 13.5], [1 / 8, 3 / 8, 3 / 8, 1 / 8]),
    # on one 31P and one 19F: doublet of doublets, four equal lines (first-order, textbook)
    ({"H-P": 22.0, "H-F": 6.0}, {"P": "31P", "F": "19F"}, None, [-14.0, -8.0, 8.0, 14.0], [1 / 4] * 4),
])
def test_first_order_multiplets(couplings, heteronuclei, groups, offsets, intensities):
    model = one_proton(couplings, heteronuclei, groups)
    hz = np.linspace(5.05 * SF, 5.35 * SF, 3001)
    expected = lorentzian_lines(hz, 5.20 * SF + np.array(offsets), intensities, 0.6)
    assert relative_error(lineshape_terms(model).evaluate(hz), expected) < 1e-12


# --- against QuTiP -------------------------------------------------------------------------------

def rotamer_model(k: float) -> dnmr.Model:
    """An invented CH2 fragment next to a fluorine and a deuterium, in two rotamers; the rotation swaps
    the two (strongly coupled) protons."""
    a = dnmr.State("A", {"Ha": 3.10, "Hb": 3.18}, {"Ha-Hb": -12.0, "Ha-F": 48.0, "Hb-F": 12.0, "Ha-D": 2.0},
                   linewidth_hz=1.1, population=0.65)
    b = dnmr.State("B", {"Ha": 3.05, "Hb": 3.25}, {"Ha-Hb": -11.0, "Ha-F": 20.0, "Hb-F": 30.0, "Hb-D": 1.5},
                   linewidth_hz=0.8, population=0.35)
    rotation = dnmr.Exchange("A", "B", {"Ha": "Hb", "Hb": "Ha"}, rate_per_s=k)
    return dnmr.Model(dnmr.Spectrometer(SF), [a, b], [rotation], heteronuclei={"F": "19F", "D": "2H"})


def fluorine_swap_model(k: float) -> dnmr.Model:
    """An invented CHF-CHF fragment whose rotation carries each proton with its fluorine."""
    state = dnmr.State("s", {"Ha": 4.60, "Hb": 4.72},
                       {"Ha-Hb": 4.0, "Ha-F1": 46.0, "Hb-F2": 46.0, "Ha-F2": 18.0, "Hb-F1": 9.0, "F1-F2": 15.0},
                       linewidth_hz=1.0, population=1)
    swap = dnmr.Exchange("s", "s", {"Ha": "Hb", "Hb": "Ha", "F1": "F2", "F2": "F1"}, rate_per_s=k)
    return dnmr.Model(dnmr.Spectrometer(SF), [state], [swap], heteronuclei={"F1": "19F", "F2": "19F"})


def phosphorus_cycle_model(k: float) -> dnmr.Model:
    """A proton on an invented P3 cage whose three inequivalent phosphorus sites cycle; only the
    heteronuclei move, by a permutation that is not its own inverse."""
    state = dnmr.State("s", {"H": 2.0}, {"H-P1": 20.0, "H-P2": 5.0, "H-P3": -3.0}, linewidth_hz=0.9, population=1)
    cycle = dnmr.Exchange("s", "s", {"P1": "P2", "P2": "P3", "P3": "P1"}, rate_per_s=k)
    return dnmr.Model(dnmr.Spectrometer(SF), [state], [cycle], heteronuclei={"P1": "31P", "P2": "31P", "P3": "31P"})


def methyl_next_to_fluorine_model(k: float, written_out: bool) -> dnmr.Model:
    """An invented CH3-CF fragment in two conformers, the methyl as a group or as three spins."""
    names = ["M1", "M2", "M3"] if written_out else ["Me"]

    def state(name, me, ha, j_me_f, j_me_h, j_h_f, width, p):
        couplings = {f"{m}-F": j_me_f for m in names} | {f"{m}-Ha": j_me_h for m in names} | {"Ha-F": j_h_f}
        return dnmr.State(name, {m: me for m in names} | {"Ha": ha}, couplings, linewidth_hz=width, population=p)

    states = [state("gauche", 1.52, 1.60, 21.0, 6.9, 3.0, 0.9, 0.55), state("anti", 1.48, 1.66, 23.5, 6.2, 11.0, 1.2, 0.45)]
    return dnmr.Model(dnmr.Spectrometer(SF), states, [dnmr.Exchange("gauche", "anti", rate_per_s=k)],
                      groups={} if written_out else {"Me": 3}, heteronuclei={"F": "19F"})


def probe_hz(model: dnmr.Model, margin_hz: float, count: int) -> np.ndarray:
    shifts = model.shifts_hz()
    return np.linspace(shifts.min() - margin_hz, shifts.max() + margin_hz, count) + 0.123


@pytest.mark.parametrize("k", [0.5, 40.0, 900.0])
@pytest.mark.parametrize("build, spins", [
    (rotamer_model, {"F": HALF, "D": ONE}),   # 19F spin 1/2, 2H spin 1 (isotope tables, common practice)
    (fluorine_swap_model, {"F1": HALF, "F2": HALF}),
    (phosphorus_cycle_model, {"P1": HALF, "P2": HALF, "P3": HALF}),
], ids=["rotamers-F-D", "F-swap", "P-cycle"])
def test_heteronuclei_match_qutip(build, spins, k):
    """The partners as explicit spins in the product space (secular J Iz Sz across nuclei), exchange as
    Lindblad dissipators: QuTiP, independent of dnmr."""
    model = build(k)
    hz = probe_hz(model, 45.0, 90)
    assert relative_error(lineshape_terms(model).evaluate(hz), qutip_reference(model, spins, hz)) < 1e-8


def test_methyl_group_next_to_a_fluorine_matches_qutip():
    """A group and a heteronucleus together: the methyl as a group against QuTiP with all five nuclei
    explicit, and against the same model with the methyl written out spin by spin."""
    k = 35.0
    grouped, explicit = methyl_next_to_fluorine_model(k, False), methyl_next_to_fluorine_model(k, True)
    hz = probe_hz(grouped, 30.0, 60)
    got = lineshape_terms(grouped).evaluate(hz)
    assert relative_error(got, qutip_reference(explicit, {"F": HALF}, hz)) < 1e-8
    assert relative_error(got, lineshape_terms(explicit).evaluate(hz)) < 1e-8


@pytest.mark.parametrize("k", [0.0, 3.0, 1e3, 1e6])
def test_integral_counts_observed_spins_only(k):
    """Heteronuclei add no area: the absorption integrates to the number of observed spins
    (CONTRACT.md section 2), whatever the rate."""
    assert lineshape_terms(rotamer_model(k)).integral() == pytest.approx(2.0, rel=1e-12)
    assert lineshape_terms(methyl_next_to_fluorine_model(k, False)).integral() == pytest.approx(4.0, rel=1e-12)


# --- the model file ---------------------------------------------------------------------------------

SWAP = textwrap.dedent("""\
    [spectrometer]
    frequency_mhz = 400.0
    [heteronuclei]
    F1 = "19F"
    F2 = "19F"
    [[state]]
    name = "s"
    population = 1
    shifts_ppm = { Ha = 4.60, Hb = 4.72 }
    couplings_hz = { "Ha-Hb" = 4.0, "Ha-F1" = 46.0, "Hb-F2" = 46.0, "Ha-F2" = 18.0, "Hb-F1" = 9.0, "F1-F2" = 15.0 }
    [[exchange]]
    from = "s"
    to = "s"
    spins = { Ha = "Hb", Hb = "Ha", F1 = "F2", F2 = "F1" }
    rate_per_s = 40.0
    """)


def test_heteronuclei_table_loads(tmp_path):
    path = tmp_path / "swap.toml"
    path.write_text(SWAP)
    model = dnmr.load_model(path)
    assert model.heteronuclei == {"F1": "19F", "F2": "19F"} and model.spins == ["Ha", "Hb"]
    hz = probe_hz(model, 45.0, 200)
    assert relative_error(lineshape_terms(model).evaluate(hz), lineshape_terms(fluorine_swap_model(40.0)).evaluate(hz)) < 1e-14
    spectrum = dnmr.simulate(model)  # the default window holds the fluorine-split lines
    assert spectrum.hz.min() < 4.60 * SF - 32.0 and spectrum.hz.max() > 4.72 * SF + 32.0


@pytest.mark.parametrize("old, new, key", [
    ("shifts_ppm = { Ha = 4.60", "shifts_ppm = { F1 = 1.0, Ha = 4.60", "state[0].shifts_ppm.F1"),  # partner with a shift
    ('F2 = "19F"', 'F2 = "19Q"', "heteronuclei.F2"),                                 # unknown nucleus
    ('F2 = "19F"', 'F2 = "1H"', "heteronuclei.F2"),                                  # the observed isotope
    ('F2 = "19F"', "F2 = 19", "heteronuclei.F2"),
    ('F2 = "19F"', 'F2 = "31P"', "exchange[0].spins.F1"),                            # 19F onto 31P
    ('spins = { Ha = "Hb", Hb = "Ha", F1 = "F2", F2 = "F1" }', 'spins = { Ha = "F1", F1 = "Ha" }',
     "exchange[0].spins.Ha"),                                                          # observed onto partner
    ('"Ha-Hb" = 4.0', '"Ha-Fx" = 4.0', "state[0].couplings_hz"),                     # unknown spin
])
def test_bad_heteronuclei_are_one_clear_line(tmp_path, old, new, key):
    assert old in SWAP
    assert_one_line_error(tmp_path, SWAP.replace(old, new, 1), key)
