"""Scale-out: the series and global fits on any concurrent.futures.Executor, on a Dask cluster by its
scheduler's address (`dnmr fit --scheduler`), and many series at once (`dnmr fit FOLDER`).

The series are tiny invented ones made by the McConnell closed form (J. Chem. Phys. 28, 430 (1958);
tests/closed_forms.py through tests/test_series.py's `write_series`), with Eyring rates (Eyring,
J. Chem. Phys. 3, 107 (1935)).  What is checked here is that moving the work elsewhere changes nothing:
the reference is dnmr's own run in this process (one worker), and rates.csv must be the same bytes.
"""
from __future__ import annotations

import concurrent.futures as futures
import csv
import socket
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

from test_series import write_series
from dnmr.cli import cli
from dnmr.fitting.globalfit import fit_series_global
from dnmr.fitting.series import fit_series

TEMPERATURES = [250.0, 280.0, 310.0]  # three: the middle one is seeded from the other two
GLOBAL_TABLE = 'region_ppm = [2.7, 3.3]\nlinewidth = "shared"'


@pytest.fixture(scope="module")
def serial(tmp_path_factory):
    """A three-spectrum series fitted in this process: (series file, rates.csv bytes)."""
    folder = tmp_path_factory.mktemp("scale")
    series = write_series(folder / "inputs", TEMPERATURES)
    fit_series(series, folder / "serial", workers=1, progress=False)
    return series, (folder / "serial" / "rates.csv").read_bytes()


@pytest.fixture(scope="module")
def global_serial(tmp_path_factory):
    """The global fit of a three-spectrum series in this process: (series file, GlobalFit)."""
    folder = tmp_path_factory.mktemp("global")
    series = write_series(folder / "inputs", TEMPERATURES, GLOBAL_TABLE)
    return series, fit_series_global(series, folder / "serial", workers=1, progress=False)


def same_global_fit(a, b) -> None:
    """Two global fits give the same numbers, to the last bit."""
    assert a.parameters == b.parameters
    assert a.chi_square == b.chi_square
    assert [(e.enthalpy_kj_mol, e.entropy_j_mol_k) for e in a.activation] == \
        [(e.enthalpy_kj_mol, e.entropy_j_mol_k) for e in b.activation]


def test_a_process_pool_given_to_the_api_gives_the_serial_rates(serial, tmp_path):
    series, reference = serial
    with futures.ProcessPoolExecutor(max_workers=2) as executor:
        result = fit_series(series, tmp_path / "out", progress=False, executor=executor)
        assert executor.submit(abs, -3).result() == 3  # left running for its owner
    assert result.exit_status == 0
    assert (tmp_path / "out" / "rates.csv").read_bytes() == reference
    assert len(list((tmp_path / "out" / "figures").glob("*.png"))) == len(TEMPERATURES)


def test_worker_processes_give_the_serial_outputs_of_the_demo_series(tmp_path):
    """The bundled demo series (invented; shifts from the slow-exchange trend): with worker processes the figures are
    drawn as the fits come in (those of the held fits before the trends' correlations change their rates' errors,
    those of the slow-exchange fits before it is known which stay final) and the stored fits are written in
    another order; rates.csv, the stored fits and every figure must still be the bytes of the run in this
    process (three figures of held fits showed another error before this was checked)."""
    import dnmr

    series = Path(dnmr.__file__).parent / "data" / "demo" / "series.toml"
    outputs = {}
    for workers in (1, 2):
        folder = tmp_path / f"out{workers}"
        assert fit_series(series, folder, workers=workers, progress=False).exit_status == 0
        outputs[workers] = {p.relative_to(folder): p.read_bytes() for p in sorted(folder.rglob("*"))
                            if p.is_file() and p.name != "results.json"}  # results.json holds the time it was written
    assert sum(p.parts[0] == "figures" for p in outputs[1]) == 17 and any(p.parts[0] == "fits" for p in outputs[1])
    assert set(outputs[2]) == set(outputs[1])
    assert [str(p) for p in outputs[1] if outputs[1][p] != outputs[2][p]] == []


def test_global_fit_on_a_thread_pool_equals_the_local_run(global_serial, tmp_path):
    series, reference = global_serial
    with futures.ThreadPoolExecutor(max_workers=2) as executor:
        result = fit_series_global(series, tmp_path / "g", workers=2, progress=False, executor=executor)
    same_global_fit(result, reference)


# --- a Dask cluster, reached by its scheduler's address --------------------------------------------------

@pytest.fixture(scope="module")
def scheduler():
    """The address of a local Dask cluster of two worker processes (skipped without the dask extra)."""
    distributed = pytest.importorskip("distributed", reason='the optional extra is not installed: pip install ".[dask]"')
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        yield cluster.scheduler_address


def test_series_sent_to_a_dask_scheduler_gives_the_serial_rates(scheduler, serial, tmp_path):
    series, reference = serial
    result = CliRunner().invoke(cli, ["fit", str(series), "-o", str(tmp_path / "out"), "--scheduler", scheduler,
                                      "--quiet", "--no-report"])
    assert result.exit_code == 0, result.output + result.stderr
    assert (tmp_path / "out" / "rates.csv").read_bytes() == reference


def test_global_fit_on_a_dask_cluster_equals_the_local_run(scheduler, global_serial, tmp_path):
    from dnmr.fitting.cluster import scheduler_executor

    series, reference = global_serial
    with scheduler_executor(scheduler) as (executor, threads):
        assert threads == 2
        result = fit_series_global(series, tmp_path / "g", workers=threads, progress=False, executor=executor)
    same_global_fit(result, reference)


def one_line(text: str) -> str:
    text = text.strip()
    assert "Traceback" not in text and len(text.splitlines()) == 1, text
    return text


def closed_port() -> int:
    """A port on this machine where nothing listens (bound, then released)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.mark.parametrize("address, words", [(f"tcp://127.0.0.1:{closed_port()}", "cannot reach"),
                                            ("tcp://127.0.0.1:notaport", "not a scheduler address")], ids=["closed-port", "malformed"])
def test_a_scheduler_that_cannot_be_reached_is_one_line_and_exit_2(address, words, serial, tmp_path):
    pytest.importorskip("distributed", reason='the optional extra is not installed: pip install ".[dask]"')
    result = CliRunner().invoke(cli, ["fit", str(serial[0]), "-o", str(tmp_path / "out"), "--scheduler", address])
    assert result.exit_code == 2 and words in one_line(result.stderr)
    assert not (tmp_path / "out").exists()


def test_without_the_dask_extra_the_scheduler_is_one_line_and_exit_2(serial, tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # as if not installed: importing it fails
    result = CliRunner().invoke(cli, ["fit", str(serial[0]), "-o", str(tmp_path / "out"), "--scheduler",
                                      "tcp://127.0.0.1:8786"])
    assert result.exit_code == 2 and 'pip install "dnmr-exchange[dask]"' in one_line(result.stderr)
    serial_too = CliRunner().invoke(cli, ["fit", str(serial[0]), "-o", str(tmp_path / "out"), "--serial",
                                          "--scheduler", "tcp://127.0.0.1:8786"])
    assert serial_too.exit_code == 2 and "--scheduler" in one_line(serial_too.stderr)


# --- many series at once ---------------------------------------------------------------------------------

def test_a_folder_of_series_is_fitted_series_by_series_with_a_summary(serial, tmp_path):
    series, reference = serial
    screen = tmp_path / "screen"
    (screen / "a").mkdir(parents=True)
    (screen / "b.toml").write_text(series.read_text().replace('model = "model.toml"',
                                                               f'model = "{series.parent / "model.toml"}"')
                                   .replace('file = "spectra/', f'file = "{series.parent}/spectra/'))
    write_series(screen / "a", TEMPERATURES[:2])  # its model.toml is passed over: not a series file
    write_series(screen / "c", TEMPERATURES[:2])
    (screen / "c" / "spectra" / "t280.txt").write_text("ppm\tintensity\n2.9\tnot-a-number\n" * 5)
    (screen / "d.toml").write_text('model = "model.toml"\n[[spectrum]\n')  # not TOML
    out = tmp_path / "out"
    result = CliRunner().invoke(cli, ["fit", str(screen), "-o", str(out), "--workers", "2", "--quiet", "--no-report"])
    assert result.exit_code == 2, result.output + result.stderr  # c and d met bad input; the others were fitted
    with open(out / "summary.csv", newline="") as fh:
        rows = {r["series"]: r for r in csv.DictReader(fh)}
    assert list(rows) == ["a/series", "b", "c/series", "d"]
    assert [rows[n]["status"] for n in rows] == ["fitted", "fitted", "partly fitted", "failed"]
    assert [rows[n]["exit_status"] for n in rows] == ["0", "0", "2", "2"]
    assert rows["c/series"]["fitted"] == "1" and "t280.txt" in rows["c/series"]["error"]
    assert rows["d"]["spectra"] == "" and "d.toml" in rows["d"]["error"]
    assert (out / "b" / "rates.csv").read_bytes() == reference  # as if fitted alone, serially
    assert (out / "a" / "series" / "rates.csv").exists() and not (out / "d").exists()
    assert "4 series, 2 fitted whole" in result.output
    again = CliRunner().invoke(cli, ["fit", str(screen), "-o", str(out), "--quiet"])
    assert again.exit_code == 2 and "already exists" in one_line(again.stderr)
