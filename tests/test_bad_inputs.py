"""The bad-input corpus: every malformed file ends with exit status 2 and one line naming the file, its
place and the fix — no traceback, nothing written next to the input, earlier results untouched
(CONTRACT.md sections 3-5; the project's rules on bad input).

Folders of tests/bad_inputs/ and the command each kind of file goes through:

- ``model/``: model files (CONTRACT.md section 1), through ``dnmr simulate``;
- ``spectrum/``: spectrum files (two-column text, JCAMP-DX after McDonald & Wilks 1988), through the
  spectrum reader of ``dnmr thermometer methanol --spectrum FILE``;
- ``series/``: series files (CONTRACT.md section 3), through ``dnmr fit``; the valid model and spectra
  they point at are in ``series/_shared/``, which the corpus glob skips (it is a folder);
- ``rates/``: rate tables (CONTRACT.md section 4), through ``dnmr eyring`` with a plot to draw;
- ``transfer/``: magnetisation-transfer experiment files (docs/transfer-file.md), through ``dnmr transfer``;
  the valid model and table they point at are in ``transfer/_shared/``.

A rate above kB T/h (the Eyring rate of a zero barrier, Eyring, J. Chem. Phys. 3, 107 (1935)) is one no
first-order process reaches: refused wherever a user gives one (a model's rate, a fit's rate range or
scan, a rate parameter's start or bounds), at the temperature of the spectrum or experiment.
"""
from __future__ import annotations

import hashlib
import time
import tracemalloc
from pathlib import Path

import pytest
from click.testing import CliRunner

from dnmr.cli import cli

CORPUS = Path(__file__).resolve().parent / "bad_inputs"


def digest(folder: Path) -> dict[str, str]:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.iterdir()) if p.is_file()}


def command_for(path: Path, out: Path) -> list[str]:
    kind = path.parent.name
    if kind == "model":
        return ["simulate", str(path), "-o", str(out / "spectrum.csv")]
    if kind == "spectrum":
        return ["thermometer", "methanol", "--spectrum", str(path)]
    if kind == "series":  # a fresh results folder inside `out`: it must not even be created
        return ["fit", str(path), "-o", str(out / "fit"), "--serial", "--quiet"]
    if kind == "rates":
        return ["eyring", str(path), "--plot", str(out / "eyring.png")]
    if kind == "transfer":
        return ["transfer", str(path), "-o", str(out / "fit")]
    raise AssertionError(f"no command for corpus folder {kind}")


CASES = sorted(p for p in CORPUS.glob("*/*") if p.is_file() and p.suffix != ".md")

MEMORY_LIMIT = 2 * 2**30  # bytes: no input may make dnmr take more (issue 13)
TIME_LIMIT = 60  # s of processor time for one input: a refusal takes well under a second


@pytest.fixture(scope="module", autouse=True)
def warm_imports():
    """Import what the commands import lazily once here, so that each forked child does not again."""
    import matplotlib.pyplot  # noqa: F401

    import dnmr.activation.study, dnmr.reporting.plotting, dnmr.reporting.report, dnmr.fitting.series, dnmr.activation.temperature_calibration  # noqa: F401, E401


def run_limited(args: list[str]) -> tuple[str, int, str]:
    """Run the command line in a forked child under a limit of MEMORY_LIMIT of data and TIME_LIMIT
    seconds of processor time (and twice that of wall time, against a blocking read).

    Returns (how it ended: "exit" or the signal's name, exit status, output)."""
    import json
    import os
    import resource
    import signal

    read, write = os.pipe()
    pid = os.fork()
    if pid == 0:  # the child: limits, the command, its outcome as JSON on the pipe
        os.close(read)
        status, output = 1, ""
        try:
            resource.setrlimit(resource.RLIMIT_DATA, (MEMORY_LIMIT, MEMORY_LIMIT))
            resource.setrlimit(resource.RLIMIT_CPU, (TIME_LIMIT, TIME_LIMIT))
            signal.alarm(2 * TIME_LIMIT)
            result = CliRunner().invoke(cli, args)
            status, output = result.exit_code, result.output
            if result.exception is not None and not isinstance(result.exception, SystemExit):
                output += f"\nTraceback: {type(result.exception).__name__}: {result.exception}"
        finally:
            os.write(write, json.dumps({"status": status, "output": output}).encode())
            os._exit(0)
    os.close(write)
    chunks = []
    while chunk := os.read(read, 1 << 16):
        chunks.append(chunk)
    os.close(read)
    _, code = os.waitpid(pid, 0)
    if os.WIFSIGNALED(code):
        return signal.Signals(os.WTERMSIG(code)).name, -1, b"".join(chunks).decode(errors="replace")
    outcome = json.loads(b"".join(chunks) or b'{"status": -1, "output": "no outcome"}')
    return "exit", outcome["status"], outcome["output"]


def test_corpus_is_large_enough():
    # issue 6: at least 50 malformed inputs, of every kind a chemist hands over; issue 13: at least 150
    assert len(CASES) >= 150
    assert {p.parent.name for p in CASES} == {"model", "spectrum", "series", "rates", "transfer"}


@pytest.mark.parametrize("path", CASES, ids=lambda p: f"{p.parent.name}/{p.name}")
def test_bad_input_is_one_clear_line(path, tmp_path):
    before = digest(path.parent)
    out = tmp_path / "out"
    out.mkdir()
    (out / "earlier.txt").write_text("an earlier result")
    ended, status, output = run_limited(command_for(path, out))
    message = output.strip()
    assert ended == "exit", f"killed by {ended} (memory or time limit): {message}"
    assert status == 2, message
    assert "Traceback" not in message and len(message.splitlines()) == 1, message
    assert path.name in message, message
    if path.stem.startswith("renamed_"):  # issue 16: a name of an earlier release says what it is called now
        assert "was renamed to" in message, message
    assert digest(path.parent) == before  # the input folder is untouched
    assert [p.name for p in out.iterdir()] == ["earlier.txt"] and (out / "earlier.txt").read_text() == "an earlier result"


def test_series_inputs_are_valid_apart_from_the_slip(tmp_path):
    # the corpus must fail for the slip it is named after, not because the shared inputs are broken
    from dnmr.io.readers import read_spectrum
    from dnmr.fitting.seriesfile import load_series

    shared = CORPUS / "series" / "_shared"
    series = tmp_path / "series.toml"
    series.write_text(f'model = "{shared / "model.toml"}"\n'
                      + "".join(f'[[spectrum]]\nfile = "{shared / name}"\ntemperature_k = {t}\n'
                                for name, t in (("t250.csv", 250.0), ("t270.csv", 270.0))))
    loaded = load_series(series)
    assert [s.temperature_k for s in loaded.spectra] == [250.0, 270.0]
    assert read_spectrum(shared / "t250.csv").ppm.size == 512


def test_transfer_inputs_are_valid_apart_from_the_slip(tmp_path):
    # as for the series: the shared model and table load, and the options' slip alone is refused
    from dnmr.fitting.transferfile import load_experiment

    shared = CORPUS / "transfer" / "_shared"
    experiment = tmp_path / "experiment.toml"
    experiment.write_text(f'model = "{shared / "model.toml"}"\ntemperature_k = 240.0\nexperiment = "inversion"\n'
                          f'data = "{shared / "inversion.csv"}"\n[options]\ninverted = ["syn"]\n')
    loaded = load_experiment(experiment)
    assert loaded.data.sites == ("syn", "anti") and loaded.data.times_s.size == 10


@pytest.mark.parametrize("change, key", [({"rate_limits_per_s": (1e-3, 1e13)}, "rate_limits_per_s"),
                                         ({"rate_scan_per_s": (1e-2, 1e13)}, "rate_scan_per_s"),
                                         ({"parameters": {"log10_rate_rotation": {"upper": 13.0}}},
                                          "parameters.log10_rate_rotation.upper")])
def test_fit_of_one_spectrum_refuses_rates_above_kt_over_h(change, key):
    # kB T/h at 250 K is 5.21e12 s^-1 (Eyring 1935; CODATA constants): 1e13 s^-1 lies above it
    from dnmr import load_model
    from dnmr.errors import InputError
    from dnmr.fitting.spectrumfit import FitOptions, fit_spectrum

    shared = CORPUS / "series" / "_shared"
    options = FitOptions(**change)
    with pytest.raises(InputError, match=rf"{key}: .* above kB T/h = 5.21e\+12 s\^-1 at 250 K"):
        fit_spectrum(shared / "t250.csv", load_model(shared / "model.toml"), temperature_k=250.0, options=options)
    options.check_rate_ceiling(500.0)  # where the ceiling lies above it (kB T/h = 1.04e13 s^-1 at 500 K): fine


def test_replicate_temperatures_stay_allowed(tmp_path):
    # two files at one temperature may be replicates: flagged, not refused (only one file twice is refused)
    from dnmr.fitting.seriesfile import load_series

    shared = CORPUS / "series" / "_shared"
    series = tmp_path / "series.toml"
    series.write_text(f'model = "{shared / "model.toml"}"\n'
                      + "".join(f'[[spectrum]]\nfile = "{shared / name}"\ntemperature_k = 250.0\n'
                                for name in ("t250.csv", "t270.csv")))
    assert all("duplicate-temperature" in s.flags for s in load_series(series).spectra)


def test_hostile_jcamp_point_count_fails_fast_in_bounded_memory(tmp_path):
    # A JCAMP-DX header is free text (McDonald & Wilks 1988): ##NPOINTS=10^12 must be refused before any
    # array of that size is allocated (it would need 8 TB).
    path = CORPUS / "spectrum" / "jcamp_absurd_npoints.jdx"
    assert "##NPOINTS=1000000000000" in path.read_text()
    tracemalloc.start()
    start = time.perf_counter()
    result = CliRunner().invoke(cli, command_for(path, tmp_path))
    elapsed = time.perf_counter() - start
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert result.exit_code == 2 and "NPOINTS" in result.output
    assert elapsed < 5.0 and peak < 50 * 2**20, (elapsed, peak)


def test_oversized_text_spectrum_is_refused_unread(tmp_path):
    # a file larger than any 1D spectrum (a sparse 10 GB file costs no disk) is refused from its size
    path = tmp_path / "huge.csv"
    with open(path, "wb") as handle:
        handle.write(b"ppm,intensity\n")
        handle.truncate(10 * 2**30)
    tracemalloc.start()
    result = CliRunner().invoke(cli, ["thermometer", "methanol", "--spectrum", str(path)])
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert result.exit_code == 2 and "huge.csv" in result.output and "bytes" in result.output, result.output
    assert peak < 50 * 2**20
