"""Are dnmr's stated errors honest with default options?  Measured over noise replicas (not a test).

For each scenario of ``tests/realistic_series.py`` (series made by independent references — McConnell's
closed form, QuTiP — with first-guess shifts and couplings a few Hz off, drifting shifts and referencing,
phase errors, sloping baselines and an intrinsic width that changes with T), every replica is a fresh
noise draw written to disk and fitted exactly as a chemist runs dnmr: ``dnmr fit`` with no options, then
``dnmr eyring`` on its rates.csv (and, with ``--global``, ``dnmr fit --global`` with no options).

Printed per scenario:

* rates: the share of 68 % intervals that hold the true rate (goal 60-76 %), the share of bounds that
  hold it, and how many spectra gave a value rather than a bound;
* ΔH‡ and ΔS‡: the share of replicas within 2 standard errors of the truth (goal >= 90 %), and the
  mean and spread of (estimate - truth) / standard error (goal: mean near 0, spread near 1).

The rates of one replica are not independent draws: the faster spectra share the error of the trends
held from the same slow-exchange spectra, so a share over 200 rates of 20 replicas is far less certain
than 200 coin tosses.  The interval coverage and the spreads therefore come with a 95 % range from a
bootstrap over whole replicas (resampled with replacement; common practice for clustered data): a goal
missed inside that range is not evidence of a mistake; more replicas narrow it.

Run:  python benchmarks/error_coverage.py [--replicas 20] [--scenario mutual-pair,two-state,ab-pair] [--global]
"""
from __future__ import annotations

import argparse
import math
import sys
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

import dnmr  # noqa: E402
from realistic_series import SCENARIOS, SeriesTruth, write_series  # noqa: E402


@dataclass
class Tally:
    """Counts over replicas of one scenario and one route."""

    interval_hits: int = 0
    intervals: int = 0
    bound_hits: int = 0
    bounds: int = 0
    failed: int = 0
    replica_hits: list = field(default_factory=list)       # per replica: (hits, intervals)
    enthalpy_z: list = field(default_factory=list)
    entropy_z: list = field(default_factory=list)

    def add_rates(self, rows: list[dict], truth: SeriesTruth) -> None:
        true_rate = dict(zip(truth.temperatures_k, truth.rates_per_s))
        hits, intervals = self.interval_hits, self.intervals
        for row in rows:
            k = true_rate[min(true_rate, key=lambda t: abs(t - float(row["temperature_k"])))]
            if row.get("rate_stderr") not in ("", None):
                lo = _number(row.get("rate_ci68_lower"), _number(row["rate_per_s"]) - _number(row["rate_stderr"]))
                hi = _number(row.get("rate_ci68_upper"), _number(row["rate_per_s"]) + _number(row["rate_stderr"]))
                self.intervals += 1
                self.interval_hits += lo <= k <= hi
            elif row.get("rate_lower") not in ("", None) or row.get("rate_upper") not in ("", None):
                lo, hi = _number(row.get("rate_lower"), 0.0), _number(row.get("rate_upper"), math.inf)
                self.bounds += 1
                self.bound_hits += lo <= k <= hi
            else:
                self.failed += 1
        self.replica_hits.append((self.interval_hits - hits, self.intervals - intervals))

    def add_activation(self, enthalpy, enthalpy_se, entropy, entropy_se, truth: SeriesTruth) -> None:
        self.enthalpy_z.append((enthalpy - truth.enthalpy_kj_mol) / enthalpy_se)
        self.entropy_z.append((entropy - truth.entropy_j_mol_k) / entropy_se)

    def lines(self) -> list[str]:
        out = []
        if self.intervals or self.bounds:
            per = np.asarray(self.replica_hits, float).reshape(-1, 2)
            low, high = _bootstrap(per, lambda d: 100.0 * d[:, 0].sum() / max(d[:, 1].sum(), 1.0))
            out.append(f"    rates: 68 % intervals hold the truth {_share(self.interval_hits, self.intervals)} "
                       f"(95 % over replicas {low:.0f}-{high:.0f} %; goal 60-76 %); "
                       f"bounds hold it {_share(self.bound_hits, self.bounds)}; no rate: {self.failed}")
        for label, z in (("ΔH‡", self.enthalpy_z), ("ΔS‡", self.entropy_z)):
            if z:
                z = np.asarray(z)
                out.append(f"    {label}: within 2 SE {_share(int(np.sum(np.abs(z) <= 2)), len(z))} (goal >= 90 %); "
                           f"(estimate - truth)/SE mean {np.mean(z):+.2f}, spread {np.std(z):.2f} "
                           "(95 % over replicas {:.2f}-{:.2f}), ".format(*_bootstrap(z, np.std))
                           + f"worst {z[np.argmax(np.abs(z))]:+.1f}")
        return out


def _bootstrap(per_replica: np.ndarray, statistic, draws: int = 2000) -> tuple[float, float]:
    """2.5 and 97.5 percentiles of `statistic` over `draws` resamplings (with replacement) of the replicas
    (the first axis of `per_replica`)."""
    if len(per_replica) < 2:
        return math.nan, math.nan
    rng = np.random.default_rng(0)
    values = [statistic(per_replica[rng.integers(0, len(per_replica), len(per_replica))]) for _ in range(draws)]
    return float(np.percentile(values, 2.5)), float(np.percentile(values, 97.5))


def _number(value, default: float = math.nan) -> float:
    try:
        return float(value)
    except (TypeError, ValueError):
        return default


def _share(hits: int, total: int) -> str:
    return f"{hits}/{total} = {100.0 * hits / total:.0f} %" if total else "n/a"


def _rows(path: Path) -> list[dict]:
    import csv

    with open(path, newline="") as handle:
        return list(csv.DictReader(handle))


def two_step(truth: SeriesTruth, work: Path, tally: Tally, workers: int) -> None:
    """``dnmr fit`` with no options, then ``dnmr eyring`` on its rates."""
    out = work / "two-step"
    dnmr.fit_series(truth.series_file, out, workers=workers, progress=False)
    tally.add_rates(_rows(out / "rates.csv"), truth)
    eyring = dnmr.eyring_fit_file(out / "rates.csv")[0]
    tally.add_activation(eyring.enthalpy_kj_mol, eyring.enthalpy_stderr, eyring.entropy_j_mol_k,
                         eyring.entropy_stderr, truth)


def global_fit(truth: SeriesTruth, work: Path, tally: Tally, workers: int) -> None:
    """``dnmr fit --global`` with no options."""
    from dnmr.fitting.globalfit import fit_series_global

    result = fit_series_global(truth.series_file, work / "global", workers=workers, progress=False)
    a = result.activation[0]
    # the global fit's rate at T is the Eyring rate of its ΔH‡, ΔS‡; its error is that of ln k (global.json's
    # rate_stderr is k times it), so the 68 % interval is k exp(-+ se_ln)
    rows = []
    for t in result.temperatures_k:
        ln_k, se = a.ln_rate(float(t))
        rows.append({"temperature_k": t, "rate_per_s": math.exp(ln_k), "rate_stderr": math.exp(ln_k) * se,
                     "rate_ci68_lower": math.exp(ln_k - se), "rate_ci68_upper": math.exp(ln_k + se)})
    tally.add_rates(rows, truth)
    se = np.sqrt(np.diag(a.covariance))
    tally.add_activation(a.enthalpy_kj_mol, se[0], a.entropy_j_mol_k, se[1], truth)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--replicas", type=int, default=20)
    parser.add_argument("--scenario", default=",".join(SCENARIOS))
    parser.add_argument("--global", dest="global_fit", action="store_true", help="also the global fit")
    parser.add_argument("--workers", type=int, default=None)
    parser.add_argument("--seed", type=int, default=1000)
    args = parser.parse_args(argv)
    routes = [("dnmr fit + dnmr eyring (defaults)", two_step)]
    if args.global_fit:
        routes.append(("dnmr fit --global (defaults)", global_fit))
    for kind in args.scenario.split(","):
        scenario = SCENARIOS[kind]
        print(f"{scenario.name}: {args.replicas} noise replicas, {len(scenario.temperatures_k)} spectra each")
        tallies = {label: Tally() for label, _ in routes}
        for r in range(args.replicas):
            with tempfile.TemporaryDirectory() as tmp:
                truth = write_series(Path(tmp) / "data", scenario, args.seed + r)
                for label, route in routes:
                    try:
                        route(truth, Path(tmp), tallies[label], args.workers)
                    except Exception as exc:  # a failed replica is counted, not hidden
                        print(f"  replica {r}: {label} failed: {type(exc).__name__}: {exc}")
        for label, tally in tallies.items():
            print(f"  {label}")
            print("\n".join(tally.lines()))
        sys.stdout.flush()


if __name__ == "__main__":
    main()
