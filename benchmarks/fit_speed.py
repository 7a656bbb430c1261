"""Fitting speed, measured in one run (not a test).

(a) single-spectrum fits: lineshape evaluations, exact Jacobians and CPU time per fit (coarse scan, refinement
    and chi-square profile included) for a two-site spectrum near coalescence, a slow-limit spectrum that
    only bounds the rate (its profile runs out to the limit), and demo spectra (two rotamers of a coupled AB
    pair, 3276 points; a rate with an error bar, a 68 % interval and a lower bound), by three routes in turn:
    the default (exact Jacobian, recent lineshapes re-used), finite differences (lineshapes re-used), and
    finite differences re-using nothing (the route before the exact Jacobian; goal: default <= 1/3 of it),
    with the largest difference of log10 k between the default and the route before, in standard errors;
(d) the posterior of demo spectra (default settings: importance sampling from the fit, 4000 draws): CPU
    and wall time per spectrum (goal <= 10 s), effective samples and the Pareto shape of the weights, against
    emcee's ensemble at its default 32 walkers x 4000 steps (timed over 200 steps and scaled);
(b) the bundled demo series (every spectrum of it; shifts from the slow-exchange trend, populations free) fitted
    with one worker and with one per core: the parallel speed-up (goal >= 1.7 on 2 cores);
(c) the global fit of that series (ΔH‡, ΔS‡ and shifts linear in T, with the demo calibration) from (b)'s
    two-step result: residual and Jacobian evaluations, wall time with one worker and one per core, speed-up
    (the dense trust-region solve, an SVD of the 55 600 x 96 Jacobian per step, runs in this process); then
    with one worker and forward differences for its Jacobian (the route before the exact derivatives).
BLAS runs on one thread during fits (dnmr.fitting.workers.single_threaded_blas, needs threadpoolctl); other load
on the machine lowers the parallel figure and raises every time (CPU times less so; the ratios are of one run).

Run:  python benchmarks/fit_speed.py            (everything)
      python benchmarks/fit_speed.py --single   ((a) and (d) only)
"""
from __future__ import annotations

import math
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

import dnmr
from dnmr.fitting import globalproblem, problem
from dnmr.fitting.spectrumfit import fit_spectrum
from dnmr.fitting.workers import single_threaded_blas
from dnmr.io.readers import read_spectrum
from dnmr.io.measured import MeasuredSpectrum
from dnmr.fitting.globalfit import fit_global_from_two_step
from dnmr.fitting.globaltreatment import Treatment
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


ROUTES = {"default": (True, 4), "finite differences": (False, 4), "before": (False, 0)}
"""Routes of (a): (use the exact Jacobian, lineshape decompositions kept)."""


def time_fit(label: str, spectrum, model, repeats: int = 3, **options) -> None:
    """Best CPU time of `repeats` fits by every route of ROUTES (taken in turn), evaluations and the ratio."""
    best, fits = {}, {}
    for _ in range(repeats):
        for route, (exact, kept) in ROUTES.items():
            problem.USE_EXACT_JACOBIAN, problem.TERMS_KEPT = exact, kept
            t0 = time.process_time()
            fits[route] = fit_spectrum(spectrum, model, **options)
            best[route] = min(best.get(route, np.inf), time.process_time() - t0)
    problem.USE_EXACT_JACOBIAN, problem.TERMS_KEPT = ROUTES["default"]
    text = "  ".join(f"{route}: {fits[route].function_evaluations:4d}+{fits[route].jacobian_evaluations:<3d} "
                     f"{best[route]:6.3f} s" for route in ROUTES)
    print(f"  {label:<40} {fits['default'].rate(0).status:<12} {text}  default/before {best['default'] / best['before']:.2f}"
          f" (goal <= 0.33); {difference(fits['default'].rate(0), fits['before'].rate(0))}")


def difference(a, b) -> str:
    """How far two fits' estimates of one rate lie apart: in standard errors, or the bounds' ratio."""
    if np.isfinite(a.log10_rate_stderr) and a.log10_rate_stderr > 0:
        return f"log10 k differs by {abs(a.log10_rate - b.log10_rate) / a.log10_rate_stderr:.1e} sd"
    ends = [(x.rate_lower, y.rate_lower) for x, y in [(a, b)] if np.isfinite(x.rate_lower)]
    ends += [(x.rate_upper, y.rate_upper) for x, y in [(a, b)] if np.isfinite(x.rate_upper)]
    return "bounds differ by " + ", ".join(f"{abs(x / y - 1):.1%}" for x, y in ends)


def single_fits() -> None:
    """(a): the single-spectrum fits."""
    print("(a) single-spectrum fits (best of 3, CPU time): evaluations+Jacobians and seconds per fit, by route")
    time_fit("two-site, k = 120 s^-1 (near coalescence)", synthetic(120.0, 1), two_site(1e4), region_ppm=(2.7, 3.3))
    time_fit("two-site, k = 0.01 s^-1 (slow limit: a bound)", synthetic(0.01, 2), two_site(1e4), region_ppm=(2.7, 3.3))
    model = dnmr.load_model(DEMO / "model.toml")
    for t in (310, 250, 340):
        time_fit(f"demo DX-7 at {t} K (2 rotamers, AB, 3276 pts)", read_spectrum(DEMO / "spectra" / f"dx7_{t}K.txt"),
                 model, temperature_k=float(t), region_ppm=(4.15, 4.95), populations="free")


def posteriors() -> None:
    """(d): posteriors of demo spectra, importance sampling against the ensemble."""
    from dnmr.fitting.posterior import sample_spectrum_posterior

    print("(d) posteriors of demo spectra: default (importance sampling, 4000 draws) against emcee's ensemble"
          " (32 walkers x 4000 steps, scaled from 200)")
    model = dnmr.load_model(DEMO / "model.toml")
    for t in (250, 290, 310, 340):
        fit = fit_spectrum(read_spectrum(DEMO / "spectra" / f"dx7_{t}K.txt"), model, temperature_k=float(t),
                           region_ppm=(4.15, 4.95), populations="free")
        wall, cpu = time.perf_counter(), time.process_time()
        post = sample_spectrum_posterior(fit)
        wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
        ensemble = time.process_time()
        sample_spectrum_posterior(fit, method="emcee", steps=200)
        ensemble = (time.process_time() - ensemble) * 4000 / 200
        info = post.importance or {"effective_samples": math.nan, "pareto_k": math.nan}
        print(f"  {t} K {fit.rate(0).status:<12} {post.method:<10} {cpu:5.1f} s CPU, {wall:5.1f} s wall (goal <= 10 s); "
              f"{info['effective_samples']:6.0f} effective samples, Pareto shape {info['pareto_k']:5.2f}; "
              f"ensemble about {ensemble:5.0f} s CPU")


def demo_series(folder: Path) -> Path:
    """The bundled demo series with the options it needs, pointing at the bundled files (read only)."""
    lines = [f'model = "{DEMO / "model.toml"}"', "[fit]", "region_ppm = [4.15, 4.95]",
             'shifts = "slow-exchange-trend"', 'populations = "free"']
    for spectrum in load_series(DEMO / "series.toml").spectra:
        lines += ["[[spectrum]]", f'file = "{spectrum.file}"', f"temperature_k = {spectrum.temperature_k}"]
    path = folder / "series.toml"
    path.write_text("\n".join(lines) + "\n")
    return path


def global_jacobians(series, two_step, outdir: Path, calibration, exact_fit, exact_s: float) -> None:
    """(c) again with one worker and forward differences for the Jacobian blocks (the route before the exact
    lineshape derivatives): time against `exact_s` (s), and how far apart the two fits' ΔH‡ and ΔS‡ are."""
    globalproblem.USE_EXACT_JACOBIAN = False
    try:
        t0 = time.perf_counter()
        fit = fit_global_from_two_step(series, two_step, outdir, calibration,
                                       Treatment(shift_trend="linear", linewidth_trend="per-spectrum"), 1)
        seconds = time.perf_counter() - t0
    finally:
        globalproblem.USE_EXACT_JACOBIAN = True
    a, b = exact_fit.activation[0], fit.activation[0]
    print(f"  forward differences, 1 worker: {seconds:6.1f} s  {fit.function_evaluations} residual and "
          f"{fit.jacobian_evaluations} Jacobian evaluations; exact derivatives {exact_s / seconds:.2f} of that time; "
          f"ΔH‡ apart by {abs(a.enthalpy_kj_mol - b.enthalpy_kj_mol) / a.enthalpy_stderr:.1e}, ΔS‡ by "
          f"{abs(a.entropy_j_mol_k - b.entropy_j_mol_k) / a.entropy_stderr:.1e} standard errors")


def main() -> None:
    with single_threaded_blas():
        single_fits()
        posteriors()
    if "--single" in sys.argv[1:]:
        return

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
        global_fits = {}
        for workers in (1, cores):
            t0 = time.perf_counter()
            fit = global_fits[workers] = fit_global_from_two_step(
                loaded, result, folder / f"out{cores}", calibration,
                Treatment(shift_trend="linear", linewidth_trend="per-spectrum"), workers)
            times[workers] = time.perf_counter() - t0
            a = fit.activation[0]
            print(f"  {workers} worker(s): {times[workers]:6.1f} s  {fit.function_evaluations} residual and "
                  f"{fit.jacobian_evaluations} Jacobian evaluations, "
                  f"{sum(not p['fixed'] for p in fit.parameters.values())} free parameters; "
                  f"dH = {a.enthalpy_kj_mol:.3f} kJ/mol, dS = {a.entropy_j_mol_k:.3f} J/(mol K)")
        print(f"  speed-up {times[1] / times[cores]:.2f}")
        global_jacobians(loaded, result, folder / f"out{cores}", calibration, global_fits[1], times[1])
    finally:
        shutil.rmtree(folder)


if __name__ == "__main__":
    main()
