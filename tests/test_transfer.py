"""Magnetisation transfer: the longitudinal engine against published solutions and an independent
integrator, and the fits of selective inversion, saturation transfer and 2D exchange data.

Synthetic data come from tests/reference_transfer.py (McConnell 1958 biexponential, Forsén & Hoffman
1963, scipy's solve_ivp) or scipy.linalg.expm of a rate matrix written out by hand, never from
dnmr.engine.longitudinal.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.linalg import expm

from dnmr.errors import InputError
from dnmr.engine.longitudinal import LongitudinalSystem, model_sites
from dnmr.model import Model
from dnmr.modelparts import Exchange, Spectrometer, State
from dnmr.fitting.matrixmethod import site_rates_from_volumes
from dnmr.fitting.transfer import fit_transfer
from dnmr.fitting.transferfile import Experiment, TransferData, TransferOptions
from reference_transfer import forsen_hoffman, integrate_sites, two_site_recovery

SPEC = Spectrometer(400.0)
DELAYS = np.array([0.002, 0.01, 0.03, 0.06, 0.1, 0.2, 0.35, 0.6, 1.0, 1.5, 2.2, 3.2, 5.0, 8.0])


def two_site(k=1.0, p_a=0.6, r1=(0.8, 1.5)) -> Model:
    """Two singlets of unequal population: a -> b at k, R1 per state."""
    return Model(SPEC, (State("a", {"H": 3.0}, population=p_a, r1_per_s=r1[0]),
                        State("b", {"H": 3.4}, population=1 - p_a, r1_per_s=r1[1])),
                 (Exchange("a", "b", rate_per_s=k, name="rotation"),), temperature_k=240.0)


# --- the engine against outside references ---------------------------------------------------------

def test_two_site_inversion_recovery_is_the_mcconnell_biexponential():
    # McConnell, J. Chem. Phys. 28, 430 (1958): biexponential recovery; unequal populations and R1
    system = LongitudinalSystem.from_model(two_site(k=2.3))
    start = system.inverted("a", efficiency=0.93)
    k_ab, k_ba = 2.3, 2.3 * 0.6 / 0.4
    expected = two_site_recovery(DELAYS, start, [0.6, 0.4], [0.8, 1.5], k_ab, k_ba)
    np.testing.assert_allclose(system.evolve(start, DELAYS), expected, rtol=1e-12, atol=1e-14)


def test_saturation_transfer_is_forsen_hoffman():
    # Forsén & Hoffman, J. Chem. Phys. 39, 2892 (1963): steady state R1a/(R1a + k_ab), approached at R1a + k_ab
    system = LongitudinalSystem.from_model(two_site(k=1.7))
    np.testing.assert_allclose(system.steady_state("b")[0], 0.6 * 0.8 / (0.8 + 1.7), rtol=1e-13)
    built = system.evolve(system.equilibrium, DELAYS, saturated="b")
    np.testing.assert_allclose(built[:, 0], forsen_hoffman(DELAYS, 0.6, 0.8, 1.7), rtol=1e-12)
    assert np.all(built[:, 1] == 0.0)


def non_mutual_model() -> Model:
    """States a, b, c (populations 0.5, 0.3, 0.2), spins Me (a group of 3) and Mf (a group of 3) and H:
    a -> b keeps the labels, b -> c swaps the methyls, and a mutual exchange in c swaps them too."""
    states = (State("a", {"Me": 1.0, "Mf": 1.1, "H": 5.0}, population=0.5, r1_per_s={"Me": 1.1, "Mf": 1.0, "H": 0.6}),
              State("b", {"Me": 1.2, "Mf": 1.3, "H": 5.3}, population=0.3, r1_per_s=0.9),
              State("c", {"Me": 1.4, "Mf": 1.5, "H": 5.6}, population=0.2, r1_per_s={"Me": 1.3, "Mf": 1.2, "H": 0.7}))
    exchanges = (Exchange("a", "b", rate_per_s=2.0, name="ab"),
                 Exchange("b", "c", spins={"Me": "Mf", "Mf": "Me"}, rate_per_s=0.7, name="bc"),
                 Exchange("c", "c", spins={"Me": "Mf", "Mf": "Me"}, rate_per_s=3.0, name="cc"))
    return Model(SPEC, states, exchanges, groups={"Me": 3, "Mf": 3})


def test_non_mutual_unequal_populations_against_solve_ivp():
    # independent numerical integration (scipy.integrate.solve_ivp) of the site equations written by hand
    model = non_mutual_model()
    system = LongitudinalSystem.from_model(model)
    assert system.labels == ["a:Me", "a:Mf", "a:H", "b:Me", "b:Mf", "b:H", "c:Me", "c:Mf", "c:H"]
    p = {"a": 0.5, "b": 0.3, "c": 0.2}
    m_eq = [p[s] * n for s in "abc" for n in (3, 3, 1)]
    np.testing.assert_allclose(system.equilibrium, m_eq, rtol=1e-14)
    k_ab, k_bc, k_cc = 2.0, 0.7, 3.0
    k_ba, k_cb = k_ab * 0.5 / 0.3, k_bc * 0.3 / 0.2  # detailed balance
    rates = {}
    for spin in range(3):  # a <-> b, labels kept
        rates[(spin, 3 + spin)] = k_ab
        rates[(3 + spin, spin)] = k_ba
    swap = {0: 1, 1: 0, 2: 2}  # b -> c swaps the methyls
    for spin in range(3):
        rates[(3 + spin, 6 + swap[spin])] = k_bc
        rates[(6 + swap[spin], 3 + spin)] = k_cb
    rates[(6, 7)] = rates[(7, 6)] = k_cc  # mutual exchange in c (H stays)
    r1 = [1.1, 1.0, 0.6, 0.9, 0.9, 0.9, 1.3, 1.2, 0.7]
    start = system.inverted(["a:Me", "c:Mf"], efficiency=0.9)
    np.testing.assert_allclose(system.relaxation, r1)
    expected = integrate_sites(DELAYS, start, m_eq, r1, rates)
    np.testing.assert_allclose(system.evolve(start, DELAYS), expected, rtol=1e-8, atol=1e-10)
    saturated = integrate_sites(DELAYS, m_eq, m_eq, r1, rates, saturated=(3,))
    np.testing.assert_allclose(system.evolve(system.equilibrium, DELAYS, saturated="b:Me"), saturated,
                               rtol=1e-8, atol=1e-10)


def test_general_route_without_detailed_balance_matches_expm():
    # a rate matrix that breaks detailed balance is propagated by expm at each time (scipy reference)
    system = LongitudinalSystem.from_model(two_site(k=1.0))
    K = np.array([[1.0, -0.2], [-1.0, 0.2]])  # k(a->b) = 1, k(b->a) = 0.2: K M_eq != 0 for M_eq = (0.6, 0.4)
    odd = LongitudinalSystem(system.sites, system.equilibrium, K, system.relaxation)
    start = np.array([-0.6, 0.4])
    L = np.diag(system.relaxation) + K
    expected = [system.equilibrium + expm(-L * t) @ (start - system.equilibrium) for t in DELAYS]
    np.testing.assert_allclose(odd.evolve(start, DELAYS), expected, rtol=1e-10, atol=1e-12)


def three_site_rate_matrix():
    """Three sites of M_eq 0.5, 0.3, 0.2 with all six rates (detailed balance) and R1, written by hand."""
    m_eq = np.array([0.5, 0.3, 0.2])
    k = {(0, 1): 1.2, (0, 2): 0.4, (1, 2): 2.5}
    for (i, j), v in list(k.items()):
        k[(j, i)] = v * m_eq[i] / m_eq[j]
    r1 = np.array([0.9, 1.4, 0.6])
    L = np.diag(r1)
    for (i, j), v in k.items():
        L[i, i] += v
        L[j, i] -= v
    return m_eq, k, r1, L


def test_matrix_method_recovers_a_three_site_rate_matrix_exactly():
    # noiseless EXSY volumes A = expm(-L tm) M0 (Jeener, Meier, Bachmann & Ernst 1979; scipy's expm);
    # L = -logm(A M0^-1)/tm recovers every rate (Perrin & Gipe, JACS 106, 4036 (1984); Perrin & Dwyer,
    # Chem. Rev. 90, 935 (1990))
    m_eq, k, r1, L = three_site_rate_matrix()
    for tm in (0.05, 0.3, 1.0):
        volumes = expm(-L * tm) @ np.diag(7.0 * m_eq)
        found = site_rates_from_volumes(volumes, 7.0 * m_eq, tm)
        np.testing.assert_allclose(found, L, rtol=1e-9, atol=1e-11)
        for (i, j), v in k.items():
            assert found[j, i] == pytest.approx(-v, rel=1e-9)
        np.testing.assert_allclose(found.sum(axis=0), r1, rtol=1e-9)


# --- fits ------------------------------------------------------------------------------------------

def inversion_data(k, seed, noise=0.4, r1=(0.8, 1.5), efficiency=0.95, scale=100.0):
    clean = scale * two_site_recovery(DELAYS, [0.6 * (1 - 2 * efficiency), 0.4], [0.6, 0.4], r1, k, k * 0.6 / 0.4)
    return clean + np.random.default_rng(seed).normal(size=clean.shape) * noise


def inversion_experiment(y, start_k=0.3, **options) -> Experiment:
    return Experiment(two_site(k=start_k), 240.0, "inversion", TransferData(DELAYS, ("a", "b"), y, None, "synthetic"),
                      TransferOptions(inverted=("a",), **options))


def test_selective_inversion_recovers_rate_r1_and_efficiency():
    fit = fit_transfer(inversion_experiment(inversion_data(2.0, seed=3)))
    rate = fit.rate("rotation")
    assert rate.status == "determined"
    assert abs(rate.rate_per_s - 2.0) < 3 * rate.rate_stderr and rate.rate_stderr < 0.1
    r1 = fit.relaxation()
    assert abs(r1["a"][0] - 0.8) < 4 * r1["a"][1] and abs(r1["b"][0] - 1.5) < 4 * r1["b"][1]
    eff = fit.parameters["inversion_efficiency"]
    assert abs(eff.estimate - 0.95) < 4 * eff.stderr
    assert abs(fit.parameters["m_eq_a"].estimate - 60.0) < 4 * fit.parameters["m_eq_a"].stderr


def test_rate_far_below_r1_is_an_upper_bound():
    # k = 1e-4 s^-1 against R1 near 1 s^-1: the transferred magnetisation (about k/R1 of the inversion)
    # is far below the noise; any smaller k fits as well, so only an upper bound is honest
    fit = fit_transfer(inversion_experiment(inversion_data(1e-4, seed=5), r1="shared"))
    rate = fit.rate(0)
    assert rate.status == "upper-bound", rate
    assert math.isnan(rate.rate_stderr) and "slow-exchange limit of magnetisation transfer" in rate.reason
    assert 1e-4 < rate.rate_upper < 0.1


def test_steady_state_saturation_with_known_r1_gives_k():
    # Forsén & Hoffman (1963): M_a,ss / M_a,eq = R1a/(R1a + k_ab); two points (reference, steady state)
    times = np.array([0.0, 0.0, 12.0, 12.0, 12.0])
    y = 80.0 * forsen_hoffman(times, 0.6, 0.8, 1.3)[:, None] + np.array([[0.1], [-0.2], [0.15], [0.0], [-0.1]])
    exp = Experiment(two_site(k=0.1), 240.0, "saturation", TransferData(times, ("a",), y, None, "synthetic"),
                     TransferOptions(saturated=("b",), r1="fixed"))
    rate = fit_transfer(exp).rate(0)
    assert rate.status == "determined" and abs(rate.rate_per_s - 1.3) < 3 * rate.rate_stderr


def test_steady_state_alone_refuses_free_r1():
    times = np.array([0.0, 12.0])
    with pytest.raises(InputError, match="R1/\\(R1 \\+ k\\)"):
        Experiment(two_site(), 240.0, "saturation", TransferData(times, ("a",), np.ones((2, 1)), None, "x"),
                   TransferOptions(saturated=("b",)))


def three_site_model() -> Model:
    """Three singlets (populations 0.5, 0.3, 0.2) joined by three processes; R1 in the model."""
    states = tuple(State(n, {"H": 1.0 + i}, population=p, r1_per_s=r) for i, (n, p, r) in
                   enumerate(zip("xyz", (0.5, 0.3, 0.2), (0.9, 1.4, 0.6))))
    exchanges = (Exchange("x", "y", rate_per_s=0.5, name="xy"), Exchange("x", "z", rate_per_s=0.5, name="xz"),
                 Exchange("y", "z", rate_per_s=0.5, name="yz"))
    return Model(SPEC, states, exchanges, temperature_k=240.0)


def test_exchange_2d_direct_fit_and_matrix_method_agree_with_the_truth():
    m_eq, k, r1, L = three_site_rate_matrix()
    mixing = np.array([0.1, 0.3, 0.6])
    sigma = 0.05
    rng = np.random.default_rng(11)
    volumes = np.array([expm(-L * t) @ np.diag(100.0 * m_eq) for t in mixing])
    noisy = volumes + rng.normal(size=volumes.shape) * sigma
    exp = Experiment(three_site_model(), 240.0, "exchange-2d", TransferData(mixing, ("x", "y", "z"), noisy, None, "syn"),
                     TransferOptions(volume_stderr=sigma, monte_carlo_draws=200))
    fit = fit_transfer(exp)
    truth = [k[(0, 1)], k[(0, 2)], k[(1, 2)]]
    combined = fit.matrix_method[-1]
    for r, t, km, sm in zip(fit.rates, truth, combined.process_rates, combined.process_stderr):
        assert r.status == "determined"
        assert abs(r.rate_per_s - t) < 4 * r.rate_stderr
        assert abs(km - t) < 4 * sm
    assert not [c for m in fit.matrix_method for c in m.checks if "beyond" in c or "detailed balance" in c]


def test_exchange_2d_checks_flag_cross_relaxation_of_opposite_sign():
    # a negative "rate" between two sites (L[0, 1] > 0, as small-molecule NOE gives) is reported with its meaning
    m_eq = np.array([0.5, 0.5])
    L = np.array([[1.0 + 0.0, 0.3], [0.3, 1.0]])
    mixing = np.array([0.2, 0.5])
    volumes = np.array([expm(-L * t) @ np.diag(100 * m_eq) for t in mixing])
    model = Model(SPEC, (State("s", {"Ha": 1.0, "Hb": 2.0}, population=1, r1_per_s=1.0),),
                  (Exchange("s", "s", spins={"Ha": "Hb", "Hb": "Ha"}, rate_per_s=0.1, name="flip"),))
    exp = Experiment(model, 240.0, "exchange-2d", TransferData(mixing, ("Ha", "Hb"), volumes, None, "syn"),
                     TransferOptions(volume_stderr=0.01, monte_carlo_draws=100))
    checks = [c for m in fit_transfer(exp).matrix_method for c in m.checks]
    assert any("negative" in c and "cross-relaxation" in c for c in checks)


def test_exchange_2d_checks_flag_broken_detailed_balance():
    # volumes from a rate matrix with k(a->b) M_eq,a != k(b->a) M_eq,b (scipy's expm): the check says so
    m_eq = np.array([0.6, 0.4])
    L = np.array([[0.8 + 1.0, -0.3], [-1.0, 1.5 + 0.3]])  # k(a->b) = 1.0, k(b->a) = 0.3: flows 0.6 and 0.12
    mixing = np.array([0.2, 0.5])
    volumes = np.array([expm(-L * t) @ np.diag(100 * m_eq) for t in mixing])
    exp = Experiment(two_site(k=1.0), 240.0, "exchange-2d", TransferData(mixing, ("a", "b"), volumes, None, "syn"),
                     TransferOptions(volume_stderr=0.01, monte_carlo_draws=100))
    fit = fit_transfer(exp)
    checks = [c for m in fit.matrix_method for c in m.checks]
    assert any("detailed balance fails between a and b" in c for c in checks), checks
    np.testing.assert_allclose(fit.matrix_method[0].rates_per_s[1, 0], 1.0, rtol=1e-3)  # k(a -> b) at [b, a]


def test_error_bars_cover_the_truth_over_noise_replicas():
    # coverage of the stated 68 % errors: 100 noise replicas of a saturation build-up (Forsén & Hoffman
    # 1963); a correct error covers the truth in 68 % of them (binomial 1.7 sigma band: 60 to 76 %)
    times = np.array([0.0, 0.05, 0.15, 0.3, 0.5, 0.8, 1.2, 2.0, 3.0, 5.0])
    clean = 50.0 * forsen_hoffman(times, 0.6, 0.8, 1.3)
    covered = 0
    for seed in range(100):
        y = (clean + np.random.default_rng(seed).normal(size=times.size) * 0.3)[:, None]
        exp = Experiment(two_site(k=1.0), 240.0, "saturation", TransferData(times, ("a",), y, None, "syn"),
                         TransferOptions(saturated=("b",), rate_limits_per_s=(1e-3, 1e3)))
        r = fit_transfer(exp).rate(0)
        lo, hi = r.rate_ci68
        covered += bool(lo <= 1.3 <= hi)
    assert 60 <= covered <= 76, covered


def test_sites_are_named_by_spin_state_or_both():
    assert [s.label for s in model_sites(two_site())] == ["a", "b"]
    one_state = Model(SPEC, (State("s", {"Ha": 1.0, "Hb": 2.0}, population=1),))
    assert [s.label for s in model_sites(one_state)] == ["Ha", "Hb"]


def test_missing_r1_is_one_clear_error():
    model = Model(SPEC, (State("a", {"H": 1.0}, population=1),))
    with pytest.raises(InputError, match="r1_per_s"):
        LongitudinalSystem.from_model(model)


# --- files and the command line --------------------------------------------------------------------

MODEL_TOML = """title = "invented two-site test model"
[spectrometer]
frequency_mhz = 400.0
[conditions]
temperature_k = 240.0
[[state]]
name = "syn"
population = 0.6
shifts_ppm = { H = 3.0 }
r1_per_s = 0.8
[[state]]
name = "anti"
population = 0.4
shifts_ppm = { H = 3.4 }
r1_per_s = { H = 1.5 }
[[exchange]]
name = "rotation"
from = "syn"
to = "anti"
rate_per_s = 0.5
"""


def write_inversion_files(folder, k=2.0, extra_options=""):
    (folder / "model.toml").write_text(MODEL_TOML)
    y = inversion_data(k, seed=2)
    lines = ["delay_s,syn,anti"] + [f"{float(t)!r},{float(a)!r},{float(b)!r}" for t, (a, b) in zip(DELAYS, y)]
    (folder / "si.csv").write_text("\n".join(lines) + "\n")
    (folder / "si.toml").write_text(f'model = "model.toml"\ntemperature_k = 240.0\nexperiment = "inversion"\n'
                                    f'data = "si.csv"\n[options]\ninverted = ["syn"]\n{extra_options}')
    return folder / "si.toml"


def test_model_file_reads_r1_per_state_and_per_spin(tmp_path):
    from dnmr import load_model

    (tmp_path / "m.toml").write_text(MODEL_TOML)
    model = load_model(tmp_path / "m.toml")
    assert LongitudinalSystem.from_model(model).relaxation.tolist() == [0.8, 1.5]
    (tmp_path / "bad.toml").write_text(MODEL_TOML.replace("r1_per_s = { H = 1.5 }", "r1_per_s = { Hx = 1.5 }"))
    with pytest.raises(InputError, match=r"bad.toml: state\[1\].r1_per_s: unknown spin \"Hx\""):
        load_model(tmp_path / "bad.toml")
    (tmp_path / "neg.toml").write_text(MODEL_TOML.replace("r1_per_s = 0.8", "r1_per_s = -0.8"))
    with pytest.raises(InputError, match=r"state\[0\].r1_per_s: must be greater than 0"):
        load_model(tmp_path / "neg.toml")


def test_command_writes_the_rates_table_that_eyring_reads(tmp_path):
    import csv

    from click.testing import CliRunner

    from dnmr.activation.rate_table import read_rates
    from dnmr.cli import cli
    from dnmr.fitting.seriesoutput import RATE_COLUMNS

    experiment = write_inversion_files(tmp_path)
    run = CliRunner().invoke(cli, ["transfer", str(experiment), "-o", str(tmp_path / "out")])
    assert run.exit_code == 0, run.output
    assert "rotation" in run.output and "k = " in run.output
    rows = list(csv.DictReader(open(tmp_path / "out" / "rates.csv")))
    assert list(rows[0])[:len(RATE_COLUMNS)] == list(RATE_COLUMNS) and rows[0]["method"] == "inversion"
    assert abs(float(rows[0]["rate_per_s"]) - 2.0) < 4 * float(rows[0]["rate_stderr"])
    assert (tmp_path / "out" / "results.json").is_file() and (tmp_path / "out" / "fit.png").stat().st_size > 0
    # a second temperature, and the two tables joined by the Eyring analysis
    experiment.write_text(experiment.read_text().replace("temperature_k = 240.0", "temperature_k = 250.0"))
    assert CliRunner().invoke(cli, ["transfer", str(experiment), "-o", str(tmp_path / "out250")]).exit_code == 0
    series = read_rates([tmp_path / "out" / "rates.csv", tmp_path / "out250" / "rates.csv"])
    assert series[0].process == "rotation" and series[0].temperature_k.tolist() == [240.0, 250.0]
    assert series[0].methods.tolist() == ["inversion", "inversion"]
    again = CliRunner().invoke(cli, ["transfer", str(experiment), "-o", str(tmp_path / "out")])
    assert again.exit_code == 2 and "--overwrite" in again.output
    assert CliRunner().invoke(cli, ["transfer", str(experiment), "-o", str(tmp_path / "out"),
                                    "--overwrite"]).exit_code == 0


@pytest.mark.parametrize("change, message", [
    ('inverted = ["syn"]', "si.toml: options.inverted"),  # replaced by an unknown site below
    ("", "si.toml: options.invertd: unknown key"),
])
def test_bad_experiment_file_is_one_line(tmp_path, change, message):
    from click.testing import CliRunner

    from dnmr.cli import cli

    experiment = write_inversion_files(tmp_path)
    text = experiment.read_text()
    text = text.replace('inverted = ["syn"]', 'inverted = ["sin"]' if change else 'invertd = ["syn"]')
    experiment.write_text(text)
    run = CliRunner().invoke(cli, ["transfer", str(experiment), "-o", str(tmp_path / "out")])
    assert run.exit_code == 2 and message in run.output and "Traceback" not in run.output
    assert len(run.output.strip().splitlines()) == 1


def test_bad_table_names_the_file_and_line(tmp_path):
    experiment = write_inversion_files(tmp_path)
    text = (tmp_path / "si.csv").read_text().splitlines()
    text[3] = text[3].replace(",", ",x", 1)
    (tmp_path / "si.csv").write_text("\n".join(text).replace("anti", "antti", 1) + "\n")
    from dnmr.fitting.transferfile import load_experiment

    with pytest.raises(InputError, match=r'si.csv: line 1: column "antti" is not a site \(did you mean "anti"\?\)'):
        load_experiment(experiment)


# --- both methods on one Eyring line ---------------------------------------------------------------

def test_lineshape_and_transfer_rates_fall_on_one_eyring_line():
    # one set of activation parameters (ΔH‡ 60 kJ/mol, ΔS‡ -12 J/(mol K); Eyring, J. Chem. Phys. 3, 107
    # (1935)); lineshapes at 290-310 K from the McConnell (1958) closed form fitted by dnmr.fit_spectrum,
    # selective inversion at 250-262 K from the McConnell biexponential fitted by dnmr.fit_transfer
    from closed_forms import mcconnell_two_site

    from dnmr.activation.eyring import eyring_fit
    from dnmr.fitting.spectrumfit import fit_spectrum
    from dnmr.kinetics import eyring_rate_from_enthalpy
    from dnmr.io.measured import MeasuredSpectrum

    true_k = lambda t: eyring_rate_from_enthalpy(60.0, -12.0, t)  # noqa: E731
    rng = np.random.default_rng(7)
    temps, rates, errors, methods = [], [], [], []
    ppm = np.linspace(2.7, 3.7, 1200)
    for t in (290.0, 300.0, 310.0):
        y = 40.0 * mcconnell_two_site(ppm * 400.0, 3.0 * 400.0, 3.1 * 400.0, true_k(t), 0.6, 1.0, 1.0).real
        y += rng.normal(0.0, 0.05, ppm.size)
        model = Model(SPEC, (State("a", {"H": 3.0}, population=0.6), State("b", {"H": 3.1}, population=0.4)),
                      (Exchange("a", "b", rate_per_s=1e3, name="rotation"),))
        fit = fit_spectrum(MeasuredSpectrum(ppm, y, 400.0, "synthetic.csv", "text"), model, region_ppm=(2.85, 3.25),
                           linewidth="fixed")  # the intrinsic width (1 Hz) known from the slow-exchange spectra
        r = fit.rate(0)
        assert r.status == "determined"
        temps.append(t), rates.append(r.rate_per_s), errors.append(r.rate_stderr), methods.append("lineshape")
    for t in (250.0, 256.0, 262.0):
        k = true_k(t)
        y = inversion_data(k, seed=int(t), noise=0.3)
        r = fit_transfer(inversion_experiment(y)).rate(0)
        assert r.status == "determined"
        temps.append(t), rates.append(r.rate_per_s), errors.append(r.rate_stderr), methods.append("inversion")
    line = eyring_fit(temps, rates, errors, method=methods)
    offset = line.method_offsets()["inversion"]  # the two methods agree within their errors
    assert abs(offset.value) < 3 * offset.stderr and offset.stderr < 0.2
    assert abs(line.enthalpy_kj_mol - 60.0) < 3 * line.enthalpy_stderr
    assert abs(line.entropy_j_mol_k + 12.0) < 3 * line.entropy_stderr
    assert np.all(np.abs(line.studentised_residuals) < 3.0), list(zip(methods, line.studentised_residuals))
    assert line.entropy_stderr < 3.0  # a span of 60 K from both methods pins ΔS‡ down
