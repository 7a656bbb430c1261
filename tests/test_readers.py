"""Tests of dnmr.io.readers on files written by the reference libraries and by the open standard's rules.

Sources named in the checks:
- JCAMP-DX, the IUPAC open standard: McDonald & Wilks, Appl. Spectrosc. 42, 151 (1988) (labelled
  records, ##XYDATA=(X++(Y..Y)) tables, AFFN and the compressed ASDF forms SQZ/DIF/DUP with the
  DIF y-check); its NMR records (.OBSERVE FREQUENCY, .OBSERVE NUCLEUS, .SHIFT REFERENCE, NTUPLES
  pages) from Davies & Lampen, Appl. Spectrosc. 47, 1093 (1993) -- layout from memory.
- Processed 1D folders (pdata/N with procs and 1r) as the reference library nmrglue writes and reads
  them (nmrglue.bruker.write_pdata / read_pdata / guess_udic / unit_conversion).
- Chemical shift from frequency: delta[ppm] = (nu - nu_ref)[Hz] / nu0[MHz] (IUPAC recommendations,
  Harris et al., Pure Appl. Chem. 73, 1795 (2001)).
- A float written with 17 significant digits reads back as the same float (IEEE 754 round trip,
  common practice; dnmr's own CSV writes full precision, CONTRACT section 2).

Test files are generated in tmp_path at run time; the spectra in them are invented data.
"""
from __future__ import annotations

import contextlib
import csv
import hashlib
import io
from pathlib import Path

import jcamp
import nmrglue as ng
import numpy as np
import pytest

from dnmr.errors import InputError
from dnmr.io.measured import MAX_POINTS, MeasuredSpectrum
from dnmr.io.readers import detect_format, read_spectrum

SF_MHZ = 400.13


def _fingerprint(path: Path) -> dict[str, str]:
    files = sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]
    return {str(p): hashlib.sha256(p.read_bytes()).hexdigest() for p in files}


def read_unchanged(path: Path, **kwargs) -> MeasuredSpectrum:
    """read_spectrum, asserting that the input file(s) are byte for byte the same afterwards."""
    before = _fingerprint(path)
    spectrum = read_spectrum(path, **kwargs)
    assert _fingerprint(path) == before
    return spectrum


def raises_naming(path: Path, *fragments: str, **kwargs) -> InputError:
    """Reading `path` raises one-line InputError naming the file and each fragment."""
    with pytest.raises(InputError) as info:
        read_spectrum(path, **kwargs)
    text = str(info.value)
    assert "\n" not in text
    assert str(path) in text
    for fragment in fragments:
        assert fragment in text, text
    return info.value


def invented_lines(ppm: np.ndarray) -> np.ndarray:
    """Two invented Lorentzian lines (arbitrary units) on a small sloping baseline."""
    return 1.0 / (1 + ((ppm - 3.1) / 0.02) ** 2) + 0.5 / (1 + ((ppm - 3.4) / 0.03) ** 2) + 0.01 * ppm


# --------------------------------------------------------------------------------------------------
# two-column text written with numpy


TEXT_LAYOUTS = {
    "comma, header": dict(delimiter=",", header="ppm,intensity", comments=""),
    "tab, header": dict(delimiter="\t", header="Shift (ppm)\tIntensity", comments=""),
    "semicolon, header": dict(delimiter=";", header="PPM;INTENSITY", comments=""),
    "whitespace, no header": dict(delimiter=" "),
    "numpy # header": dict(delimiter=" ", header="ppm intensity"),  # savetxt writes "# ppm intensity"
    "comma, comment lines": dict(delimiter=",", header="written by an invented script\nppm,intensity",
                                 footer="end of data"),
}


@pytest.mark.parametrize("layout", TEXT_LAYOUTS)
@pytest.mark.parametrize("descending", [False, True], ids=["low-to-high", "high-to-low"])
def test_text_layouts_read_back_exactly(tmp_path, layout, descending):
    ppm = np.linspace(2.5, 3.8, 301)
    if descending:
        ppm = ppm[::-1]
    intensity = invented_lines(ppm)
    path = tmp_path / "spectrum.txt"
    np.savetxt(path, np.column_stack([ppm, intensity]), fmt="%.17g", **TEXT_LAYOUTS[layout])
    spectrum = read_unchanged(path)
    order = np.argsort(ppm)
    # 17 significant digits round-trip a double exactly (common practice)
    np.testing.assert_array_equal(spectrum.ppm, ppm[order])
    np.testing.assert_array_equal(spectrum.intensity, intensity[order])
    assert spectrum.format == "text" and spectrum.source == str(path)
    assert spectrum.frequency_mhz is None


def test_contract_csv_layout_uses_ppm_column_and_infers_frequency(tmp_path):
    # CONTRACT section 2: columns ppm, hz, intensity with hz = ppm * frequency_mhz
    ppm = np.linspace(3.8, 2.5, 257)
    intensity = invented_lines(ppm)
    path = tmp_path / "simulated.csv"
    np.savetxt(path, np.column_stack([ppm, ppm * SF_MHZ, intensity]), fmt="%.17g", delimiter=",",
               header="ppm,hz,intensity", comments="")
    spectrum = read_unchanged(path)
    np.testing.assert_array_equal(spectrum.ppm, ppm[::-1])
    np.testing.assert_array_equal(spectrum.intensity, intensity[::-1])
    assert spectrum.frequency_mhz == pytest.approx(SF_MHZ, rel=1e-12)
    np.testing.assert_allclose(spectrum.hz, ppm[::-1] * SF_MHZ, rtol=1e-12)


def test_reads_what_dnmr_simulate_writes(tmp_path):
    # the CSV that `dnmr simulate` writes (CONTRACT section 2), checked against Python's csv module
    from click.testing import CliRunner

    from dnmr.cli import cli

    model = tmp_path / "model.toml"
    model.write_text(
        '[spectrometer]\nnucleus = "1H"\nfrequency_mhz = 400.13\n'
        '[[state]]\nname = "a"\npopulation = 0.6\nlinewidth_hz = 1.0\nshifts_ppm = { H = 3.1 }\n'
        '[[state]]\nname = "b"\npopulation = 0.4\nlinewidth_hz = 1.0\nshifts_ppm = { H = 3.4 }\n'
        '[[exchange]]\nfrom = "a"\nto = "b"\nrate_per_s = 50.0\n'
    )
    out = tmp_path / "simulated.csv"
    result = CliRunner().invoke(cli, ["simulate", str(model), "-o", str(out)])
    assert result.exit_code == 0, result.output
    with open(out, newline="") as handle:
        rows = list(csv.DictReader(handle))
    spectrum = read_unchanged(out)
    order = np.argsort([float(r["ppm"]) for r in rows])
    np.testing.assert_array_equal(spectrum.ppm, [float(rows[i]["ppm"]) for i in order])
    np.testing.assert_array_equal(spectrum.intensity, [float(rows[i]["intensity"]) for i in order])
    assert spectrum.frequency_mhz == pytest.approx(SF_MHZ, rel=1e-9)


def test_contract_csv_frequency_must_agree_with_given_one(tmp_path):
    ppm = np.linspace(2.5, 3.8, 64)
    path = tmp_path / "simulated.csv"
    np.savetxt(path, np.column_stack([ppm, ppm * SF_MHZ, invented_lines(ppm)]), fmt="%.17g",
               delimiter=",", header="ppm,hz,intensity", comments="")
    raises_naming(path, "400.13", "100.6", frequency_mhz=100.6)
    assert read_spectrum(path, frequency_mhz=400.1).frequency_mhz == pytest.approx(SF_MHZ)


def test_hz_axis_in_header_converts_with_given_frequency(tmp_path):
    hz = np.linspace(1600.0, 1000.0, 121)  # high to low
    intensity = invented_lines(hz / SF_MHZ)
    path = tmp_path / "hz.csv"
    np.savetxt(path, np.column_stack([hz, intensity]), fmt="%.17g", delimiter=",",
               header="Frequency [Hz],Intensity", comments="")
    spectrum = read_unchanged(path, frequency_mhz=SF_MHZ)
    # delta = nu / nu0 (Harris et al. 2001), 0 Hz = 0 ppm
    np.testing.assert_allclose(spectrum.ppm, hz[::-1] / SF_MHZ, rtol=1e-15)
    np.testing.assert_array_equal(spectrum.intensity, intensity[::-1])
    assert spectrum.metadata["axis_unit"] == "hz"
    np.testing.assert_allclose(spectrum.hz, hz[::-1], rtol=1e-13)


def test_hz_axis_from_argument_for_headerless_file(tmp_path):
    hz = np.linspace(1000.0, 1600.0, 50)
    path = tmp_path / "hz.txt"
    np.savetxt(path, np.column_stack([hz, invented_lines(hz / SF_MHZ)]), fmt="%.17g")
    spectrum = read_spectrum(path, axis="Hz", frequency_mhz=SF_MHZ)
    np.testing.assert_allclose(spectrum.ppm, hz / SF_MHZ, rtol=1e-15)
    # without the argument the axis would be taken as ppm (documented default), but 1000-1600 "ppm" is a Hz
    # axis by all odds: refused with the fix
    with pytest.raises(InputError, match=r'read as ppm, but it runs from 1000 to 1600: a Hz axis.*"hz,intensity".*axis = "hz"'):
        read_spectrum(path)
    near_zero = tmp_path / "ppm.txt"
    np.savetxt(near_zero, np.column_stack([hz / SF_MHZ, invented_lines(hz / SF_MHZ)]), fmt="%.17g")
    assert read_spectrum(near_zero).ppm[0] == pytest.approx(1000.0 / SF_MHZ)


@pytest.mark.parametrize("header, row, line", [("", "2,5013\t0,0001\n", 1), ("", "2,5013 0,0001\n", 1),
                                               ("ppm\tintensity\n", "2,5013\t0,0001\n", 2)])
def test_decimal_comma_without_semicolons_names_the_fix(tmp_path, header, row, line):
    # common practice: a decimal comma reads only with semicolons between the columns (as spreadsheets export it)
    path = tmp_path / "comma.txt"
    path.write_text(header + row * 10)
    with pytest.raises(InputError, match=rf"line {line}: the numbers use a decimal comma: separate the columns with semicolons"):
        read_spectrum(path)


def test_hz_axis_without_frequency_says_what_to_add(tmp_path):
    path = tmp_path / "hz.csv"
    hz = np.linspace(1000.0, 1600.0, 50)
    np.savetxt(path, np.column_stack([hz, hz * 0 + 1]), delimiter=",", header="hz,intensity",
               comments="")
    raises_naming(path, "Hz", "frequency_mhz")
    headerless = tmp_path / "hz.txt"
    np.savetxt(headerless, np.column_stack([hz, hz * 0 + 1]))
    raises_naming(headerless, "frequency_mhz", axis="hz")


def test_semicolon_decimal_comma_crlf_and_trailing_separator(tmp_path):
    # spreadsheet exports with a decimal comma use ';' between fields (common practice)
    ppm = [3.0 + 0.05 * i for i in range(10)]
    body = "".join(f"{p:.2f};{i * 1.5:.1f};\r\n".replace(".", ",") for i, p in enumerate(ppm))
    path = tmp_path / "export.csv"
    path.write_bytes(("ppm;intensity\r\n" + body).encode())
    spectrum = read_unchanged(path)
    np.testing.assert_allclose(spectrum.ppm, ppm)
    np.testing.assert_allclose(spectrum.intensity, [1.5 * i for i in range(10)])


def test_header_unit_and_axis_argument_must_agree(tmp_path):
    path = tmp_path / "s.csv"
    ppm = np.linspace(2.5, 3.8, 20)
    np.savetxt(path, np.column_stack([ppm, ppm]), delimiter=",", header="ppm,intensity", comments="")
    raises_naming(path, "header", "axis", axis="hz", frequency_mhz=SF_MHZ)


def test_unnamed_columns_beyond_two_are_refused(tmp_path):
    path = tmp_path / "three.txt"
    np.savetxt(path, np.column_stack([np.arange(20.0)] * 3))
    raises_naming(path, "3 columns", "header")
    named = tmp_path / "named.csv"
    np.savetxt(named, np.column_stack([np.arange(20.0)] * 3), delimiter=",", header="a,b,c",
               comments="")
    raises_naming(named, "ppm or hz")


# --------------------------------------------------------------------------------------------------
# malformed text files

ROWS = [f"{3 + 0.01 * i:.2f},{i}\n" for i in range(20)]
GOOD_ROWS = "".join(ROWS)


@pytest.mark.parametrize(
    "content, fragments",
    [
        pytest.param(b"", ["empty"], id="empty"),
        pytest.param(b"# only a comment\n\n", ["no data lines"], id="comments only"),
        pytest.param(b"ppm,intensity\n", ["header but no data"], id="header only"),
        pytest.param(("ppm,intensity\n" + GOOD_ROWS + "3.20,\n").encode(), ["line 22", "truncated"],
                     id="truncated last line"),
        pytest.param(("ppm,intensity\n" + "".join(ROWS[:2]) + "3.03,abc\n" + "".join(ROWS[4:])).encode(),
                     ["line 4", '"abc"'], id="non-numeric"),
        pytest.param(("ppm,intensity\n" + GOOD_ROWS + "3.25,nan\n").encode(), ["line 22", "NaN"],
                     id="nan"),
        pytest.param(("ppm,intensity\n" + GOOD_ROWS + "inf,1\n").encode(), ["line 22", "finite"],
                     id="inf"),
        pytest.param(("ppm,intensity\n" + GOOD_ROWS + "3.05,7\n").encode(),
                     ["line 22", "line 7", "twice"], id="duplicate point"),
        pytest.param(("ppm,intensity\n" + "".join(ROWS[:7])).encode(), ["only 7", "at least 8"],
                     id="too few points"),
        pytest.param(bytes(np.random.default_rng(7).integers(0, 256, 4096, dtype=np.uint8)), ["binary"],
                     id="binary garbage"),
    ],
)
def test_malformed_text_raises_one_line_naming_file_and_line(tmp_path, content, fragments):
    path = tmp_path / "bad.csv"
    path.write_bytes(content)
    error = raises_naming(path, *fragments)
    assert error.source == str(path)
    assert path.read_bytes() == content


def test_missing_file_and_bad_arguments(tmp_path):
    raises_naming(tmp_path / "absent.csv", "no such file")
    path = tmp_path / "s.csv"
    path.write_text("ppm,intensity\n" + GOOD_ROWS)
    raises_naming(path, "frequency_mhz", frequency_mhz=-400.0)
    raises_naming(path, "axis", axis="s")


# --------------------------------------------------------------------------------------------------
# JCAMP-DX


def test_jcamp_written_by_the_jcamp_package(tmp_path):
    # the jcamp package writes ##XYDATA=(X++(Y..Y)) in AFFN with FIRSTX/LASTX to 6 decimals and
    # ordinates to 4 decimals (it puts ##JCAMP-DX before ##TITLE, which readers tolerate)
    hz = np.linspace(1600.0, 1000.0, 601)
    intensity = np.round(1000 * invented_lines(hz / SF_MHZ), 4)
    record = {"title": "invented compound, 233 K", "data type": "NMR SPECTRUM", "xunits": "HZ",
              "yunits": "ARBITRARY UNITS", ".observe frequency": SF_MHZ, ".observe nucleus": "^1H",
              "x": hz, "y": intensity}
    path = tmp_path / "written.jdx"
    with contextlib.redirect_stdout(io.StringIO()):  # the writer prints each point as it goes
        jcamp.writefile(str(path), record)
    spectrum = read_unchanged(path)
    assert spectrum.format == "jcamp-dx"
    assert spectrum.frequency_mhz == SF_MHZ
    assert spectrum.metadata["nucleus"] == "1H"
    # Hz axis from FIRSTX, LASTX, NPOINTS; delta = nu / nu0 (Harris et al. 2001)
    np.testing.assert_allclose(spectrum.ppm, hz[::-1] / SF_MHZ, rtol=1e-13)
    np.testing.assert_allclose(spectrum.intensity, intensity[::-1], atol=5e-5)
    # the other reference library reads the same file to the same ordinates
    with contextlib.redirect_stdout(io.StringIO()):
        np.testing.assert_allclose(jcamp.readfile(str(path))["y"][::-1], spectrum.intensity)


def jcamp_text(table: str, *, records: str, npoints: int, firstx: str, lastx: str, xunits: str) -> str:
    """A minimal JCAMP-DX NMR spectrum in the record order of McDonald & Wilks (##TITLE first)."""
    return (
        "##TITLE= invented compound B in an invented solvent\n"
        "##JCAMP-DX= 5.01\n"
        "##DATA TYPE= NMR SPECTRUM\n"
        f"{records}"
        f"##XUNITS= {xunits}\n"
        "##YUNITS= ARBITRARY UNITS\n"
        "##XFACTOR= 1.0\n"
        "##YFACTOR= 0.5\n"
        f"##FIRSTX= {firstx}\n"
        f"##LASTX= {lastx}\n"
        f"##NPOINTS= {npoints}\n"
        "##XYDATA= (X++(Y..Y))\n"
        f"{table}"
        "##END=\n"
    )


AFFN_TABLE = "8 10 12 12 12 15\n3 14 14 20 21\n"  # AFFN: abscissa (not used) then ordinates
ORDINATES = np.array([10, 12, 12, 12, 15, 14, 14, 20, 21], dtype=float)


def test_jcamp_ppm_axis_hand_written_affn(tmp_path):
    # no library here writes XUNITS=PPM, so this minimal file is written by hand to the standard
    path = tmp_path / "ppm.dx"
    path.write_text(jcamp_text(AFFN_TABLE, records="##.OBSERVE FREQUENCY= 100.61\n##.OBSERVE NUCLEUS= ^13C\n",
                               npoints=9, firstx="8.0", lastx="0.0", xunits="PPM"))
    spectrum = read_unchanged(path)
    np.testing.assert_allclose(spectrum.ppm, np.arange(9.0))
    np.testing.assert_allclose(spectrum.intensity, 0.5 * ORDINATES[::-1])  # YFACTOR applied
    assert spectrum.frequency_mhz == 100.61 and spectrum.metadata["nucleus"] == "13C"


def test_jcamp_asdf_difdup_compression(tmp_path):
    # ASDF encoded by hand from the rules of McDonald & Wilks 1988: SQZ "A0" = 10, DIF K=+2, %=0,
    # DUP T = the previous token twice, L=+3; the next line starts with the y-check "A5" = 15
    # (repeat of the last ordinate, same abscissa), then j=-1, %=0, O=+6, J=+1.
    table = "0 A0K%TL\n4 A5j%OJ\n"
    path = tmp_path / "asdf.jdx"
    path.write_text(jcamp_text(table, records="##.OBSERVE FREQUENCY= 100.0\n", npoints=9,
                               firstx="800.0", lastx="0.0", xunits="HZ"))
    spectrum = read_unchanged(path)
    np.testing.assert_allclose(spectrum.intensity, 0.5 * ORDINATES[::-1])
    np.testing.assert_allclose(spectrum.ppm, np.arange(9.0))  # 0..800 Hz at 100 MHz


def test_jcamp_shift_reference_and_offset(tmp_path):
    # .SHIFT REFERENCE = (kind, compound, point number, shift in ppm) (Davies & Lampen 1993, from
    # memory); $OFFSET is the ppm of the first point in files exported from processed folders
    for records, first_ppm in [
        ("##.OBSERVE FREQUENCY= 100.0\n##.SHIFT REFERENCE= (INTERNAL, TMS, 9, 0.0)\n", 4.0),
        ("##.OBSERVE FREQUENCY= 100.0\n##$OFFSET= 3.5\n", 3.5),
        ("##.OBSERVE FREQUENCY= 100.0\n", 8.0),  # neither: 0 Hz = 0 ppm
    ]:
        path = tmp_path / "ref.jdx"
        path.write_text(jcamp_text(AFFN_TABLE, records=records, npoints=9, firstx="800.0",
                                   lastx="400.0", xunits="HZ"))
        spectrum = read_unchanged(path)
        # 9 points over 400 Hz at 100 MHz: 0.5 ppm apart, running down from the first point
        np.testing.assert_allclose(spectrum.ppm[::-1], first_ppm - 0.5 * np.arange(9), atol=1e-12)


def test_jcamp_ntuples_real_part(tmp_path):
    # NTUPLES layout of Davies & Lampen 1993 (from memory), written by hand; real page used,
    # FACTOR per column applied
    real = np.array([3, 1, 4, 1, 5, 9, 2, 6], dtype=float)
    imag = np.array([2, 7, 1, 8, 2, 8, 1, 8], dtype=float)
    text = (
        "##TITLE= invented compound C\n##JCAMP-DX= 5.01\n##DATA TYPE= NMR SPECTRUM\n"
        "##DATA CLASS= NTUPLES\n##.OBSERVE FREQUENCY= 100.0\n##.OBSERVE NUCLEUS= ^19F\n"
        "##NTUPLES= NMR SPECTRUM\n"
        "##VAR_NAME= FREQUENCY, SPECTRUM/REAL, SPECTRUM/IMAG\n"
        "##SYMBOL= X, R, I\n##VAR_TYPE= INDEPENDENT, DEPENDENT, DEPENDENT\n"
        "##VAR_FORM= AFFN, AFFN, AFFN\n##VAR_DIM= 8, 8, 8\n"
        "##UNITS= HZ, ARBITRARY UNITS, ARBITRARY UNITS\n"
        "##FIRST= 700.0, 3, 2\n##LAST= 0.0, 6, 8\n##FACTOR= 1.0, 2.0, 1.0\n"
        "##PAGE= N=1\n##DATA TABLE= (X++(R..R)), XYDATA\n"
        f"700 {' '.join(f'{v:g}' for v in real)}\n"
        "##PAGE= N=2\n##DATA TABLE= (X++(I..I)), XYDATA\n"
        f"700 {' '.join(f'{v:g}' for v in imag)}\n"
        "##END NTUPLES= NMR SPECTRUM\n##END=\n"
    )
    path = tmp_path / "ntuples.jdx"
    path.write_text(text)
    spectrum = read_unchanged(path)
    np.testing.assert_allclose(spectrum.ppm, np.arange(8.0))
    np.testing.assert_allclose(spectrum.intensity, 2.0 * real[::-1])
    assert spectrum.metadata["nucleus"] == "19F"


def test_jcamp_xypoints_through_jcamp_package(tmp_path):
    # ##XYPOINTS=(XY..XY): abscissa-ordinate pairs, XFACTOR and YFACTOR applied (McDonald & Wilks)
    pairs = "\n".join(f"{700 - 100 * i}, {v}" for i, v in enumerate([5, 3, 8, 1, 9, 2, 6, 4]))
    text = (
        "##TITLE= invented compound D\n##JCAMP-DX= 5.01\n##DATA TYPE= NMR SPECTRUM\n"
        "##.OBSERVE FREQUENCY= 50.0\n##XUNITS= HZ\n##YUNITS= ARBITRARY UNITS\n"
        "##XFACTOR= 2.0\n##YFACTOR= 10.0\n##NPOINTS= 8\n##XYPOINTS= (XY..XY)\n"
        f"{pairs}\n##END=\n"
    )
    path = tmp_path / "pairs.jdx"
    path.write_text(text)
    spectrum = read_unchanged(path)
    np.testing.assert_allclose(spectrum.ppm, 2.0 * np.arange(0, 800, 100) / 50.0)
    np.testing.assert_allclose(spectrum.intensity, 10.0 * np.array([4, 6, 2, 9, 1, 8, 3, 5]))


def _good_jcamp(tmp_path: Path, records: str = "##.OBSERVE FREQUENCY= 100.0\n", **changes) -> Path:
    fields = dict(records=records, npoints=9, firstx="800.0", lastx="0.0", xunits="HZ")
    fields.update(changes)
    path = tmp_path / "bad.jdx"
    path.write_text(jcamp_text(AFFN_TABLE, **fields))
    return path


def test_jcamp_malformed_files(tmp_path):
    raises_naming(_good_jcamp(tmp_path, npoints=10**12), "NPOINTS", str(MAX_POINTS))
    raises_naming(_good_jcamp(tmp_path, npoints=12), "NPOINTS=12", "9 values", "truncated")
    raises_naming(_good_jcamp(tmp_path, xunits="1/CM"), "XUNITS", "not an NMR axis")
    raises_naming(_good_jcamp(tmp_path, records=""), ".OBSERVE FREQUENCY", "frequency_mhz")
    assert read_spectrum(_good_jcamp(tmp_path, records=""), frequency_mhz=100.0).ppm[-1] == 8.0
    raises_naming(_good_jcamp(tmp_path), "100", "400.13", frequency_mhz=SF_MHZ)

    whole = jcamp_text(AFFN_TABLE, records="", npoints=9, firstx="8", lastx="0", xunits="PPM")
    truncated = tmp_path / "truncated.jdx"
    truncated.write_text(whole[: whole.index("3 14")])
    raises_naming(truncated, "##END=", "truncated")

    bomb = tmp_path / "bomb.jdx"  # a DUP count that would expand to 10^9 points
    bomb.write_text(jcamp_text("0 A0s99999999\n", records="", npoints=9, firstx="8", lastx="0",
                               xunits="PPM"))
    raises_naming(bomb, "repeat", "damaged")

    no_block = tmp_path / "noblock.jdx"
    no_block.write_text("##JCAMP-DX= 5.01\n##XUNITS= PPM\n##END=\n")
    raises_naming(no_block, "no 1D spectrum", "##TITLE")

    garbage = tmp_path / "garbage.jdx"
    garbage.write_bytes(b"##TITLE= x\n" + bytes(range(256)) * 8)
    raises_naming(garbage, "binary")


# --------------------------------------------------------------------------------------------------
# processed folders written by nmrglue


def write_processed(root: Path, raw: np.ndarray, *, nc_proc: int = -2, big: bool = False,
                    as_float: bool = False, with_acqus: bool = True) -> dict:
    """An experiment folder with pdata/1 (procs + 1r) written by nmrglue.bruker.write_pdata."""
    procs = {"SI": raw.size, "XDIM": raw.size, "SF": SF_MHZ, "OFFSET": 4.25, "SW_p": 2400.0,
             "NC_proc": nc_proc, "BYTORDP": int(big), "DTYPP": 2 if as_float else 0, "AXNUC": "1H",
             "_coreheader": ["##TITLE= invented processing parameters"], "_comments": []}
    # write_pdata(scale_data=True) stores data / 2**NC_proc, so the 1r file holds `raw` itself
    ng.bruker.write_pdata(str(root), {"procs": procs}, raw * 2.0**nc_proc, scale_data=True,
                          write_procs=True, pdata_folder=1, big=big, isfloat=as_float)
    if with_acqus:
        acqus = {"NUC1": "1H", "SFO1": SF_MHZ + 0.0012, "BF1": SF_MHZ, "TE": 233.2, "SW_h": 2400.0,
                 "O1": 480.0, "AQ_mod": 3, "_coreheader": ["##TITLE= invented acquisition"],
                 "_comments": []}
        ng.bruker.write_jcamp(acqus, str(root / "acqus"))
    return procs


@pytest.mark.parametrize("big, as_float", [(False, False), (True, False), (False, True)],
                         ids=["int32 little-endian", "int32 big-endian", "float64"])
def test_processed_folder_round_trip(tmp_path, big, as_float):
    rng = np.random.default_rng(11)
    raw = rng.integers(-(2**24), 2**24, 1024).astype(float)
    procs = write_processed(tmp_path / "10", raw, nc_proc=-2, big=big, as_float=as_float)
    folder = tmp_path / "10" / "pdata" / "1"
    stored = np.fromfile(folder / "1r", dtype=(">" if big else "<") + ("f8" if as_float else "i4"))
    np.testing.assert_array_equal(stored, raw)
    spectrum = read_unchanged(folder)
    # intensity = stored value * 2**NC_proc (nmrglue.bruker.read_pdata docstring; common practice);
    # the axis runs down from OFFSET in steps of SW_p/SI Hz (DFT bin spacing, common practice)
    np.testing.assert_array_equal(spectrum.intensity, (stored * 2.0**-2)[::-1])
    expected = procs["OFFSET"] - np.arange(1024) * procs["SW_p"] / (SF_MHZ * 1024)
    np.testing.assert_allclose(spectrum.ppm, expected[::-1], rtol=0, atol=1e-12)
    assert spectrum.frequency_mhz == SF_MHZ
    assert spectrum.metadata["temperature_k"] == 233.2 and spectrum.metadata["nucleus"] == "1H"


def test_processed_axis_matches_nmrglue_unit_conversion(tmp_path):
    raw = np.arange(2048, dtype=float)
    write_processed(tmp_path / "1", raw, with_acqus=False)
    folder = tmp_path / "1" / "pdata" / "1"
    dic, data = ng.bruker.read_pdata(str(folder), read_acqus=False)
    reference = ng.fileiobase.uc_from_udic(ng.bruker.guess_udic(dic, data)).ppm_scale()
    spectrum = read_spectrum(folder)
    np.testing.assert_allclose(spectrum.ppm, reference[::-1], rtol=0, atol=1e-12)
    np.testing.assert_allclose(spectrum.intensity, data[::-1])
    assert reference[0] == pytest.approx(4.25)  # first point of 1r at OFFSET


def test_processed_folder_found_from_experiment_folder_or_1r_file(tmp_path):
    raw = np.arange(64, dtype=float) ** 2
    write_processed(tmp_path / "exp", raw)
    direct = read_spectrum(tmp_path / "exp" / "pdata" / "1")
    for path in (tmp_path / "exp", tmp_path / "exp" / "pdata" / "1" / "1r"):
        assert detect_format(path) == "bruker-pdata"
        spectrum = read_spectrum(path)
        np.testing.assert_array_equal(spectrum.ppm, direct.ppm)
        np.testing.assert_array_equal(spectrum.intensity, direct.intensity)


def test_processed_folder_malformed(tmp_path):
    write_processed(tmp_path / "exp", np.arange(256, dtype=float))
    folder = tmp_path / "exp" / "pdata" / "1"
    raises_naming(folder, "frequency_mhz=100.6", frequency_mhz=100.6)

    data = (folder / "1r").read_bytes()
    (folder / "1r").write_bytes(data[:-40])
    raises_naming(folder, "1r holds", "truncated")

    (folder / "1r").write_bytes(data)
    procs_text = (folder / "procs").read_text()
    (folder / "procs").write_text(procs_text.replace("##$SI= 256", "##$SI= 1099511627776"))
    raises_naming(folder, "SI=1099511627776")

    (folder / "procs").write_text(procs_text.replace("##$SF= 400.13\n", ""))
    raises_naming(folder, "SF", "missing")

    (folder / "1r").unlink()
    raises_naming(folder, "1r is missing")

    (tmp_path / "empty").mkdir()
    raises_naming(tmp_path / "empty", "neither a processed spectrum")

    (tmp_path / "exp" / "pdata" / "1").rename(tmp_path / "exp" / "pdata" / "2")
    (tmp_path / "exp" / "pdata" / "3").mkdir()
    raises_naming(tmp_path / "exp", "several processed spectra")


# --------------------------------------------------------------------------------------------------
# the spectrum object


def test_region_hz_and_read_only_arrays(tmp_path):
    ppm = np.linspace(2.5, 3.8, 131)
    path = tmp_path / "s.csv"
    np.savetxt(path, np.column_stack([ppm, invented_lines(ppm)]), fmt="%.17g", delimiter=",",
               header="ppm,intensity", comments="")
    spectrum = read_spectrum(path, frequency_mhz=SF_MHZ)
    cropped = spectrum.region(3.3, 2.9)
    np.testing.assert_array_equal(cropped.ppm, ppm[(ppm >= 2.9) & (ppm <= 3.3)])
    assert cropped.ppm.size == 41 and spectrum.ppm.size == 131
    np.testing.assert_allclose(cropped.hz, cropped.ppm * SF_MHZ)
    with pytest.raises(ValueError):
        spectrum.intensity[0] = 1.0
    with pytest.raises(InputError, match="region"):
        spectrum.region(3.0, 3.02)
    with pytest.raises(InputError, match="frequency"):
        _ = read_spectrum(path).hz
    assert "131 points" in str(spectrum)


def test_detect_format_by_name_and_content(tmp_path):
    plain = tmp_path / "spectrum.dat"
    plain.write_text("##TITLE= x\n")
    assert detect_format(plain) == "jcamp-dx"
    plain.write_text("ppm intensity\n")
    assert detect_format(plain) == "text"
    assert detect_format(tmp_path / "anything.JDX") == "jcamp-dx"
    assert detect_format(tmp_path) == "bruker-pdata"
