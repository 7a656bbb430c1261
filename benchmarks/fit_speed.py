"""Fitting speed, measured in one run (not a test).

(a) single-spectrum fits: lineshape evaluations and wall time per fit (coarse scan, refinement and
    chi-square profile included) for a two-site spectrum near coalescence, a slow-limit spectrum that
    only bounds the rate (its profile runs out to the limit), and one spectrum of the bundled demo
    series (two rotamers of a coupled AB pair, 3276 points);
(b) the bundled demo series (every spectrum of it; shifts from the slow-exchange trend, populations free) fitted
    with one worker and with one per core: the parallel speed-up (goal >= 1.7 on 2 cores);
(c) the global fit of that series (ΔH‡, ΔS‡ and shifts linear in T, with the demo calibration) from (b)'s
    two-step result: residual and Jacobian evaluations, wall time with one worker and one per core, speed-up
    (the dense trust-region solve, an SVD of the 55 600 x 96 Jacobian per step, runs in this process).
BLAS runs on one thread during fits (dnmr.fitting.workers.single_threaded_blas, needs threadpoolctl); other load
on the machine lowers the parallel figure.

Run:  python benchmarks/fit_speed.py
"""
from __future__ import annotations

import os
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np

import dnmr
from dnmr.fitting.spectrumfit import fit_spectrum
from dnmr.io.readers import read_spectrum
from dnmr.io.measured import MeasuredSpectrum
from dnmr.fitting.globalfit import fit_global_from_two_step
from dnmr.fitting.globalproblem import Treatment
from dnmr.fitting.globalresult import TWO_STEP_FOLDER
from dnmr.fitting.series import fit_series
from dnmr.fitting.seriesfile import load_series
from dnmr.activation.temperature_calibration import read_temperature_calibration

DEMO = Path(dnmr.__file__).parent / "data" / "demo"


def two_site(rate_per_s: float) -> dnmr.Model:
    states = (dnmr.State("a", {"H": 2.9}, linewidth_hz=1.2, population=1), dnmr.State("b", {"H": 3.1}, linewidth_hz=1.2,
                                                                                   population=1))
    return dnmr.Model(dnmr.Spectrometer(400.0), states, (dnmr.Exchange("a", "b", rate_per_s=rate_per_s),))


def synthetic(rate_per_s: float, seed: int) -> MeasuredSpectrum:
    ppm = np.linspace(2.5, 3.5, 2000)
    clean = 50.0 * dnmr.simulate(two_site(rate_per_s), ppm).intensity
    return MeasuredSpectrum(ppm, clean + np.random.default_rng(seed).normal(0, 0.05, ppm.size), 400.0, "synthetic", "text")


def time_fit(label: str, spectrum, model, repeats: int = 3, **options) -> None:
    best, fit = np.inf, None
    for _ in range(repeats):
        t0 = time.perf_counter()
        fit = fit_spectrum(spectrum, model, **options)
        best = min(best, time.perf_counter() - t0)
    n = fit.function_evaluations
    print(f"  {label:<44} {fit.rate(0).status:<12} {n:5d} evaluations  {best:7.3f} s/fit  "
          f"{1e3 * best / n:6.2f} ms/evaluation")


def demo_series(folder: Path) -> Path:
    """The bundled demo series with the options it needs, pointing at the bundled files (read only)."""
    lines = [f'model = "{DEMO / "model.toml"}"', "[fit]", "region_ppm = [4.15, 4.95]",
             'shifts = "slow-exchange-trend"', 'populations = "free"']
    for spectrum in load_series(DEMO / "series.toml").spectra:
        lines += ["[[spectrum]]", f'file = "{spectrum.file}"', f"temperature_k = {spectrum.temperature_k}"]
    path = folder / "series.toml"
    path.write_text("\n".join(lines) + "\n")
    return path


def main() -> None:
    print("(a) single-spectrum fits (best of 3)")
    time_fit("two-site, k = 120 s^-1 (near coalescence)", synthetic(120.0, 1), two_site(1e4), region_ppm=(2.7, 3.3))
    time_fit("two-site, k = 0.01 s^-1 (slow limit: a bound)", synthetic(0.01, 2), two_site(1e4), region_ppm=(2.7, 3.3))
    model = dnmr.load_model(DEMO / "model.toml")
    spectrum = read_spectrum(DEMO / "spectra" / "dx7_310K.txt")
    time_fit("demo DX-7 at 310 K (2 rotamers, AB, 3276 pts)", spectrum, model, temperature_k=310.0,
             region_ppm=(4.15, 4.95), populations="free")

    cores = os.cpu_count() or 1
    folder = Path(tempfile.mkdtemp(prefix="dnmr-bench-"))
    try:
        series = demo_series(folder)
        print(f"(b) demo series, {len(load_series(series).spectra)} spectra, serial against {cores} workers")
        times = {}
        for workers in (1, cores):
            t0 = time.perf_counter()
            result = fit_series(series, folder / f"out{workers}" / TWO_STEP_FOLDER, workers=workers, progress=False)
            times[workers] = time.perf_counter() - t0
            fitted = sum(o.fitted for o in result.outcomes)
            print(f"  {workers} worker(s): {times[workers]:6.1f} s  ({fitted} of {len(result.outcomes)} fitted)")
        print(f"  speed-up {times[1] / times[cores]:.2f} (goal >= 1.7 on 2 cores)")
        print("(c) global fit of the demo series from (b), shifts linear in T, demo calibration")
        calibration = read_temperature_calibration(DEMO / "calibration.csv")
        loaded = load_series(series)
        for workers in (1, cores):
            t0 = time.perf_counter()
            fit = fit_global_from_two_step(loaded, result, folder / f"out{cores}", calibration,
                                           Treatment(shift_trend="linear", linewidth_trend="per-spectrum"), workers)
            times[workers] = time.perf_counter() - t0
            a = fit.activation[0]
            print(f"  {workers} worker(s): {times[workers]:6.1f} s  {fit.function_evaluations} residual and "
                  f"{fit.jacobian_evaluations} Jacobian evaluations, "
                  f"{sum(not p['fixed'] for p in fit.parameters.values())} free parameters; "
                  f"dH = {a.enthalpy_kj_mol:.3f} kJ/mol, dS = {a.entropy_j_mol_k:.3f} J/(mol K)")
        print(f"  speed-up {times[1] / times[cores]:.2f}")
    finally:
        shutil.rmtree(folder)


if __name__ == "__main__":
    main()
