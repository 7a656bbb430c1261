"""Raw FIDs in: FIDs that nmrglue itself writes in the two major vendors' raw formats (and a processed
NMRPipe spectrum), made from lines of known position and width, come out of dnmr's processing with those
lines where they belong and as wide as they are plus exactly the apodization's line broadening.

Known truth: a FID sum_j a_j exp((2 pi i nu_j - pi w_j) t) is, by the Fourier pair of a decaying
exponential and a Lorentzian (common practice), a spectrum of Lorentzians at nu_j with full width at half
height w_j; multiplying the FID by exp(-pi LB t) makes every width w_j + LB.  A digital filter's group
delay of g dwell times is built in here by the Fourier shift theorem on a long, band-limited record (an
ideal filter), independently of dnmr's removal of it after the transform.
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from nmrglue.fileio import bruker, fileiobase, pipe, varian
from scipy.optimize import curve_fit

from dnmr import read_spectrum
from dnmr.errors import InputError
from dnmr.io.processing import read_fid

SW = 5000.0  # Hz
POINTS = 8192  # complex points: 1.64 s of acquisition, long enough for lines of 1 Hz and more to decay
SF = 400.13  # MHz, frequency of 0 ppm
CARRIER_PPM = 4.75
LINES = [(3.10, 1.6, 1.0), (6.20, 3.0, 0.6)]  # ppm, full width at half height (Hz), amplitude


def fid_of(lines, *, delay_points: float = 0.0) -> np.ndarray:
    """The FID of Lorentzian lines (ppm, width Hz, amplitude) about the carrier; with a group delay, the
    record an ideal (band-limited) digital filter delivers: the signal g dwell times late, ringing before."""
    pad = 16 if delay_points else 1
    t = np.arange(POINTS * pad) / SW
    signal = sum(a * np.exp((2j * math.pi * (ppm - CARRIER_PPM) * SF - math.pi * w) * t) for ppm, w, a in lines)
    if delay_points:
        signal[0] *= 0.5  # the band-limited value at the jump of the signal at t = 0
        k = np.fft.fftfreq(signal.size) * signal.size
        signal = np.fft.ifft(np.fft.fft(signal) * np.exp(-2j * math.pi * k * delay_points / signal.size))
    return 1e7 * signal[:POINTS]


def write_bruker(folder: Path, data: np.ndarray, *, grpdly: float = 0.0, procs_sf: float | None = SF) -> Path:
    """A raw Bruker folder written by nmrglue; the carrier SFO1 at CARRIER_PPM from SF."""
    udic = fileiobase.create_blank_udic(1)
    udic[0].update(size=data.size, complex=True, sw=SW, obs=SF, car=CARRIER_PPM * SF, label="1H", time=True)
    dic = bruker.create_dic(udic)
    sfo1 = SF * (1 + CARRIER_PPM * 1e-6)
    dic["acqus"].update(SW_h=SW, SFO1=sfo1, BF1=SF, O1=CARRIER_PPM * SF, GRPDLY=grpdly or -1, DECIM=16,
                        DSPFVS=20 if grpdly else 0, NUC1="1H", TE=251.5, DTYPA=0, BYTORDA=0)
    bruker.write(str(folder), dic, data.astype(np.complex128), overwrite=True)
    if procs_sf is not None:
        (folder / "pdata" / "1").mkdir(parents=True)
        procs = {"_comments": [], "_coreheader": ["##TITLE= procs", "##JCAMPDX= 5.0"], "SF": procs_sf, "SI": 16384}
        bruker.write_jcamp(procs, str(folder / "pdata" / "1" / "procs"))
    return folder


def write_varian(folder: Path, data: np.ndarray, *, rfl: float | None, rfp: float | None) -> Path:
    """A raw folder of the other vendor written by nmrglue (procpar and fid; rfl, rfp left out when None)."""
    udic = fileiobase.create_blank_udic(1)
    udic[0].update(size=data.size, complex=True, sw=SW, obs=SF, label="H1", time=True)
    dic = varian.create_dic(udic)
    sfrq = SF * (1 + CARRIER_PPM * 1e-6)
    for name, value in {"sfrq": sfrq, "sw": SW, "rfl": rfl, "rfp": rfp, "tn": "H1", "temp": -21.0}.items():
        if value is None:
            continue
        dic["procpar"][name] = varian.create_pdic_param(name, [repr(value) if isinstance(value, float) else value])
    varian.write(str(folder), dic, data.astype(np.complex64), overwrite=True)
    return folder


def lorentzian(x, x0, fwhm, height, base):
    return height * (fwhm / 2) ** 2 / ((x - x0) ** 2 + (fwhm / 2) ** 2) + base


def measured_line(spectrum, ppm: float, width: float) -> tuple[float, float]:
    """Position (ppm) and full width at half height (Hz) of the line near `ppm`, by a least-squares
    Lorentzian (scipy) over +-8 widths."""
    hz = spectrum.ppm * SF
    keep = np.abs(hz - ppm * SF) < 8 * width
    x, y = hz[keep], spectrum.intensity[keep]
    (x0, fwhm, _, _), _ = curve_fit(lorentzian, x, y, p0=[ppm * SF, width, y.max(), 0.0])
    return x0 / SF, abs(fwhm)


@pytest.mark.parametrize("grpdly", [0.0, 67.98])
@pytest.mark.parametrize("lb", [0.0, 1.5])
def test_bruker_fid_lines_where_they_belong_and_as_wide_as_they_are_plus_lb(tmp_path, grpdly, lb):
    folder = write_bruker(tmp_path / "10", fid_of(LINES, delay_points=grpdly), grpdly=grpdly)
    spectrum = read_spectrum(folder, processing={"line_broadening_hz": lb})
    assert spectrum.format == "bruker-fid" and spectrum.frequency_mhz == pytest.approx(SF, rel=1e-12)
    for ppm, width, _ in LINES:
        position, fwhm = measured_line(spectrum, ppm, width + lb)
        assert position == pytest.approx(ppm, abs=2e-5)  # 0.008 Hz at 400 MHz
        assert fwhm == pytest.approx(width + lb, rel=2e-3)
    record = spectrum.metadata["processing"]
    assert record["added_linewidth_hz"] == lb
    steps = [s["step"] for s in record["steps"]]
    assert steps[:2] == ["read", "dc-correction"] and steps[-1] == "referencing"
    assert ("group-delay-removal" in steps) == bool(grpdly) and ("first-point-scaling" in steps) == (not grpdly)
    assert any(f"adds exactly {lb:g} Hz" in n for n in record["notes"]) == bool(lb)


def test_bruker_fid_without_delay_removal_would_be_out_of_phase(tmp_path):
    """The delay matters: read with GRPDLY and phased automatically, the lines are pure absorption
    (the dispersion would make the two sides of each line unequal)."""
    folder = write_bruker(tmp_path / "10", fid_of(LINES, delay_points=67.98), grpdly=67.98)
    spectrum = read_spectrum(folder / "fid")
    hz = spectrum.ppm * SF
    for ppm, width, _ in LINES:
        left, right = np.interp([ppm * SF - width, ppm * SF + width], hz, spectrum.intensity)
        assert left == pytest.approx(right, rel=1e-2)
    step = next(s for s in spectrum.metadata["processing"]["steps"] if s["step"] == "group-delay-removal")
    assert step["group_delay_points"] == 67.98


def test_bruker_reference_from_bf1_without_procs_and_a_chosen_reference(tmp_path):
    folder = write_bruker(tmp_path / "10", fid_of(LINES), procs_sf=None)
    spectrum = read_spectrum(folder, processing={"reference_ppm": [3.10, 3.00]})
    position, _ = measured_line(spectrum, 3.0, 1.6)
    assert position == pytest.approx(3.0, abs=2e-5)
    referencing = spectrum.metadata["processing"]["steps"][-1]
    assert referencing["from"].startswith("acqus BF1") and referencing["shift_ppm"] == pytest.approx(-0.1)


def test_varian_fid_lines_where_they_belong(tmp_path):
    # the vendor's referencing (from memory): the reference line rfp (Hz) is rfl Hz from the low-frequency
    # edge, so the carrier is at sw/2 - rfl + rfp Hz from 0 ppm; here rfl, rfp put the carrier at CARRIER_PPM
    rfp = 0.0
    rfl = SW / 2 - CARRIER_PPM * SF
    folder = write_varian(tmp_path / "s.fid", fid_of(LINES), rfl=rfl, rfp=rfp)
    spectrum = read_spectrum(folder, processing={"line_broadening_hz": 0.5, "zero_fill": 4})
    assert spectrum.format == "varian-fid" and spectrum.metadata["temperature_k"] == pytest.approx(252.15)
    for ppm, width, _ in LINES:
        position, fwhm = measured_line(spectrum, ppm, width + 0.5)
        assert position == pytest.approx(ppm, abs=2e-4)  # reffrq not given: 0 ppm from sfrq and the offset
        assert fwhm == pytest.approx(width + 0.5, rel=2e-3)


def test_given_phase_is_applied_and_recorded(tmp_path):
    folder = write_varian(tmp_path / "s.fid", fid_of(LINES) * np.exp(1j * math.radians(40)), rfl=None, rfp=None)
    auto = read_spectrum(folder)
    phase = next(s for s in auto.metadata["processing"]["steps"] if s["step"] == "phase")
    assert phase["automatic"] and phase["zero_order_deg"] == pytest.approx(-40, abs=0.5)
    given = read_spectrum(folder, processing={"phase_deg": [-40, 0]})
    assert np.allclose(given.intensity, auto.intensity, atol=2e-3 * auto.intensity.max())
    assert "no rfl and rfp" in " ".join(auto.metadata["processing"]["notes"])


@pytest.mark.parametrize("table, where", [
    ({"line_broadening_hz": -1}, "processing.line_broadening_hz"),
    ({"zero_fill": 0}, "processing.zero_fill"),
    ({"phase_deg": [1]}, "processing.phase_deg"),
    ({"apodisation": "sine"}, "processing.apodisation"),
])
def test_bad_processing_options_are_one_line(tmp_path, table, where):
    folder = write_bruker(tmp_path / "10", fid_of(LINES))
    with pytest.raises(InputError) as err:
        read_spectrum(folder, processing=table)
    assert err.value.where == where and "\n" not in str(err.value)


def test_processing_options_refused_for_processed_data(tmp_path):
    path = tmp_path / "s.csv"
    path.write_text("ppm,intensity\n" + "\n".join(f"{i / 10},{i}" for i in range(20)))
    with pytest.raises(InputError, match="raw FIDs"):
        read_spectrum(path, processing={"line_broadening_hz": 1})


def test_truncated_fid_file_is_one_line(tmp_path):
    folder = write_bruker(tmp_path / "10", fid_of(LINES))
    (folder / "fid").write_bytes((folder / "fid").read_bytes()[:1000])
    with pytest.raises(InputError, match="truncated"):
        read_fid(folder)


def test_nmrpipe_spectrum_axis_from_its_header(tmp_path):
    # NMRPipe's header (from memory): FDF2ORIG is the frequency (Hz from 0 ppm) of the last point, points
    # are FDF2SW / size apart and run to lower frequency; the line is placed by that convention alone.
    size, sw, obs, orig = 4096, 4000.0, 400.13, -300.0
    hz = orig + (size - 1 - np.arange(size)) * sw / size
    line_ppm, width = 2.5, 2.0
    data = lorentzian(hz, line_ppm * obs, width, 1.0, 0.0).astype(np.float32)
    udic = fileiobase.create_blank_udic(1)
    udic[0].update(size=size, complex=False, sw=sw, obs=obs, car=orig + sw / 2, label="1H", time=False, freq=True)
    dic = pipe.create_dic(udic)
    dic["FDF2ORIG"] = orig
    path = tmp_path / "spectrum.ft1"
    pipe.write(str(path), dic, data, overwrite=True)
    spectrum = read_spectrum(path)
    assert spectrum.format == "nmrpipe" and spectrum.frequency_mhz == pytest.approx(obs, rel=1e-6)
    position, fwhm = measured_line(spectrum, line_ppm, width)
    assert position == pytest.approx(line_ppm, abs=sw / size / obs / 10)
    assert fwhm == pytest.approx(width, rel=1e-3)


EXCHANGE_MODEL = """title = "invented two-site system for raw FIDs"
[spectrometer]
nucleus = "1H"
frequency_mhz = 400.13
[[state]]
name = "a"
population = 0.5
linewidth_hz = 1.0
shifts_ppm = { H = 4.70 }
[[state]]
name = "b"
population = 0.5
linewidth_hz = 1.0
shifts_ppm = { H = 4.80 }
[[exchange]]
name = "flip"
from = "a"
to = "b"
rate_per_s = 50.0
"""


def exchange_fid(k: float, width_hz: float = 1.0, shifts_ppm=(4.70, 4.80)) -> np.ndarray:
    """FID of two equally populated sites exchanging at k (s^-1), from the Bloch-McConnell equations in the
    time domain (McConnell, J. Chem. Phys. 28, 430 (1958)): dM/dt = A M, M(0) = (1/2, 1/2), solved by
    eigenvectors of A; an independent reference, not dnmr's engine."""
    omega = [2 * math.pi * (p - CARRIER_PPM) * SF for p in shifts_ppm]
    a = np.array([[1j * omega[0] - math.pi * width_hz - k, k], [k, 1j * omega[1] - math.pi * width_hz - k]])
    values, vectors = np.linalg.eig(a)
    weights = np.linalg.solve(vectors, [0.5, 0.5]) * vectors.sum(axis=0)
    t = np.arange(POINTS) / SW
    return 1e7 * (weights[None, :] * np.exp(np.outer(t, values))).sum(axis=1)


def test_series_of_raw_fids_gives_rates_and_linewidths_that_include_lb(tmp_path):
    """Two raw folders at rates on either side of coalescence, processed with 1 Hz line broadening and
    fitted: the rates come out as made, the fitted linewidth is the intrinsic 1 Hz plus exactly the 1 Hz
    of the window, and results.json carries every processing step."""
    import json

    from dnmr.fitting.series import fit_series

    rates = {250.0: 30.0, 300.0: 400.0}
    lines = ['model = "model.toml"', "[fit]", "region_ppm = [4.5, 5.0]", "[processing]", "line_broadening_hz = 1.0"]
    (tmp_path / "model.toml").write_text(EXCHANGE_MODEL)
    for i, (t, k) in enumerate(rates.items()):
        write_bruker(tmp_path / f"{i + 1}", exchange_fid(k))
        lines += ["[[spectrum]]", f'file = "{i + 1}"', f"temperature_k = {t}"]
    lines += ["processing = { zero_fill = 4 }"]  # the last spectrum's own option, merged over the series'
    (tmp_path / "series.toml").write_text("\n".join(lines) + "\n")
    result = fit_series(tmp_path / "series.toml", tmp_path / "out", workers=1, progress=False)
    results = json.loads((tmp_path / "out" / "results.json").read_text())
    for (t, k), entry in zip(rates.items(), results["spectra"]):
        assert entry["status"] == "fitted"
        fit = entry["fit"]
        assert fit["rates"][0]["rate_per_s"] == pytest.approx(k, rel=0.02)
        width = next(p["estimate"] for name, p in fit["parameters"].items() if name.startswith("linewidth_hz"))
        assert width == pytest.approx(1.0 + 1.0, abs=0.02)
        assert entry["processing"]["added_linewidth_hz"] == 1.0
        assert any("adds exactly 1 Hz" in n for n in fit["notes"])
    zero_fills = [e["processing"]["options"]["zero_fill"] for e in results["spectra"]]
    assert zero_fills == [2, 4]
    assert result.exit_status == 0


def test_series_processing_typo_names_its_table(tmp_path):
    from dnmr.fitting.seriesfile import load_series

    (tmp_path / "model.toml").write_text(EXCHANGE_MODEL)
    write_bruker(tmp_path / "1", exchange_fid(30.0))
    (tmp_path / "series.toml").write_text('model = "model.toml"\n[[spectrum]]\nfile = "1"\ntemperature_k = 250\n'
                                          'processing = { line_broadning_hz = 1 }\n')
    with pytest.raises(InputError) as err:
        load_series(tmp_path / "series.toml")
    assert err.value.where == "spectrum[0].processing.line_broadning_hz" and "line_broadening_hz" in str(err.value)
