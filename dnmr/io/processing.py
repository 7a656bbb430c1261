"""Raw 1D FIDs in, processed spectra out: reading the spectrometer's raw folders and processing inside dnmr.

Formats (read through nmrglue)
------------------------------
``bruker-fid``
    A raw 1D experiment folder (``acqus`` and ``fid``) or its ``fid`` file.  The digital filter's group
    delay (``GRPDLY`` in acqus; for firmware ``DSPFVS`` 10-13 the delay of its ``DECIM`` from nmrglue's
    table) is removed exactly after the Fourier transform, as the linear phase the delay puts on the
    spectrum (Fourier shift theorem).  0 ppm is at ``SF`` of ``pdata/1/procs`` when the folder has it,
    else at ``BF1`` (no ``SR``); the carrier ``SFO1`` sits at ``(SFO1 - SF) / SF`` (x 1e6) ppm.
``varian-fid``
    A raw 1D folder of the other major vendor (``procpar`` and ``fid``, usually named ``*.fid``) or its
    ``fid`` file.  The axis follows the vendor's referencing (from memory): the reference line ``rfp``
    (Hz) lies ``rfl`` Hz from the low-frequency edge of the spectrum, so the carrier ``sfrq`` is at
    ``(sw / 2 - rfl + rfp)`` Hz, and 0 ppm at ``reffrq`` MHz (when procpar has it, else ``sfrq`` less
    that offset).  Without ``rfl`` and ``rfp`` the carrier is put at 0 ppm, and a note says so.
``nmrpipe``
    A processed 1D spectrum in NMRPipe's format (``.ft``, ``.ft1``...), real part, axis from its header.

A folder that also holds a processed spectrum (``pdata/N/1r``) is still read as processed data; name its
``fid`` file to process the raw FID instead.

Processing (:func:`process`, in this order; every step and its parameters go into the spectrum's
``metadata["processing"]``, which ``dnmr fit`` copies into results.json)
-------------------------------------------------------------------------------------------------------
1. DC correction: the mean of the last eighth of the FID (where the signal has decayed) is subtracted.
2. First-point scaling by 1/2 when the FID starts at t = 0 (no group delay), so that the discrete Fourier
   transform is the trapezoid rule of the continuous one and the baseline has no offset (Otting, Widmer
   & Wuthrich, J. Magn. Reson. 66, 187 (1986)).  Not for digitally filtered FIDs, whose t = 0 lies
   inside the record.
3. Apodization: exponential line broadening, the FID times ``exp(-pi * LB * t)``.  This is the only
   window offered, because its effect on the spectrum is exact and known: a decaying exponential and a
   Lorentzian are a Fourier pair, so the window convolves the spectrum with a Lorentzian of full width
   LB at half height and adds exactly LB Hz to the width of every line (common practice).  In dnmr's
   model every single-quantum coherence decays at pi x linewidth_hz, so the window is the same as LB
   added to every state's linewidth_hz: the exchange rates are unaffected and a fitted linewidth_hz
   includes LB (intrinsic width = fitted - LB).  The record says so (``added_linewidth_hz``).
4. Zero filling to the next power of two of at least ``zero_fill`` times the acquired points.
5. Fourier transform (numpy's FFT; frequencies ascending, nmrglue's sign convention for these formats),
   then removal of the group delay as the linear phase ``exp(2 pi i f g dw)``.
6. Phasing: zero- and first-order phases given (degrees; first order across the whole spectral width,
   pivot at the carrier), or automatic: zero order only, the phase that makes the integral of the
   spectrum (the FID at t = 0) real and positive, since the dispersion mode integrates to nothing;
   the fit's ``phase`` option refines what is left.
7. Referencing: the spectrometer's reference as above, then optionally a shift so that a line seen at
   one ppm lands at the ppm it belongs at (``reference_ppm = [seen, true]``).

The processed spectrum's intensity is the real part times the dwell time (arbitrary units).
"""
from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from dnmr.errors import InputError
from dnmr.io.measured import MAX_POINTS, MIN_POINTS, MeasuredSpectrum, assemble_spectrum, reconcile_frequency

RAW_FORMATS = ("bruker-fid", "varian-fid")
"""Raw FID formats, read and processed here."""
PIPE_MAGIC = 2.345
"""The number NMRPipe writes as the third float of its header (its byte-order check)."""
DC_TAIL_FRACTION = 1 / 8
"""Fraction of the FID, at its end, whose mean is taken as the receiver's DC offset."""
DECAY_WARNING = 0.05
"""A FID whose last points are still this fraction of its largest gets a note (not decayed, or noisy)."""


@dataclass(frozen=True)
class ProcessingOptions:
    """How a raw FID is processed (see the module docstring for each step).

    Attributes
    ----------
    line_broadening_hz : float
        Exponential line broadening LB (Hz, >= 0); adds exactly LB to the full width at half height
        of every line (default 0).
    zero_fill : int
        Zero fill to the next power of two of at least this many times the acquired points (1 to 16,
        default 2).
    phase_deg : (float, float) or None
        Zero- and first-order phase (degrees); None for automatic zero order (default).
    dc_correction : bool
        Subtract the receiver's DC offset (default True).
    reference_ppm : (float, float) or None
        A line seen at the first shift (ppm) belongs at the second; None keeps the spectrometer's
        referencing (default).
    """

    line_broadening_hz: float = 0.0
    zero_fill: int = 2
    phase_deg: tuple[float, float] | None = None
    dc_correction: bool = True
    reference_ppm: tuple[float, float] | None = None

    def __post_init__(self) -> None:
        lb = self.line_broadening_hz
        if isinstance(lb, bool) or not isinstance(lb, (int, float)) or not (math.isfinite(lb) and lb >= 0):
            raise InputError(f"expected a line broadening of 0 Hz or more, got {lb!r}", where="line_broadening_hz")
        if isinstance(self.zero_fill, bool) or not isinstance(self.zero_fill, int) or not 1 <= self.zero_fill <= 16:
            raise InputError(f"expected a whole number from 1 to 16, got {self.zero_fill!r}", where="zero_fill")
        if not isinstance(self.dc_correction, bool):
            raise InputError(f"expected true or false, got {self.dc_correction!r}", where="dc_correction")
        for key in ("phase_deg", "reference_ppm"):
            value = getattr(self, key)
            if value is not None:
                object.__setattr__(self, key, _pair(value, key))
        object.__setattr__(self, "line_broadening_hz", float(lb))

    @classmethod
    def from_mapping(cls, table: Mapping) -> "ProcessingOptions":
        """Options from a table of the attribute names (a ``processing`` table of a series file)."""
        from dnmr.io.modelfile import check_keys

        allowed = {f.name for f in cls.__dataclass_fields__.values()}
        check_keys(table, allowed, "")
        return cls(**table)

    def to_dict(self) -> dict:
        """The options as plain data."""
        return {k: list(v) if isinstance(v, tuple) else v for k, v in asdict(self).items()}


def _pair(value, key: str) -> tuple[float, float]:
    ok = (isinstance(value, (list, tuple)) and len(value) == 2
          and all(isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) for v in value))
    if not ok:
        raise InputError(f"expected two numbers, got {value!r}", where=key)
    return float(value[0]), float(value[1])


@dataclass(frozen=True, eq=False)
class FID:
    """A raw 1D free induction decay and what is needed to put its spectrum on a ppm axis.

    Attributes
    ----------
    data : ndarray
        Complex points, one per dwell time 1 / spectral_width_hz.
    spectral_width_hz : float
        Spectral width (Hz).
    reference_mhz : float
        Frequency of 0 ppm (MHz).
    carrier_ppm : float
        Chemical shift of the carrier, the centre of the spectrum (ppm).
    group_delay_points : float
        Digital-filter group delay (dwell times); 0 for a FID that starts at t = 0.
    source : str
        Path read.
    format : str
        ``"bruker-fid"`` or ``"varian-fid"``.
    metadata : dict
        Nucleus, temperature, where the referencing came from, notes.
    """

    data: np.ndarray
    spectral_width_hz: float
    reference_mhz: float
    carrier_ppm: float
    group_delay_points: float
    source: str
    format: str
    metadata: dict = field(default_factory=dict)

    @property
    def dwell_s(self) -> float:
        """Time between points (s)."""
        return 1.0 / self.spectral_width_hz


# ---------------------------------------------------------------------------------------------
# detecting and reading


def raw_format(path: str | Path) -> str | None:
    """``"bruker-fid"``, ``"varian-fid"``, ``"nmrpipe"``, or None when `path` is none of these."""
    path = Path(path)
    if path.is_dir():
        if not (path / "fid").is_file() or _has_processed(path):
            return None
        folder = path
    elif path.name == "fid":
        folder = path.parent
    else:
        return "nmrpipe" if _is_pipe(path) else None
    if (folder / "acqus").is_file():
        return "bruker-fid"
    if (folder / "procpar").is_file():
        return "varian-fid"
    return None


def _has_processed(folder: Path) -> bool:
    return (folder / "1r").exists() or any((folder / "pdata").glob("*/1r"))


def _is_pipe(path: Path) -> bool:
    """True when the file starts with an NMRPipe header (its byte-order float 2.345 third)."""
    try:
        with open(path, "rb") as handle:
            head = handle.read(12)
    except OSError:
        return False
    if len(head) < 12:
        return False
    return any(abs(float(np.frombuffer(head, dtype=f"{order}f4")[2]) - PIPE_MAGIC) < 1e-3 for order in "<>")


def read_fid(path: str | Path) -> FID:
    """Read a raw 1D FID (a vendor's raw folder or its ``fid`` file).

    Parameters
    ----------
    path : str or Path
        The folder (Bruker: ``acqus`` and ``fid``; the other vendor: ``procpar`` and ``fid``) or its
        ``fid`` file.

    Returns
    -------
    FID

    Raises
    ------
    InputError
        Not a raw 1D folder, missing or inconsistent parameters, a truncated or oversized fid file.
    """
    path = Path(path)
    fmt = raw_format(path)
    if fmt not in RAW_FORMATS:
        raise InputError("not a raw 1D folder: expected acqus and fid, or procpar and fid", source=path)
    folder = path if path.is_dir() else path.parent
    try:
        return (_read_bruker if fmt == "bruker-fid" else _read_varian)(folder)
    except InputError as err:
        raise err.located(source=folder) from None


def _number(table: Mapping, key: str, record: str, *, positive: bool = True) -> float:
    value = table.get(key)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or (positive and value <= 0):
        raise InputError(f"the parameter {key} is missing or not a {'positive ' if positive else ''}number",
                         where=f"{record} {key}")
    return float(value)


def _check_fid_size(fid_file: Path, points: int, bytes_per_point: int, record: str) -> None:
    """Refuse point counts outside the bounds and fid files too short for them, before reading."""
    if not MIN_POINTS <= points <= MAX_POINTS:
        raise InputError(f"{points} complex points; a 1D FID here has {MIN_POINTS} to {MAX_POINTS}", where=record)
    size = fid_file.stat().st_size
    if size < points * bytes_per_point:
        raise InputError(f"the fid file holds {size} bytes but {points} complex points need "
                         f"{points * bytes_per_point}; the data are truncated or belong to other parameters",
                         where="fid")


def _bruker_group_delay(acqus: Mapping) -> tuple[float, str]:
    """Group delay (dwell times) of the digital filter and where it came from."""
    from nmrglue.fileio.bruker import bruker_dsp_table

    grpdly = acqus.get("GRPDLY", -1)
    if isinstance(grpdly, (int, float)) and grpdly > 0:
        return float(grpdly), "acqus GRPDLY"
    dspfvs, decim = acqus.get("DSPFVS"), acqus.get("DECIM")
    if dspfvs in bruker_dsp_table:
        if decim not in bruker_dsp_table[dspfvs]:
            raise InputError(f"DECIM={decim} is not a decimation of firmware DSPFVS={dspfvs}", where="acqus DECIM")
        return float(bruker_dsp_table[dspfvs][decim]), f"DSPFVS {dspfvs}, DECIM {decim} (nmrglue's table)"
    return 0.0, "none (no GRPDLY, no filter firmware of a known delay)"


def _read_bruker(folder: Path) -> FID:
    from nmrglue.fileio import bruker

    if any((folder / name).exists() for name in ("acqu2s", "ser")):
        raise InputError("this is a 2D (or arrayed) experiment; dnmr reads 1D FIDs", where="acqu2s")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            acqus = bruker.read_jcamp(str(folder / "acqus"), encoding="latin-1")
        except (ValueError, IndexError, OSError) as exc:
            raise InputError(f"cannot parse the acquisition parameters ({exc})", where="acqus") from None
    td = int(_number(acqus, "TD", "acqus"))
    sw, sfo1, bf1 = (_number(acqus, k, "acqus") for k in ("SW_h", "SFO1", "BF1"))
    _check_fid_size(folder / "fid", td // 2, 16 if acqus.get("DTYPA") == 2 else 8, "acqus TD")
    reference, referenced_by = bf1, "acqus BF1 (no procs with SF; SR taken as 0)"
    procs_file = folder / "pdata" / "1" / "procs"
    if procs_file.is_file():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            procs = bruker.read_jcamp(str(procs_file), encoding="latin-1")
        if isinstance(procs.get("SF"), (int, float)) and procs["SF"] > 0:
            reference, referenced_by = float(procs["SF"]), "pdata/1/procs SF"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        dic, data = bruker.read(str(folder), read_pulseprogram=False, read_procs=False)
    data = np.asarray(data).ravel()[: td // 2]
    delay, delay_from = _bruker_group_delay(acqus)
    metadata = {"nucleus": acqus.get("NUC1") or None, "temperature_k": acqus.get("TE"),
                "referenced_by": referenced_by, "group_delay_from": delay_from, "carrier_mhz": sfo1, "notes": []}
    return FID(data, sw, reference, (sfo1 - reference) * 1e6 / reference, delay, str(folder), "bruker-fid", metadata)


def _procpar_value(procpar: Mapping, key: str):
    entry = procpar.get(key)
    if not entry or not entry.get("values"):
        return None
    text = entry["values"][0]
    try:
        return float(text)
    except (TypeError, ValueError):
        return text


def _read_varian(folder: Path) -> FID:
    from nmrglue.fileio import varian

    try:
        procpar = varian.read_procpar(str(folder / "procpar"))
    except Exception as exc:  # nmrglue raises assorted errors on a damaged procpar
        raise InputError(f"cannot parse the parameters ({exc})", where="procpar") from None
    values = {k: _procpar_value(procpar, k) for k in ("sfrq", "sw", "np", "rfl", "rfp", "reffrq", "tn", "temp")}
    sfrq, sw, np_total = (_number(values, k, "procpar") for k in ("sfrq", "sw", "np"))
    points = int(np_total) // 2
    _check_fid_size(folder / "fid", points, 4, "procpar np")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            _, data = varian.read(str(folder))
        except Exception as exc:  # nmrglue raises assorted errors on damaged fid files
            raise InputError(f"cannot read the fid ({exc})", where="fid") from None
    data = np.asarray(data)
    if data.ndim > 1 and data.shape[0] > 1:
        raise InputError(f"the fid holds {data.shape[0]} FIDs (an arrayed or 2D experiment); dnmr reads 1D FIDs",
                         where="fid")
    notes = []
    rfl, rfp = values["rfl"], values["rfp"]
    if isinstance(rfl, float) and isinstance(rfp, float):
        carrier_hz = sw / 2 - rfl + rfp
        reference = values["reffrq"] if isinstance(values["reffrq"], float) else sfrq - carrier_hz * 1e-6
        referenced_by = "procpar rfl, rfp" + (", reffrq" if isinstance(values["reffrq"], float) else "")
    else:
        carrier_hz, reference, referenced_by = 0.0, sfrq, "none: 0 ppm put at the carrier"
        notes.append("procpar has no rfl and rfp: 0 ppm is the carrier; give reference_ppm to reference")
    temp = values["temp"]
    metadata = {"nucleus": values["tn"] if isinstance(values["tn"], str) else None,
                "temperature_k": temp + 273.15 if isinstance(temp, float) else None,
                "referenced_by": referenced_by, "group_delay_from": "none (the FID starts at t = 0)",
                "carrier_mhz": sfrq, "notes": notes}
    return FID(data.ravel()[:points], sw, reference, carrier_hz / reference, 0.0, str(folder), "varian-fid", metadata)


# ---------------------------------------------------------------------------------------------
# processing


def process(fid: FID, options: ProcessingOptions | None = None, *, source: str | Path | None = None,
            frequency_mhz: float | None = None) -> MeasuredSpectrum:
    """Process a raw FID into a spectrum on an ascending ppm axis, recording every step.

    Parameters
    ----------
    fid : FID
        The raw FID (:func:`read_fid`).
    options : ProcessingOptions, optional
        Line broadening (Hz), zero filling, phases (degrees), DC correction, referencing (ppm).
    source : str or Path, optional
        The path to name as the spectrum's source (default the FID's).
    frequency_mhz : float, optional
        Spectrometer frequency (MHz) to check the recorded one against (0.1 %).

    Returns
    -------
    MeasuredSpectrum
        With ``metadata["processing"]``: the steps with their parameters, ``added_linewidth_hz`` (the
        apodization's exact addition to every full width at half height) and notes.
    """
    options = options or ProcessingOptions()
    frequency_mhz = reconcile_frequency(fid.reference_mhz, frequency_mhz, "reference frequency")
    data, dwell, delay = np.array(fid.data, dtype=complex), fid.dwell_s, fid.group_delay_points
    steps = [{"step": "read", "format": fid.format, "points": data.size, "spectral_width_hz": fid.spectral_width_hz,
              "acquisition_time_s": data.size * dwell, "group_delay_points": delay,
              "group_delay_from": fid.metadata.get("group_delay_from")}]
    notes = list(fid.metadata.get("notes", []))
    if options.dc_correction:
        offset = data[-max(int(data.size * DC_TAIL_FRACTION), 1):].mean()
        data -= offset
        steps.append({"step": "dc-correction", "offset": [float(offset.real), float(offset.imag)],
                      "from": f"mean of the last {DC_TAIL_FRACTION:.3g} of the FID"})
    if delay == 0:
        data[0] *= 0.5
        steps.append({"step": "first-point-scaling", "factor": 0.5})
    lb = options.line_broadening_hz
    data *= np.exp(-math.pi * lb * np.arange(data.size) * dwell)
    steps.append({"step": "apodization", "window": "exponential", "line_broadening_hz": lb,
                  "adds_to_every_linewidth_hz": lb})
    decay = _decay_ratio(data)
    if decay > DECAY_WARNING:
        notes.append(f"the last points of the FID are still {decay:.0%} of its largest: the signal had not "
                     "decayed (a cut-off FID puts ripples beside each line: acquire longer or raise "
                     "line_broadening_hz) or the noise is high")
    size = 1 << math.ceil(math.log2(options.zero_fill * data.size))
    steps.append({"step": "zero-filling", "points": size})
    spectrum = np.fft.fftshift(np.fft.fft(data, size)) * dwell
    offsets_hz = np.fft.fftshift(np.fft.fftfreq(size, dwell))
    steps.append({"step": "fourier-transform", "points": size, "spacing_hz": fid.spectral_width_hz / size})
    if delay:
        spectrum *= np.exp(2j * math.pi * offsets_hz * delay * dwell)
        steps.append({"step": "group-delay-removal", "group_delay_points": delay,
                      "first_order_phase_deg": 360.0 * delay})
    spectrum, phase_step = _phased(spectrum, offsets_hz / fid.spectral_width_hz, options.phase_deg)
    steps.append(phase_step)
    shift = 0.0 if options.reference_ppm is None else options.reference_ppm[1] - options.reference_ppm[0]
    ppm = fid.carrier_ppm + offsets_hz / fid.reference_mhz + shift
    steps.append({"step": "referencing", "reference_mhz": fid.reference_mhz, "carrier_ppm": fid.carrier_ppm,
                  "from": fid.metadata.get("referenced_by"), "shift_ppm": shift})
    record = {"options": options.to_dict(), "steps": steps, "added_linewidth_hz": lb, "notes": notes}
    if lb:
        notes.append(f"exponential apodization of {lb:g} Hz adds exactly {lb:g} Hz to every linewidth: fitted "
                     f"linewidth_hz include it (intrinsic width = fitted - {lb:g} Hz); rates are unaffected")
    metadata = {"nucleus": fid.metadata.get("nucleus"), "temperature_k": fid.metadata.get("temperature_k"),
                "referenced_by": fid.metadata.get("referenced_by"), "processing": record}
    return assemble_spectrum(ppm, spectrum.real, frequency_mhz, Path(source or fid.source), fid.format, metadata,
                     lambda i: f"spectrum point {i + 1}")


def _decay_ratio(data: np.ndarray) -> float:
    """RMS of the last 1/32 of the FID over its largest magnitude."""
    tail = data[-max(data.size // 32, 1):]
    peak = float(np.abs(data).max())
    return float(np.sqrt(np.mean(np.abs(tail) ** 2)) / peak) if peak > 0 else 0.0


def _phased(spectrum: np.ndarray, fraction: np.ndarray, phase_deg: tuple[float, float] | None) -> tuple[np.ndarray, dict]:
    """The spectrum phased (given zero and first order in degrees, first order across the spectral width with
    the pivot at the carrier; or automatic zero order) and the step's record."""
    if phase_deg is None:
        zero, first = -math.degrees(float(np.angle(spectrum.sum()))), 0.0
    else:
        zero, first = phase_deg
    phased = spectrum * np.exp(1j * np.radians(zero + first * fraction))
    return phased, {"step": "phase", "zero_order_deg": zero, "first_order_deg": first,
                    "pivot": "carrier", "automatic": phase_deg is None}


def read_raw(path: str | Path, frequency_mhz: float | None = None,
             processing: ProcessingOptions | Mapping | None = None) -> MeasuredSpectrum:
    """Read a raw 1D FID and process it (:func:`read_fid`, then :func:`process`).

    Parameters
    ----------
    path : str or Path
        The raw folder or its ``fid`` file.
    frequency_mhz : float, optional
        Spectrometer frequency (MHz) to check the recorded one against.
    processing : ProcessingOptions or mapping, optional
        Processing options (a mapping of their names, as in a series file's ``processing`` table).
    """
    if processing is not None and not isinstance(processing, ProcessingOptions):
        try:
            processing = ProcessingOptions.from_mapping(processing)
        except InputError as err:
            raise InputError(err.message, source=path, where=f"processing.{err.where}" if err.where else "processing") from None
    return process(read_fid(path), processing, source=path, frequency_mhz=frequency_mhz)


# ---------------------------------------------------------------------------------------------
# processed spectra of other programs


def read_pipe(path: Path, frequency_mhz: float | None = None, axis: str | None = None) -> MeasuredSpectrum:
    """A processed 1D NMRPipe spectrum: the real part on the axis its header describes."""
    from nmrglue.fileio import pipe

    size = path.stat().st_size
    if not 2048 + 4 * MIN_POINTS <= size <= 2048 + 8 * MAX_POINTS:
        raise InputError(f"the file holds {size} bytes, not a 1D NMRPipe spectrum of {MIN_POINTS} to {MAX_POINTS} points")
    try:
        dic, data = pipe.read(str(path))
    except Exception as exc:  # nmrglue raises assorted errors on damaged files
        raise InputError(f"cannot read the NMRPipe file ({exc})") from None
    if dic.get("FDDIMCOUNT", 1) != 1 or np.ndim(data) != 1:
        raise InputError("this NMRPipe file holds more than one dimension; dnmr reads 1D spectra", where="header FDDIMCOUNT")
    if dic.get("FDF2FTFLAG") != 1:
        raise InputError("this NMRPipe file holds a time-domain FID, not a spectrum; Fourier transform it or "
                         "give the spectrometer's raw folder", where="header FDF2FTFLAG")
    obs = float(dic.get("FDF2OBS", 0.0))
    if not obs > 0:
        raise InputError("the header has no observe frequency", where="header FDF2OBS")
    frequency_mhz = reconcile_frequency(obs, frequency_mhz, "header FDF2OBS")
    ppm = pipe.make_uc(dic, data).ppm_scale()
    metadata = {"nucleus": (dic.get("FDF2LABEL") or "").strip() or None, "sw_hz": float(dic.get("FDF2SW", 0.0)),
                "origin_hz": float(dic.get("FDF2ORIG", 0.0))}
    return assemble_spectrum(np.asarray(ppm, float), np.real(data).astype(float), frequency_mhz, path, "nmrpipe", metadata,
                     lambda i: f"spectrum point {i + 1}")
