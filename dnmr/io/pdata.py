"""Processed 1D spectrometer folders: ``pdata/N`` holding ``procs`` and ``1r``.

A processed folder, the experiment folder that contains ``pdata/1``, or its ``1r`` file, read by nmrglue
with the intensity scale ``2**NC_proc`` applied.  The first point of ``1r`` lies at ``OFFSET`` ppm and
points are ``SW_p / SI`` Hz apart (the frequency spacing of an SI-point discrete Fourier transform),
running to lower ppm.  The parameters are checked against the size of ``1r`` before it is read.
"""
from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np

from dnmr.errors import InputError
from dnmr.io.measured import (MAX_POINTS, MIN_POINTS, MeasuredSpectrum, assemble_spectrum, checked_frequency,
                              reconcile_frequency)

def _pdata_folder(path: Path) -> Path:
    """The folder holding procs and 1r for a 1r file, a pdata/N folder or an experiment folder."""
    if path.is_file():
        return path.parent
    if (path / "1r").exists() or (path / "procs").exists():
        return path
    pdata = path / "pdata"
    if pdata.is_dir():
        procnos = sorted(p.name for p in pdata.iterdir() if p.is_dir())
        if "1" in procnos or len(procnos) == 1:
            return pdata / ("1" if "1" in procnos else procnos[0])
        raise InputError(
            f"the experiment holds several processed spectra (pdata/{', pdata/'.join(procnos) or '?'}); "
            "name the one to read"
        )
    raise InputError(
        "this folder holds neither a processed spectrum (procs and 1r) nor a pdata folder"
    )


def _procs(folder: Path) -> dict:
    """Processing parameters of `folder`, checked so that reading 1r stays bounded."""
    from nmrglue.fileio import bruker

    for name in ("procs", "1r"):
        if not (folder / name).is_file():
            raise InputError(
                f"{folder / name} is missing; process the spectrum (Fourier transform, phase) "
                "first or export it as JCAMP-DX",
            )
    if (folder / "proc2s").exists():
        raise InputError("this is a 2D processed spectrum; dnmr reads 1D spectra", where="proc2s")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            procs = bruker.read_jcamp(str(folder / "procs"), encoding="latin-1")
    except (ValueError, IndexError, OSError) as exc:
        raise InputError(f"cannot parse the processing parameters ({exc})", where="procs") from None
    for key in ("SI", "SF", "OFFSET", "SW_p"):
        if not isinstance(procs.get(key), (int, float)):
            raise InputError(f"the parameter {key} is missing or not a number", where=f"procs {key}")
    si = procs["SI"]
    if not isinstance(si, int) or not MIN_POINTS <= si <= MAX_POINTS or procs["SF"] <= 0 or procs["SW_p"] <= 0:
        raise InputError(
            f"SI={si}, SF={procs['SF']}, SW_p={procs['SW_p']} do not describe a 1D spectrum of "
            f"{MIN_POINTS} to {MAX_POINTS} points",
            where="procs",
        )
    expected = si * (8 if procs.get("DTYPP") == 2 else 4)
    actual = (folder / "1r").stat().st_size
    if actual != expected:
        raise InputError(
            f"1r holds {actual} bytes but SI={si} points need {expected}; the data are truncated "
            "or belong to other parameters",
            where="1r",
        )
    return procs


def read_pdata(path: Path, frequency_mhz: float | None, axis: str | None) -> MeasuredSpectrum:
    """The spectrum of a processed 1D folder (or its experiment folder, or its 1r file); `frequency_mhz` (MHz),
    when given, must agree with the recorded SF (`axis` is not used: the folder records its axis)."""
    from nmrglue.fileio import bruker

    folder = _pdata_folder(path)
    procs = _procs(folder)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        dic, data = bruker.read_pdata(str(folder), scale_data=True)  # applies 2**NC_proc
    si, sf, offset, sw_p = procs["SI"], procs["SF"], procs["OFFSET"], procs["SW_p"]
    ppm = offset - np.arange(si) * (sw_p / (sf * si))
    frequency_mhz = reconcile_frequency(checked_frequency(sf, "procs SF"), frequency_mhz, "procs SF")
    acqus = dic.get("acqus", {})
    metadata = {
        "folder": str(folder),
        "nucleus": (acqus.get("NUC1") or procs.get("AXNUC") or None),
        "temperature_k": acqus.get("TE"),
        "offset_ppm": offset,
        "sw_hz": sw_p,
        "si": si,
        "nc_proc": procs.get("NC_proc"),
    }
    return assemble_spectrum(ppm, np.asarray(data, dtype=float).ravel(), frequency_mhz, path,
                     "bruker-pdata", metadata, lambda i: f"1r point {i + 1}")
