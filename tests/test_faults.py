"""Faults of the surroundings rather than of the input files (issue 13): special files given as inputs,
a full or read-only disk, a second run into the same folder, --overwrite on folders dnmr did not write,
permissions on a shared disk, interrupted runs, orphaned workers, and serial against parallel results.

Every command is checked for the contract's exit statuses (CONTRACT.md section 5): 2 for bad input, 1
for a fault such as a full disk, and one line on stderr without a traceback either way.
"""
from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from test_bad_inputs import CORPUS, run_limited

SHARED = CORPUS / "series" / "_shared"
ROOT = Path(__file__).resolve().parents[1]


def series_file(folder: Path, names=("t250.csv", "t270.csv"), temperatures=(250.0, 270.0)) -> Path:
    """A valid two-spectrum series on the corpus' shared model and spectra (they fit in a second)."""
    path = folder / "series.toml"
    path.write_text(f'model = "{SHARED / "model.toml"}"\n[fit]\nregion_ppm = [2.7, 3.2]\n'
                    + "".join(f'[[spectrum]]\nfile = "{folder / n}"\ntemperature_k = {t}\n'
                              for n, t in zip(names, temperatures)))
    for name in names:
        if not (folder / name).exists():
            shutil.copy(SHARED / ("t250.csv" if name.endswith("250.csv") else "t270.csv"), folder / name)
    return path


def dnmr(*args: str, cwd: Path | None = None, timeout: float = 120, umask: int = -1) -> subprocess.CompletedProcess:
    """Run the command line in a new process (under `umask` when one is given)."""
    env = {**os.environ, "PYTHONPATH": str(ROOT), "MPLBACKEND": "Agg"}
    return subprocess.run([sys.executable, "-m", "dnmr", *args], capture_output=True, text=True, env=env,
                          cwd=cwd, timeout=timeout, umask=umask)


def one_line(text: str) -> str:
    text = text.strip()
    assert "Traceback" not in text and len(text.splitlines()) == 1, text
    return text


# --- special files as inputs --------------------------------------------------------------------------

def special_files(tmp_path: Path) -> dict[str, Path]:
    """A named pipe, a link to an endless device and a folder, each where a file is expected."""
    pipe = tmp_path / "pipe.toml"
    os.mkfifo(pipe)
    endless = tmp_path / "endless.toml"
    endless.symlink_to("/dev/zero")
    folder = tmp_path / "folder.toml"
    folder.mkdir()
    return {"named pipe": pipe, "endless device": endless, "folder": folder}


ROLES = ["model", "spectrum", "series", "rates", "spectrum in a series"]


@pytest.mark.parametrize("kind, role", [(k, r) for k in ("named pipe", "endless device") for r in ROLES]
                         + [("folder", "spectrum")])
def test_special_file_is_refused_unread(kind, role, tmp_path):
    # a named pipe blocks a reader for ever and /dev/zero never ends: both refused before reading
    # (a folder where a file is expected is refused by the command line itself, except for a spectrum,
    # which may be a processed-data folder)
    path = special_files(tmp_path)[kind]
    out = tmp_path / "out"
    if role == "model":
        args = ["simulate", str(path), "-o", str(out / "s.csv")]
    elif role == "spectrum":
        args = ["thermometer", "methanol", "--spectrum", str(path)]
    elif role == "series":
        args = ["fit", str(path), "-o", str(out), "--serial", "--quiet"]
    elif role == "rates":
        args = ["eyring", str(path)]
    else:
        series = series_file(tmp_path)
        series.write_text(series.read_text().replace(str(tmp_path / "t270.csv"), str(path)))
        args = ["fit", str(series), "-o", str(out), "--serial", "--quiet"]
    ended, status, output = run_limited(args)
    assert ended == "exit", f"killed by {ended}: {output}"
    assert status == 2, output
    assert path.name in one_line(output)
    assert not out.exists()


# --- a full and a read-only disk ------------------------------------------------------------------------

def in_small_filesystem(script: str, tmp_path: Path, read_only: bool = False) -> subprocess.CompletedProcess:
    """Run `script` (sh) with a 64 KiB tmpfs mounted at tmp_path/disk, in a private mount namespace
    (unshare), so that nothing of the mount is seen outside; skips where that is not allowed."""
    disk = tmp_path / "disk"
    disk.mkdir()
    remount = f"mount -o remount,ro {disk} && " if read_only else ""
    command = f"mount -t tmpfs -o size=64k tmpfs {disk} && {remount}{script}"
    if shutil.which("unshare") is None:
        pytest.skip("no unshare to make a private, size-limited file system")
    probe = subprocess.run(["unshare", "-m", "--propagation", "private", "true"], capture_output=True)
    if probe.returncode != 0:
        pytest.skip("mount namespaces are not allowed here (needs root or user namespaces)")
    env = {**os.environ, "PYTHONPATH": str(ROOT), "MPLBACKEND": "Agg", "DISK": str(disk), "PY": sys.executable}
    return subprocess.run(["unshare", "-m", "--propagation", "private", "sh", "-c", command],
                          capture_output=True, text=True, env=env, timeout=300)


@pytest.mark.parametrize("read_only", [False, True], ids=["full", "read-only"])
def test_disk_faults_are_one_line_and_exit_1(read_only, tmp_path):
    model = SHARED / "model.toml"
    series = global_series(tmp_path)
    rates = tmp_path / "rates.csv"
    rates.write_text("temperature_k,rate_per_s\n250,12.0\n260,40.0\n270,95.0\n280,210.0\n")
    commands = [f'"$PY" -m dnmr simulate {model} -o "$DISK/s.csv" --points 32768',
                f'"$PY" -m dnmr fit {series} -o "$DISK/fit" --serial --quiet',
                f'"$PY" -m dnmr eyring {rates} --plot "$DISK/eyring.png"',
                f'"$PY" -m dnmr demo "$DISK/demo"',
                # last, on a disk already full: the first write of all is the results folder's lock
                f'head -c 100000 /dev/zero > "$DISK/filler" 2>/dev/null; "$PY" -m dnmr fit {series} -o "$DISK/global" '
                '--global --serial --quiet']
    script = " ; ".join(f'{c} >/dev/null 2>"{tmp_path}/err{i}"; echo $? >"{tmp_path}/rc{i}"' for i, c in enumerate(commands))
    done = in_small_filesystem(script + f'; ls -A -R "$DISK" > "{tmp_path}/left"', tmp_path, read_only)
    assert done.returncode == 0, done.stderr
    for i, command in enumerate(commands):
        status = int((tmp_path / f"rc{i}").read_text())
        message = one_line((tmp_path / f"err{i}").read_text())
        assert status == 1, (command, message)
        assert ("Read-only" if read_only else "No space left") in message, message
        assert str(tmp_path / "disk") in message, message  # the file or folder that could not be written
    assert ".part" not in (tmp_path / "left").read_text()  # nothing half-written is left behind



def experiment_file(folder: Path) -> Path:
    """A valid selective-inversion experiment on the corpus' shared model and table (it fits in seconds)."""
    shared = CORPUS / "transfer" / "_shared"
    path = folder / "experiment.toml"
    path.write_text(f'model = "{shared / "model.toml"}"\ntemperature_k = 240.0\nexperiment = "inversion"\n'
                    f'data = "{shared / "inversion.csv"}"\n[options]\ninverted = ["syn"]\n')
    return path


@pytest.mark.parametrize("room", ["none", "one page"])
def test_a_full_disk_leaves_no_folder_behind(room, fitted, tmp_path):
    # issue 13: a folder a run created finds nothing written into it (no room at all, or room for the lock
    # file alone, so that the run fails at its first result): it is removed again, with its empty
    # subfolders (fits/, figures/, two-step/, supporting-information/); a folder that existed stays
    series = global_series(tmp_path)
    runs = {"fit": f'fit {series} -o "$DISK/new/deeper" --serial --quiet',
            "fit into an existing folder": f'fit {series} -o "$DISK/mine" --serial --quiet',
            "global fit": f'fit {series} -o "$DISK/global" --global --serial --quiet',
            "transfer": f'transfer {experiment_file(tmp_path)} -o "$DISK/transfer"',
            "report": f'report {fitted[1]} -o "$DISK/report/report.html"',
            "demo": 'demo "$DISK/demo" --quiet'}
    free = "$(getconf PAGESIZE)" if room == "one page" else "0"  # tmpfs hands out whole pages
    script = f'mkdir "$DISK/mine"; head -c $((65536 - {free})) /dev/zero > "$DISK/filler"; ' + " ; ".join(
        f'"$PY" -m dnmr {args} >/dev/null 2>"{tmp_path}/err{i}"; echo $? >"{tmp_path}/rc{i}"'
        for i, args in enumerate(runs.values()))
    done = in_small_filesystem(script + f'; cd "$DISK" && find . -mindepth 1 > "{tmp_path}/left"', tmp_path)
    assert done.returncode == 0, done.stderr
    for i, run in enumerate(runs):
        message = one_line((tmp_path / f"err{i}").read_text())
        assert int((tmp_path / f"rc{i}").read_text()) == 1 and "No space left" in message, (run, message)
    assert sorted((tmp_path / "left").read_text().split()) == ["./filler", "./mine"]


# --- the results folder ---------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def fitted(tmp_path_factory) -> tuple[Path, Path]:
    """A series and the folder of its fit (copy the folder before changing it)."""
    folder = tmp_path_factory.mktemp("fitted")
    series = series_file(folder)
    done = dnmr("fit", str(series), "-o", str(folder / "out"), "--serial", "--quiet", "--no-report")
    assert done.returncode == 0, done.stderr
    return series, folder / "out"


def copy_of(fitted, tmp_path: Path) -> tuple[Path, Path]:
    series, out = fitted
    shutil.copytree(out, tmp_path / "out", symlinks=True)
    return series, tmp_path / "out"


def test_overwrite_keeps_what_dnmr_did_not_write(fitted, tmp_path):
    series, out = copy_of(fitted, tmp_path)
    mine = [out / "figures" / "my_drawing.png", out / "fits" / "my_notes.json", out / "notes.txt"]
    for path in mine:
        path.write_text("the user's own")
    again = dnmr("fit", str(series), "-o", str(out), "--serial", "--quiet", "--no-report", "--overwrite")
    assert again.returncode == 0, again.stderr
    assert all(p.read_text() == "the user's own" for p in mine)
    assert (out / "rates.csv").exists() and list((out / "fits").glob("000_*.json"))


def test_overwrite_refuses_a_folder_dnmr_never_wrote(tmp_path):
    series = series_file(tmp_path)
    out = tmp_path / "theirs"
    (out / "figures").mkdir(parents=True)
    (out / "figures" / "plot.png").write_text("a figure of the user's")
    (out / "rates.csv").write_text("their own table")
    done = dnmr("fit", str(series), "-o", str(out), "--serial", "--quiet", "--overwrite")
    assert done.returncode == 2 and "no dnmr fit results" in one_line(done.stderr)
    assert (out / "rates.csv").read_text() == "their own table"
    assert (out / "figures" / "plot.png").read_text() == "a figure of the user's"


def test_a_linked_result_folder_is_never_followed(fitted, tmp_path):
    series, out = copy_of(fitted, tmp_path)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    (elsewhere / "000_t250.png").write_text("not dnmr's")
    shutil.rmtree(out / "figures")
    (out / "figures").symlink_to(elsewhere)
    done = dnmr("fit", str(series), "-o", str(out), "--serial", "--quiet", "--overwrite")
    assert done.returncode == 2 and "link" in one_line(done.stderr)
    assert (elsewhere / "000_t250.png").read_text() == "not dnmr's"


def test_a_folder_being_written_is_locked(fitted, tmp_path):
    import fcntl

    series, out = copy_of(fitted, tmp_path)
    stored = sorted((out / "fits").iterdir())
    with open(out / ".dnmr-lock", "a") as held:  # as a running fit holds it
        fcntl.flock(held, fcntl.LOCK_EX)
        done = dnmr("fit", str(series), "-o", str(out), "--serial", "--quiet", "--overwrite")
    assert done.returncode == 2 and "another dnmr run" in one_line(done.stderr)
    assert sorted((out / "fits").iterdir()) == stored  # the running fit's results are untouched


def test_outputs_honour_the_umask(tmp_path):
    series = series_file(tmp_path)
    out = tmp_path / "out"
    done = dnmr("fit", str(series), "-o", str(out), "--serial", "--quiet", umask=0o022)
    simulated = dnmr("simulate", str(SHARED / "model.toml"), "-o", str(tmp_path / "s.csv"), umask=0o022)
    assert done.returncode == 0 and simulated.returncode == 0
    for path in [out / "rates.csv", out / "results.json", out / "report.html", tmp_path / "s.csv",
                 *(out / "fits").iterdir(), *(out / "figures").iterdir()]:
        assert path.stat().st_mode & 0o777 == 0o644, path  # readable by colleagues, as the umask allows


# --- the folder of a global fit (dnmr fit --global): the same lock and --overwrite rules ------------------

def global_series(folder: Path) -> Path:
    """A valid three-spectrum series (a global fit needs three): the shared spectra, one of them twice."""
    return series_file(folder, ("t250.csv", "t260.csv", "t270.csv"), (250.0, 260.0, 270.0))


@pytest.fixture(scope="module")
def global_fitted(tmp_path_factory) -> tuple[Path, Path]:
    """A series and the folder of its global fit, run serially under umask 022 (copy before changing it)."""
    folder = tmp_path_factory.mktemp("global")
    series = global_series(folder)
    done = dnmr("fit", str(series), "-o", str(folder / "out"), "--global", "--serial", "--quiet", umask=0o022)
    assert done.returncode == 0, done.stderr
    return series, folder / "out"


def test_global_outputs_honour_the_umask(global_fitted):
    _, out = global_fitted
    written = [p for p in out.rglob("*") if p.is_file()]
    assert {"global.json", "global.txt", "global_fits.png", "report.html", "rates.csv"} <= {p.name for p in written}
    for path in written:
        assert path.stat().st_mode & 0o777 == 0o644, path  # readable by colleagues, as the umask allows


def test_global_overwrite_keeps_the_users_files_and_parallel_gives_the_serial_numbers(global_fitted, tmp_path):
    # issue 13, items 3 and 5: --overwrite replaces only what dnmr wrote; the same inputs give bit-identical
    # results whether the spectra are fitted serially (the fixture) or in two worker processes (here)
    import json

    series, out = copy_of(global_fitted, tmp_path)
    mine = [out / "notes.txt", out / "global_notes.json", out / "two-step" / "figures" / "my_drawing.png"]
    for path in mine:
        path.write_text("the user's own")
    again = dnmr("fit", str(series), "-o", str(out), "--global", "--overwrite", "--workers", "2", "--quiet",
                 "--no-report")
    assert again.returncode == 0, again.stderr
    assert all(p.read_text() == "the user's own" for p in mine)
    assert not (out / "report.html").exists()  # the earlier run's report went with its results
    serial, parallel = (json.loads((folder / "global.json").read_text()) for folder in (global_fitted[1], out))
    for key in ("processes", "parameters", "chi_square", "spectra"):
        assert parallel[key] == serial[key], key
    two_step = "two-step/rates.csv"
    assert (out / two_step).read_bytes() == (global_fitted[1] / two_step).read_bytes()


def test_a_global_fit_folder_being_written_is_locked(global_fitted, tmp_path):
    import fcntl

    series, out = copy_of(global_fitted, tmp_path)
    with open(out / ".dnmr-lock", "a") as held:  # as a running global fit holds it
        fcntl.flock(held, fcntl.LOCK_EX)
        before = sorted(str(p.relative_to(out)) for p in out.rglob("*"))
        done = dnmr("fit", str(series), "-o", str(out), "--global", "--overwrite", "--serial", "--quiet")
    assert done.returncode == 2 and "another dnmr run" in one_line(done.stderr)
    assert sorted(str(p.relative_to(out)) for p in out.rglob("*")) == before  # nothing of the run's removed


def test_global_overwrite_refuses_a_folder_dnmr_never_wrote(tmp_path):
    series = global_series(tmp_path)
    out = tmp_path / "theirs"
    out.mkdir()
    (out / "global.json").write_text('{"program": "their own fit"}')
    (out / "global_fits.png").write_text("a figure of the user's")
    done = dnmr("fit", str(series), "-o", str(out), "--global", "--overwrite", "--serial", "--quiet")
    assert done.returncode == 2 and "no dnmr global-fit results" in one_line(done.stderr)
    assert (out / "global.json").read_text() == '{"program": "their own fit"}'
    assert (out / "global_fits.png").read_text() == "a figure of the user's"
    assert sorted(p.name for p in out.iterdir()) == ["global.json", "global_fits.png"]


def test_a_linked_two_step_folder_is_never_followed(fitted, tmp_path):
    # two-step/ linked to another fit's folder: writing or clearing it would reach out of OUTDIR
    series, elsewhere = copy_of(fitted, tmp_path)
    before = sorted(str(p.relative_to(elsewhere)) for p in elsewhere.rglob("*"))
    out = tmp_path / "global"
    out.mkdir()
    (out / "two-step").symlink_to(elsewhere)
    done = dnmr("fit", str(global_series(tmp_path)), "-o", str(out), "--global", "--overwrite", "--serial", "--quiet")
    assert done.returncode == 2 and "link" in one_line(done.stderr)
    assert sorted(str(p.relative_to(elsewhere)) for p in elsewhere.rglob("*")) == before


def test_global_overwrite_of_a_stopped_run_clears_only_dnmrs_files(fitted, tmp_path):
    # a global fit stopped during its two-step stage left only two-step/ (a fit of dnmr's): --overwrite
    # takes the folder back; of an earlier global fit's files only dnmr's own names are removed, never a link
    from dnmr.fitting.globalresult import prepare_global_folder
    from dnmr.fitting.resultsfolder import release_results_folder
    from dnmr.fitting.seriesfile import load_series

    series = load_series(global_series(tmp_path))
    out = tmp_path / "global"
    shutil.copytree(fitted[1], out / "two-step", symlinks=True)
    (out / "notes.txt").write_text("the user's own")
    elsewhere = tmp_path / "their_figure.png"
    elsewhere.write_text("not dnmr's")
    (out / "global_fits.png").symlink_to(elsewhere)
    (out / "global.txt").write_text("an earlier report of dnmr's")
    lock = prepare_global_folder(out, series, overwrite=True)
    try:
        assert "dnmr fit --global" in (out / ".dnmr-lock").read_text()
    finally:
        release_results_folder(lock)
    assert not (out / "global.txt").exists() and not (out / ".dnmr-lock").exists()
    assert (out / "notes.txt").read_text() == "the user's own" and elsewhere.read_text() == "not dnmr's"
    assert (out / "two-step" / "series.json").exists()  # cleared by the two-step fit itself, by its own rules



# --- the folder of a magnetisation-transfer fit (dnmr transfer): the same lock and --overwrite rules -------

@pytest.fixture(scope="module")
def transferred(tmp_path_factory) -> tuple[Path, Path]:
    """An experiment and the folder of its fit, figure as SVG, run under umask 027 (copy before changing it)."""
    folder = tmp_path_factory.mktemp("transfer")
    experiment = experiment_file(folder)
    done = dnmr("transfer", str(experiment), "-o", str(folder / "out"), "--figure-format", "svg", umask=0o027)
    assert done.returncode == 0, done.stderr
    return experiment, folder / "out"


def test_transfer_outputs_honour_the_umask(transferred):
    _, out = transferred
    assert sorted(p.name for p in out.iterdir()) == ["fit.svg", "rates.csv", "results.json"]  # and no lock file
    assert out.stat().st_mode & 0o777 == 0o750
    for path in out.iterdir():
        assert path.stat().st_mode & 0o777 == 0o640, path  # as umask 027 allows: the group reads, others not


def test_transfer_overwrite_replaces_only_its_own_files(transferred, tmp_path):
    experiment, out = copy_of(transferred, tmp_path)
    (out / "notes.txt").write_text("the user's own")
    again = dnmr("transfer", str(experiment), "-o", str(out), "--overwrite")
    assert again.returncode == 0, again.stderr
    assert (out / "notes.txt").read_text() == "the user's own"
    # the earlier run's figure (fit.svg, named in its results.json) went with its results
    assert sorted(p.name for p in out.iterdir()) == ["fit.png", "notes.txt", "rates.csv", "results.json"]


def test_transfer_overwrite_refuses_a_folder_dnmr_never_wrote(tmp_path):
    out = tmp_path / "theirs"
    out.mkdir()
    theirs = {"rates.csv": "their own table", "results.json": '{"program": "their own fit"}',
              "fit.png": "a figure of the user's"}
    for name, text in theirs.items():
        (out / name).write_text(text)
    done = dnmr("transfer", str(experiment_file(tmp_path)), "-o", str(out), "--overwrite")
    assert done.returncode == 2 and "no dnmr transfer results" in one_line(done.stderr)
    assert {p.name: p.read_text() for p in out.iterdir()} == theirs


def test_a_transfer_folder_being_written_is_locked(transferred, tmp_path):
    import fcntl

    experiment, out = copy_of(transferred, tmp_path)
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    with open(out / ".dnmr-lock", "a") as held:  # as a running transfer fit holds it
        fcntl.flock(held, fcntl.LOCK_EX)
        done = dnmr("transfer", str(experiment), "-o", str(out), "--overwrite")
    assert done.returncode == 2 and "another dnmr run" in one_line(done.stderr)
    assert {p.name: p.read_bytes() for p in out.iterdir() if p.name != ".dnmr-lock"} == before


# --- the report (dnmr report): its folder locked while it writes, no link followed, the umask honoured -----

def test_a_report_into_a_folder_being_written_is_refused(fitted, tmp_path):
    import fcntl

    _, out = copy_of(fitted, tmp_path)
    with open(out / ".dnmr-lock", "a") as held:  # as a running fit holds it
        fcntl.flock(held, fcntl.LOCK_EX)
        held.write("dnmr fit, process 1\n")
        held.flush()
        before = sorted(str(p.relative_to(out)) for p in out.rglob("*"))
        done = dnmr("report", str(out), "--overwrite")
    assert done.returncode == 2 and "being written by another dnmr run (dnmr fit" in one_line(done.stderr)
    assert sorted(str(p.relative_to(out)) for p in out.rglob("*")) == before  # no report, no tables


def test_a_report_written_elsewhere_of_a_folder_being_written_is_refused(fitted, tmp_path):
    # the report reads a folder a fit is still writing: refused, and nothing is written where it was asked
    import fcntl

    _, out = copy_of(fitted, tmp_path)
    elsewhere = tmp_path / "elsewhere.html"
    with open(out / ".dnmr-lock", "a") as held:  # as a running fit holds it
        fcntl.flock(held, fcntl.LOCK_EX)
        held.write("dnmr fit, process 1\n")
        held.flush()
        done = dnmr("report", str(out), "-o", str(elsewhere))
    assert done.returncode == 2 and "being written by another dnmr run (dnmr fit" in one_line(done.stderr)
    assert not elsewhere.exists() and not (tmp_path / "elsewhere-supporting-information").exists()


def test_a_report_never_writes_through_a_linked_folder(fitted, tmp_path):
    _, out = copy_of(fitted, tmp_path)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    (elsewhere / "si_rates.csv").write_text("not dnmr's")
    (out / "supporting-information").symlink_to(elsewhere)
    done = dnmr("report", str(out), "--overwrite")
    assert done.returncode == 2 and "link" in one_line(done.stderr)
    assert {p.name: p.read_text() for p in elsewhere.iterdir()} == {"si_rates.csv": "not dnmr's"}
    assert not (out / "report.html").exists()


def test_a_report_of_a_missing_folder_or_into_a_file_writes_nothing(fitted, tmp_path):
    missing = dnmr("report", str(tmp_path / "missing"))
    assert missing.returncode == 2 and "no results.json" in one_line(missing.stderr)
    (tmp_path / "afile").write_text("the user's own")
    into_file = dnmr("report", str(fitted[1]), "-o", str(tmp_path / "afile" / "report.html"))
    assert into_file.returncode == 2 and "not a folder" in one_line(into_file.stderr)
    assert [p.name for p in tmp_path.iterdir()] == ["afile"]  # the folder the report would have made is gone

def test_report_outputs_honour_the_umask(fitted, tmp_path):
    _, out = copy_of(fitted, tmp_path)
    done = dnmr("report", str(out), umask=0o027)
    assert done.returncode == 0, done.stderr
    tables = out / "supporting-information"
    assert tables.stat().st_mode & 0o777 == 0o750 and not (out / ".dnmr-lock").exists()
    for path in [out / "report.html", *tables.iterdir()]:
        assert path.stat().st_mode & 0o777 == 0o640, path  # as umask 027 allows: the group reads, others not


def test_simulate_checks_every_output_before_writing(tmp_path):
    model = SHARED / "model.toml"
    bad_figure = dnmr("simulate", str(model), "-o", str(tmp_path / "s.csv"), "--plot", str(tmp_path / "s.xyz"))
    assert bad_figure.returncode == 2 and "--plot" in one_line(bad_figure.stderr)
    empty = dnmr("simulate", str(model), "-o", "", "--overwrite")
    assert empty.returncode == 2 and "--output" in one_line(empty.stderr)
    assert list(tmp_path.iterdir()) == []


# --- interrupts, orphans, reproducibility ------------------------------------------------------------------

def test_interrupted_fit_resumes_with_its_finished_fits(tmp_path):
    names = tuple(f"t{t}.csv" for t in (250, 255, 260, 265, 270))
    series = series_file(tmp_path, names, (250.0, 255.0, 260.0, 265.0, 270.0))
    out = tmp_path / "out"
    env = {**os.environ, "PYTHONPATH": str(ROOT), "MPLBACKEND": "Agg"}
    run = subprocess.Popen([sys.executable, "-m", "dnmr", "fit", str(series), "-o", str(out), "--serial", "--quiet"],
                           env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and run.poll() is None and not list(out.glob("fits/*.json")):
        time.sleep(0.05)
    run.send_signal(signal.SIGINT)
    _, err = run.communicate(timeout=60)
    assert "Traceback" not in err, err
    finished = {p.name for p in (out / "fits").glob("*.json")}
    assert finished and not (out / ".dnmr-lock").exists()
    resumed = dnmr("fit", str(series), "-o", str(out), "--serial", "--quiet", "--resume", "--no-report")
    assert resumed.returncode == 0, resumed.stderr
    import json

    reused = {s["index"] for s in json.loads((out / "results.json").read_text())["spectra"] if s["reused"]}
    # every spectrum taken from the earlier run had its fit stored before the interrupt (the stage names
    # depend on the series: slow-exchange, held or main)
    assert reused and reused <= {int(name[:3]) for name in finished}


POOLS = {  # every pool of the fitting wing: the series fit's runner and the global fit's evaluator
    "series fit": ("from dnmr.fitting.runner import FitRunner\n"
                   "from dnmr.fitting.seriesfile import load_series\n"
                   "from dnmr.io.progress import ProgressReport\n"
                   "pool = FitRunner(load_series(sys.argv[1]), None, 2, ProgressReport(False), False).pool\n"),
    "global fit": ("from types import SimpleNamespace\n"
                   "from dnmr.fitting.globalsolve import GlobalEvaluator\n"
                   "pool = GlobalEvaluator(SimpleNamespace(members=[0, 1]), 2).own_pool\n"),
}


@pytest.mark.parametrize("fit", POOLS)
def test_workers_end_with_their_parent(fit, tmp_path):
    # the parent is killed outright (no clean-up of its own); its workers must not outlive it
    code = ("import os, sys, time\n" + POOLS[fit]
            + "futures = [pool.submit(time.sleep, 300) for _ in range(2)]\n"
            "time.sleep(1.0)\n"
            "print(' '.join(str(p) for p in pool._processes), flush=True)\n"
            "time.sleep(300)\n")
    env = {**os.environ, "PYTHONPATH": str(ROOT), "MPLBACKEND": "Agg"}
    parent = subprocess.Popen([sys.executable, "-c", code, str(series_file(tmp_path))], env=env,
                              stdout=subprocess.PIPE, text=True)
    workers = [int(p) for p in parent.stdout.readline().split()]
    assert len(workers) == 2
    parent.kill()
    parent.wait(timeout=30)
    deadline = time.monotonic() + 10
    alive = workers
    while alive and time.monotonic() < deadline:
        alive = [p for p in workers if Path(f"/proc/{p}").exists() and "Z" not in _state(p)]
        time.sleep(0.1)
    assert not alive, f"workers {alive} outlived their parent"


def _state(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return "Z"


def test_serial_and_parallel_fits_give_identical_rates(tmp_path):
    names = ("t250.csv", "t255.csv", "t260.csv", "t270.csv")
    series = series_file(tmp_path, names, (250.0, 255.0, 260.0, 270.0))
    serial = dnmr("fit", str(series), "-o", str(tmp_path / "serial"), "--serial", "--quiet", "--no-report")
    parallel = dnmr("fit", str(series), "-o", str(tmp_path / "parallel"), "--workers", "2", "--quiet", "--no-report")
    assert serial.returncode == 0 and parallel.returncode == 0, serial.stderr + parallel.stderr
    assert (tmp_path / "serial" / "rates.csv").read_bytes() == (tmp_path / "parallel" / "rates.csv").read_bytes()


# --- values out of range given as options ------------------------------------------------------------------

MODEL = str(SHARED / "model.toml")
OUT_OF_RANGE = [
    ["plan", MODEL, "--barrier-kj-mol", "-5"],  # faster than kB T/h at every temperature
    ["plan", MODEL, "--barrier-kj-mol", "-1e5"],
    ["plan", MODEL, "--enthalpy-kj-mol", "50", "--entropy-j-mol-k", "1e300"],
    ["plan", MODEL, "--barrier-kj-mol", "60", "--frequencies-mhz", "1e300"],
    ["timescale", MODEL, "--barrier-kj-mol", "60", "--temperature-k", "1e300"],
    ["timescale", MODEL, "--barrier-kj-mol", "nan"],
    ["thermometer", "methanol", "--spectrum", str(SHARED / "t250.csv"), "--frequency-mhz", "1e300"],
]


@pytest.mark.parametrize("args", OUT_OF_RANGE, ids=lambda a: " ".join(a[2:] if a[0] != "thermometer" else a[-2:]))
def test_values_out_of_range_are_refused(args):
    ended, status, output = run_limited(args)
    assert ended == "exit" and status == 2, output
    one_line(output)


def test_stack_refuses_an_empty_or_endless_list_before_any_work(tmp_path):
    model = SHARED / "model.toml"
    empty = dnmr("stack", str(model), "--rates-per-s", "", "-o", str(tmp_path / "s.png"))
    assert empty.returncode == 2 and "--rates-per-s" in one_line(empty.stderr)
    many = ",".join(str(k) for k in range(1, 10_001))
    endless = dnmr("stack", str(model), "--rates-per-s", many, "-o", str(tmp_path / "s.png"))
    assert endless.returncode == 2 and "at most" in one_line(endless.stderr)
    assert list(tmp_path.iterdir()) == []


def test_a_bad_calibration_file_is_refused_before_any_fit(tmp_path):
    # the calibration is read before the spectra are fitted: one line, exit 2, no results folder
    bad = tmp_path / "calibration.csv"
    bad.write_text("setpoint,true\n250,251\n")
    out = tmp_path / "out"
    run = dnmr("fit", str(series_file(tmp_path)), "-o", str(out), "--serial", "--quiet",
               "--calibration", str(bad))
    assert run.returncode == 2, run.stderr
    assert "Traceback" not in run.stderr and len(run.stderr.strip().splitlines()) == 1, run.stderr
    assert "calibration.csv" in run.stderr
    assert not out.exists()


def test_a_lock_taken_on_a_removed_lock_file_guards_nothing_and_is_refused(tmp_path, monkeypatch):
    # the holder releases (and removes) the lock file between a second run's open() and its flock(), and a
    # third run creates a new one: the second run's lock is on a removed file and must not let it go on
    # (common practice with flock: compare the locked file with the one at the path)
    import fcntl

    from dnmr.errors import InputError
    from dnmr.fitting.resultsfolder import lock_results_folder, release_results_folder

    first, real_flock, runs = lock_results_folder(tmp_path), fcntl.flock, {}

    def flock_just_after_release(handle, flags):
        if not runs:
            runs["busy"] = True
            release_results_folder(first)
            runs["third"] = lock_results_folder(tmp_path)
        return real_flock(handle, flags)

    monkeypatch.setattr(fcntl, "flock", flock_just_after_release)
    with pytest.raises(InputError, match="being written by another dnmr run"):
        lock_results_folder(tmp_path)
    release_results_folder(runs["third"])


def mathtext_layouts_kept() -> int:
    """How many math-text layouts (with their fonts) this process keeps."""
    from matplotlib.mathtext import MathTextParser

    return MathTextParser._parse_cached.cache_info().currsize


def test_workers_do_not_read_fonts_through_their_parents_files():
    """matplotlib's own note (font_manager.py: FT2Font objects cannot be used across fork()s): a worker forked from a
    process that drew math text inherited its fonts, which read their files through the parent's open files with one
    shared read position; drawing in both at once failed ("failed to load glyph", seen in a series fit run after
    another in one process).  A worker starts without them."""
    import matplotlib.pyplot as plt

    from dnmr.fitting.workers import in_worker, process_pool

    figure = plt.figure()
    figure.text(0.5, 0.5, "k = 12 s$^{-1}$")
    figure.canvas.draw()
    plt.close(figure)
    assert mathtext_layouts_kept() > 0
    pool = process_pool(1)
    try:
        assert pool.submit(in_worker, os.getpid(), mathtext_layouts_kept).result() == 0
    finally:
        pool.shutdown()


def test_a_figure_that_cannot_be_drawn_loses_no_fit(tmp_path, monkeypatch):
    """Drawing can fail (a font library's error was seen once in a worker): the fits, rates.csv, results.json and
    the other figures stand, and the spectrum's notes say which figure is missing and why."""
    import json

    from dnmr.fitting import runner
    from dnmr.fitting.series import fit_series

    real = runner.fit_figure

    def fails_on_the_first(model, fit_data, curves, path):
        if path.name.startswith("000_"):
            raise RuntimeError("FT_Load_Glyph failed: too many hints")
        return real(model, fit_data, curves, path)

    monkeypatch.setattr(runner, "fit_figure", fails_on_the_first)
    result = fit_series(series_file(tmp_path), tmp_path / "out", workers=1, progress=False)
    assert all(o.fitted for o in result.outcomes)
    figures = sorted(p.name for p in (tmp_path / "out" / "figures").iterdir())
    assert len(figures) == 1 and figures[0].startswith("001_")
    spectra = json.loads((tmp_path / "out" / "results.json").read_text())["spectra"]
    assert any("not drawn (RuntimeError: FT_Load_Glyph failed" in n for n in spectra[0]["notes"])
    assert (tmp_path / "out" / "rates.csv").exists()
