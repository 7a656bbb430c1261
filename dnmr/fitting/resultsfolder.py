"""The results folder of a series fit: what it holds, the lock of the run writing it, and the rules for
writing into one that exists (refused, unless ``overwrite`` replaces an earlier dnmr fit's files or
``resume`` continues it).  The global fit's folder (:mod:`dnmr.fitting.globalresult`) and the folder of a
magnetisation-transfer fit (:func:`dnmr.fitting.transfer.transfer_folder`) follow the same rules with the
same lock, and ``dnmr report`` takes the lock of the folder it writes into.

Every file is written atomically; inputs are never written over, and only the files an earlier dnmr run
wrote (named in its manifest: ``series.json``, ``global.json``, a transfer fit's ``results.json``) are ever
removed.  A folder a run created is removed again when nothing could be written into it (a full disk).
"""
from __future__ import annotations

import json
import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TextIO

from dnmr.errors import InputError
from dnmr.fitting.seriesfile import Series
from dnmr.io.output import atomic_write_text, json_ready, missing_folders, remove_empty_folders

OUTPUT_FILES = ("rates.csv", "results.json", "series_fits.png", "series.json")
"""The files of a series fit at the top of its results folder (beside them ``report.html`` of ``dnmr report``)."""
RESULT_FOLDERS = ("fits", "figures")
"""The folders of a series fit inside its results folder: the stored fits and the figures."""
STAGE_MAIN, STAGE_SLOW, STAGE_HELD = "main", "slow-exchange", "held"
"""The fits of a spectrum: alone ("main", no trends), in the slow-exchange run with its static parameters free,
or with them held; each is stored as ``fits/NNN_<stage>.json``."""
SUPPORTING_FOLDER = "supporting-information"
"""The folder, inside a results folder, that holds the supporting-information tables of ``dnmr report``."""
REPORT_FILE = "report.html"
"""The report ``dnmr report`` (run by ``dnmr fit`` itself) writes into a results folder."""
LOCK_FILE = ".dnmr-lock"
"""Held (an advisory lock) by the run writing into a results folder; a second run is refused meanwhile."""
STAGES = (STAGE_MAIN, STAGE_SLOW, STAGE_HELD, "posterior")
"""Every stored result of a spectrum (``fits/NNN_<stage>.json``), its posterior included."""


def write_json(path: Path, data) -> None:
    """Write `data` as JSON (:func:`json_text`) to `path` atomically, replacing an earlier file of the results."""
    atomic_write_text(path, json_text(data) + "\n", overwrite=True)


#: A list of more numbers than this is written on one line by :func:`json_text` (a fit's curves, thousands of points).
NUMBERS_ON_ONE_LINE = 64


def json_text(data) -> str:
    """`data` (made :func:`~dnmr.io.output.json_ready`) as JSON text, NaN refused, laid out as ``json.dumps`` with
    ``indent=1`` lays it out, but for a list of more than :data:`NUMBERS_ON_ONE_LINE` numbers: one line (read
    as well, and written by the json module's compiled encoder, not number by number)."""
    return _laid_out(json_ready(data), 0)


def _laid_out(data, depth: int) -> str:
    """JSON-ready `data`, nested `depth` deep, as :func:`json_text` lays it out."""
    inner = "\n" + " " * (depth + 1)
    if isinstance(data, dict) and data:
        items = (f"{json.dumps(k)}: {_laid_out(v, depth + 1)}" for k, v in data.items())
    elif isinstance(data, list) and data and not (len(data) > NUMBERS_ON_ONE_LINE and all(
            type(v) in (int, float) for v in data)):
        items = (_laid_out(v, depth + 1) for v in data)
    else:
        return json.dumps(data, allow_nan=False)
    brackets = "{}" if isinstance(data, dict) else "[]"
    return brackets[0] + inner + ("," + inner).join(items) + "\n" + " " * depth + brackets[1]


def _result_names(series: Series) -> list[str]:
    """Every file (relative to OUTDIR) a fit of `series` may write: what a later --overwrite removes."""
    names = list(OUTPUT_FILES) + [REPORT_FILE]
    for i, s in enumerate(series.spectra):
        names += [f"fits/{i:03d}_{stage}.json" for stage in STAGES]
        names += [f"figures/{i:03d}_{s.file.stem}.png", f"figures/{i:03d}_{s.file.stem}_posterior.png"]
    return names


def series_inputs(series: Series) -> list[Path]:
    """The files a fit of `series` reads: the series file, the model file and the spectra."""
    return [series.source, series.model_file] + [s.file for s in series.spectra]


def refuse_inputs_among(outdir: Path, inputs: Sequence[str | Path], files: Sequence[str],
                        folders: Sequence[str]) -> None:
    """Refuse when one of the `inputs` (files a run reads, e.g. :func:`series_inputs`) is one of the `files`
    or lies in one of the `folders` (both relative to `outdir`) that the run writes."""
    ours = {(outdir / name).resolve() for name in files}
    for p in inputs:
        inside = any(Path(p).resolve().is_relative_to((outdir / f).resolve()) for f in folders)
        if Path(p).resolve() in ours or inside:
            raise InputError(f"the input {p} would be overwritten by the results; choose another output folder",
                             where="--output")


def refuse_linked_folders(outdir: Path, folders: Sequence[str]) -> None:
    """Refuse a link or a file where dnmr writes a folder of its own inside `outdir` (`folders`): dnmr never
    writes, nor removes, through a link out of the results folder."""
    for folder in folders:
        if (outdir / folder).is_symlink() or (outdir / folder).exists() and not (outdir / folder).is_dir():
            raise InputError(f"{outdir / folder} is a link or a file, not a folder of dnmr's; dnmr writes only "
                             "inside the results folder: remove it or choose another folder", where="--output")


def holds_results(outdir: Path) -> bool:
    """Whether `outdir` exists and holds anything besides the lock file."""
    return outdir.is_dir() and any(p.name != LOCK_FILE for p in outdir.iterdir())


@dataclass
class FolderLock:
    """The lock a run holds on its results folder (:func:`lock_results_folder`).

    Attributes
    ----------
    folder : Path
        The results folder.
    handle : file
        The open lock file, holding an exclusive advisory lock (released when closed or when the
        process ends).
    created : list of Path
        The folders the run created to write into, deepest first (the results folder and any missing
        parents, and subfolders made by :meth:`make_folders`): removed again on release when nothing
        could be written into them.
    """

    folder: Path
    handle: TextIO
    created: list[Path] = field(default_factory=list)

    def make_folders(self, names: Sequence[str]) -> None:
        """Create the subfolders `names` of the results folder that are missing (removed again on release
        when nothing could be written into them)."""
        for name in names:
            path = self.folder / name
            if not path.is_dir():
                path.mkdir()
                self.created.insert(0, path)


def lock_results_folder(outdir: Path, program: str = "dnmr fit") -> FolderLock:
    """Create the folder `outdir` when it is missing and take its lock for `program`, or refuse when another
    run holds it; release it with :func:`release_results_folder`."""
    import fcntl

    created = missing_folders(outdir)
    try:
        outdir.mkdir(parents=True, exist_ok=True)
        handle = open(outdir / LOCK_FILE, "a+")
    except OSError:
        remove_empty_folders(created)
        raise
    lock = FolderLock(outdir, handle, created)
    try:
        fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        if not _still_the_lock_file(handle):  # taken just as another run released (and removed) it
            raise BlockingIOError
    except OSError:
        handle.seek(0)
        holder = handle.read().strip() or "another process"
        handle.close()
        raise InputError(f"{outdir} is being written by another dnmr run ({holder}); wait for it to finish or "
                         "choose another folder", where="--output") from None
    try:  # unbuffered, so that nothing is left to fail again when the file is closed
        os.ftruncate(handle.fileno(), 0)
        os.write(handle.fileno(), f"{program}, process {os.getpid()}\n".encode())
    except OSError as err:  # a full disk: name the lock file, leave none behind (nor the folder made for it)
        release_results_folder(lock)
        raise OSError(err.errno, err.strerror, handle.name) from None
    return lock


def refuse_folder_being_written(outdir: Path) -> None:
    """Refuse to read the results in `outdir` while another dnmr run holds its lock (a report written
    elsewhere would show half-written results); nothing is created in `outdir`."""
    import fcntl

    path = outdir / LOCK_FILE
    if path.is_symlink() or not path.is_file():
        return
    try:
        with open(path) as handle:
            try:
                fcntl.flock(handle, fcntl.LOCK_SH | fcntl.LOCK_NB)
            except OSError:
                holder = handle.read().strip() or "another process"
                raise InputError(f"{outdir} is being written by another dnmr run ({holder}); wait for it to "
                                 "finish before reporting on it", where="OUTDIR") from None
    except OSError:  # unreadable: the run that wrote it will say so; nothing to refuse here
        return


def _still_the_lock_file(handle) -> bool:
    """Whether the lock file we hold is still the one at its path: a run that releases its lock removes the
    file, so a lock taken on the removed file (opened just before) guards nothing."""
    try:
        here, there = os.fstat(handle.fileno()), os.stat(handle.name)
    except OSError:
        return False
    return (here.st_dev, here.st_ino) == (there.st_dev, there.st_ino)


def release_results_folder(lock: FolderLock) -> None:
    """Release the `lock` of a results folder (:func:`lock_results_folder`), remove its file, and remove the
    folders the run created if nothing could be written into them (a folder that existed before stays)."""
    Path(lock.handle.name).unlink(missing_ok=True)
    lock.handle.close()
    remove_empty_folders(lock.created)


def earlier_manifest(path: Path, program: str) -> dict | None:
    """The manifest at `path` (a JSON file: series.json of a series fit, global.json of a global fit) of an
    earlier run of dnmr's `program`, or None when there is none (or it is a link, or another program's)."""
    if path.is_symlink() or not path.is_file():
        return None
    try:
        data = json.loads(path.read_text())
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) and data.get("program") == program else None


def listed_files(manifest: dict | None) -> list[str]:
    """The files an earlier run's manifest (:func:`earlier_manifest`) names in its list ``files`` (none when
    it names them in no list of names)."""
    listed = (manifest or {}).get("files")
    return [n for n in listed if isinstance(n, str)] if isinstance(listed, list) else []


def remove_earlier_results(outdir: Path, names: Sequence[str]) -> None:
    """Remove the files of an earlier fit named in `names`, and only those: regular files (a link is
    never followed out of `outdir`) inside `outdir` itself."""
    root = outdir.resolve()
    for name in names:
        path = outdir / name
        if ".." in Path(name).parts or Path(name).is_absolute():
            continue
        if path.is_symlink() or not path.is_file() or not path.resolve().is_relative_to(root):
            continue
        path.unlink()


def prepare_results_folder(outdir: Path, series: Series, overwrite: bool, resume: bool):
    """Refuse to overwrite or to write over inputs; clear earlier results when asked; create folders.

    Parameters
    ----------
    outdir : Path
        The results folder.
    series : Series
        The series to be fitted into it (its inputs must lie outside what the fit writes).
    overwrite, resume : bool
        Replace an earlier dnmr fit's results, or continue them (not both).  With `overwrite`, only the
        files an earlier dnmr fit wrote are removed (named in its series.json); a folder holding
        anything else is refused.

    Returns
    -------
    The lock of `outdir` (see :func:`lock_results_folder`), to be released with :func:`release_results_folder` after the run.
    """
    if overwrite and resume:
        raise InputError("--overwrite discards earlier fits and --resume keeps them: choose one", where="--overwrite")
    if outdir.exists() and not outdir.is_dir():
        raise InputError(f"{outdir} is a file; give a folder for the results", where="--output")
    refuse_inputs_among(outdir, series_inputs(series), list(OUTPUT_FILES) + [REPORT_FILE], RESULT_FOLDERS)
    refuse_linked_folders(outdir, RESULT_FOLDERS + (SUPPORTING_FOLDER,))
    existed = holds_results(outdir)
    if existed and not (resume or overwrite):
        raise InputError(f"{outdir} already exists; pass --overwrite to replace its results or --resume to "
                         "continue them", where="--output")
    earlier = earlier_manifest(outdir / "series.json", "dnmr fit") if existed else None
    if existed and earlier is None:
        raise InputError(f"{outdir} holds no dnmr fit results (no series.json of dnmr's), so there is nothing of "
                         f"dnmr's to {'resume' if resume else 'replace'}; choose a new folder",
                         where="--resume" if resume else "--output")
    if resume and earlier.get("series") != str(series.source):
        raise InputError(f"{outdir} holds the results of another series ({earlier.get('series')}); use another "
                         "folder or --overwrite", where="--resume")
    lock = lock_results_folder(outdir)
    try:
        if existed and overwrite:
            remove_earlier_results(outdir, listed_files(earlier) + _result_names(series))
        lock.make_folders(RESULT_FOLDERS)
        names = sorted(set(_result_names(series)) | set(listed_files(earlier) if resume else ()))
        write_json(outdir / "series.json", {"program": "dnmr fit", "series": str(series.source), "files": names})
    except BaseException:
        release_results_folder(lock)
        raise
    return lock


