"""The HTML report (dnmr.reporting.report and `dnmr report`) of a small invented series fitted here.

The spectra are made by the McConnell closed form (J. Chem. Phys. 28, 430 (1958); tests/closed_forms.py,
through test_series.write_series) at rates from the Eyring equation (Eyring, J. Chem. Phys. 3, 107 (1935))
for invented activation parameters; the coldest spectrum is so slow that its rate is only an upper bound.
The activation parameters the report shows are checked against dnmr.activation.eyring.eyring_fit_file on the same
rates.csv, and the recovered ΔH‡ against the invented truth.
"""
from __future__ import annotations

import base64
import concurrent.futures as futures
import html
import json
import shutil
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from dnmr.activation.eyring import eyring_fit_file
from dnmr.cli import cli
from dnmr.errors import InputError
from dnmr.formatting import format_with_error
from dnmr.reporting.fitsections import rate_text
from dnmr.reporting.report import write_report
from dnmr.fitting.series import fit_series
from test_series import ENTHALPY_KJ_MOL, write_series

TEMPERATURES = [190.0, 270.0, 290.0, 310.0]  # k(190 K) ~ 1e-4 s^-1: far below the linewidth, a bound
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                  "--disable-background-networking", "--disable-component-update", "--disable-sync"]


class _Page(HTMLParser):
    """Collects the img sources, every src/href value, the activation-parameter cells and the text of
    every table row."""

    def __init__(self):
        super().__init__()
        self.images: list[str] = []
        self.links: list[str] = []
        self.parameters: dict[str, tuple[float, str]] = {}
        self.rows: list[list[str]] = []  # text of the cells of every table row
        self._key: tuple[str, float] | None = None
        self._cell: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.links += [attrs[a] for a in ("src", "href") if a in attrs]
        if tag == "img":
            self.images.append(attrs.get("src", ""))
        if tag == "tr":
            self.rows.append([])
        if tag in ("td", "th"):
            self._cell = []
        if "data-key" in attrs:
            self._key = (attrs["data-key"], float(attrs["data-value"]))

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self.rows[-1].append("".join(self._cell))
            self._cell = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)
        if self._key is not None:
            key, value = self._key
            self.parameters[key] = (value, data)
            self._key = None


def parse(text: str) -> _Page:
    page = _Page()
    page.feed(text)
    page.close()
    return page


@pytest.fixture(scope="module")
def fitted(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("report")
    result = fit_series(write_series(folder, TEMPERATURES), folder / "out", workers=1, progress=False)
    assert result.exit_status == 0
    return folder / "out"


@pytest.fixture(scope="module")
def report(fitted) -> Path:
    return write_report(fitted)


@pytest.fixture(scope="module")
def sampled(fitted, tmp_path_factory) -> Path:
    """The same fits (reused by resume) with every spectrum's posterior sampled, and its report.  Few
    draws: this checks what the report shows, not the numbers (tests/test_posterior.py does)."""
    out = tmp_path_factory.mktemp("bayes") / "out"
    shutil.copytree(fitted, out, ignore=shutil.ignore_patterns("report.html", "supporting-information"))
    result = fit_series(fitted.parent / "series.toml", out, resume=True, workers=1, progress=False,
                        posterior={"draws": 300, "seed": 5})
    assert result.exit_status == 0 and all(o.reused for o in result.outcomes)
    return write_report(out)


def test_report_embeds_every_figure_as_png_data(fitted, report):
    page = parse(report.read_text(encoding="utf-8"))
    figures = len(list((fitted / "figures").glob("*.png")))
    assert figures == len(TEMPERATURES)
    assert len(page.images) == figures + 2  # + the series stack and the Eyring plot made by the report
    for src in page.images:
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1], validate=True).startswith(PNG_SIGNATURE)


def test_figures_drawn_ahead_give_the_same_report_and_stale_ones_are_not_used(fitted, tmp_path):
    """dnmr fit has a worker draw its report's Eyring figure beside the fits' figures
    (dnmr.reporting.report.ReportFigures): the report written with it, drawn there or here, is the report written
    without it, to the byte (but the time it was written), and a figure drawn from another rates.csv or
    calibration is not used."""
    import re

    from dnmr.reporting.report import ReportFigures

    out = tmp_path / "out"
    shutil.copytree(fitted, out, ignore=shutil.ignore_patterns("report.html", "supporting-information"))
    written = {}
    for name in ("on a worker", "ahead", "here"):
        ahead = ReportFigures(out)
        if name == "ahead":
            ahead.draw()
        elif name == "on a worker":
            with futures.ProcessPoolExecutor(max_workers=1) as pool:
                ahead.draw(pool.submit)
                assert isinstance(ahead.drawing, futures.Future)
        assert (ahead.eyring is not None) == (name != "here")
        path = write_report(out, overwrite=True, ahead=ahead)
        written[name] = (re.sub(r"report written [0-9TZ:-]+", "", path.read_text()),
                         (out / "supporting-information" / "eyring.png").read_bytes())
    assert written["on a worker"] == written["ahead"] == written["here"]
    stale = ReportFigures(out)
    stale.draw()
    assert stale.drawn_for(out, None, ())
    assert not stale.drawn_for(out, fitted.parent / "calibration.csv", ())  # another calibration
    (out / "rates.csv").write_bytes((out / "rates.csv").read_bytes() + b"\n")  # another rates.csv
    assert not stale.drawn_for(out, None, ())
    write_report(out, overwrite=True, ahead=stale)  # drawn again, here
    assert (out / "supporting-information" / "eyring.png").read_bytes() == written["here"][1]


def test_report_makes_no_external_reference(report):
    text = report.read_text(encoding="utf-8")
    page = parse(text)
    assert page.links and all(link.startswith("data:") for link in page.links)
    assert not any(word in text for word in ("http://", "https://", "<script", "<link", "@import", "url("))


def test_parameters_shown_are_those_of_eyring_fit_file(fitted, report):
    expected = eyring_fit_file(fitted / "rates.csv")[0].to_dict()
    shown = parse(report.read_text(encoding="utf-8")).parameters
    for key in ("enthalpy_kj_mol", "entropy_j_mol_k", "gibbs_298_kj_mol", "gibbs_hm_kj_mol"):
        value, text = shown[key]
        assert value == pytest.approx(expected[key], rel=1e-12)
        stderr_key = key.replace("_kj_mol", "_stderr").replace("_j_mol_k", "_stderr")
        assert text == format_with_error(expected[key], expected[stderr_key])
    assert shown["correlation_enthalpy_entropy"][0] == pytest.approx(expected["correlation_enthalpy_entropy"], rel=1e-12)
    # the invented truth (Eyring 1935 rates for ΔH‡ = 60 kJ/mol) is recovered within 4 standard errors
    assert abs(expected["enthalpy_kj_mol"] - ENTHALPY_KJ_MOL) < 4 * expected["enthalpy_stderr"]


def test_report_names_the_bound_its_reason_inputs_and_cautions(fitted, report):
    text = report.read_text(encoding="utf-8")
    results = json.loads((fitted / "results.json").read_text())
    coldest = min(results["spectra"], key=lambda s: s["temperature_k"])
    assert coldest["fit"]["rates"][0]["status"] == "upper-bound"
    assert "190.0 K, flip: upper-bound" in text
    for s in results["spectra"]:
        assert s["sha256"] in text
    assert "Safety cautions" in text and "liquid nitrogen" in text


def test_report_shows_each_posterior_beside_the_least_squares_result(sampled):
    text = sampled.read_text(encoding="utf-8")
    page = parse(text)
    results = json.loads((sampled.parent / "results.json").read_text())
    figures = sorted((sampled.parent / "figures").glob("*_posterior.png"))
    assert len(figures) == len(TEMPERATURES)
    assert len(page.images) == 2 * len(TEMPERATURES) + 2  # fits, corner figures, series stack, Eyring plot
    embedded = {base64.b64decode(src.split(",", 1)[1]) for src in page.images}
    assert all(f.read_bytes() in embedded for f in figures)
    cells = [row for row in page.rows if len(row) == 7]  # the posterior tables
    for s in results["spectra"]:
        ls, post = s["fit"]["rates"][0], s["posterior"]["quantities"]["rate_per_s_flip"]
        row = next(r for r in cells if r[0] == post["label"] and r[1].startswith(rate_text(ls)))
        if ls["status"] == "upper-bound":  # the coldest spectrum: only the one-sided bound, no median
            assert post["kind"] == "upper-bound"
            assert row[2:6] == ["", "", "", f"< {post['bound95']:.4g}"] and "slow-exchange" in row[6]
        else:
            assert row[2] == f"{post['median']:.4g}"
            assert row[3] == f"{post['ci68'][0]:.4g} to {post['ci68'][1]:.4g}"
            assert row[4] == f"{post['ci95'][0]:.4g} to {post['ci95'][1]:.4g}"
        for note in s["posterior"]["notes"]:
            assert html.escape(note, quote=True) in text
        assert f"{s['posterior']['importance']['draws']} draws from a Student t" in text  # how it was sampled
    # the rate table adds the posterior rate from rates.csv
    assert "posterior k / s^-1: median (95 %) or 95 % bound" in text


def test_report_without_posteriors_says_nothing_of_them(report):
    text = report.read_text(encoding="utf-8")
    assert "posterior" not in text.lower()


def test_text_from_files_is_escaped(fitted, tmp_path):
    copy = tmp_path / "out"
    shutil.copytree(fitted, copy)
    results = json.loads((copy / "results.json").read_text())
    results["notes"] = ['<script>alert("x")</script> & <img src=x>']
    (copy / "results.json").write_text(json.dumps(results))
    text = write_report(copy, output=tmp_path / "escaped.html").read_text(encoding="utf-8")
    assert "&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt; &amp; &lt;img src=x&gt;" in text
    assert "<script" not in text and len(parse(text).images) == len(TEMPERATURES) + 2


def test_refuses_to_overwrite(fitted, report):
    before = report.read_bytes()
    with pytest.raises(InputError, match="already exists"):
        write_report(fitted)
    assert report.read_bytes() == before
    result = CliRunner().invoke(cli, ["report", str(fitted)])
    assert result.exit_code == 2 and "--overwrite" in result.output


def test_refuses_to_write_over_an_input(fitted):
    with pytest.raises(InputError, match="rates.csv"):
        write_report(fitted, output=fitted / "rates.csv", overwrite=True)


def test_calibration_moves_the_temperatures(fitted, tmp_path):
    cal = tmp_path / "cal.csv"
    cal.write_text("setpoint_k,temperature_k\n180,182.5\n250,251.5\n300,301.0\n350,350.5\n")
    text = write_report(fitted, calibration=cal, output=tmp_path / "r.html").read_text(encoding="utf-8")
    from dnmr.activation.temperature_calibration import read_temperature_calibration

    expected = eyring_fit_file(fitted / "rates.csv", calibration=read_temperature_calibration(cal))[0]
    assert parse(text).parameters["enthalpy_kj_mol"][0] == pytest.approx(expected.enthalpy_kj_mol, rel=1e-12)
    assert "corrected by the calibration" in text


@pytest.mark.parametrize("content", [None, '{"spectra": [', "[1, 2]", b"\xff\xfe\x00binary"])
def test_bad_outdir_is_one_line_exit_2(tmp_path, content):
    if isinstance(content, bytes):
        (tmp_path / "results.json").write_bytes(content)
    elif content is not None:
        (tmp_path / "results.json").write_text(content)
    proc = subprocess.run([sys.executable, "-c", "from dnmr.cli import main; main()", "report", str(tmp_path)],
                          capture_output=True, text=True)
    assert proc.returncode == 2
    assert proc.stderr.count("\n") == 1 and "results.json" in proc.stderr and "Traceback" not in proc.stderr
    assert not (tmp_path / "report.html").exists()


def _chromium() -> str | None:
    return next((p for p in (shutil.which("chromium"), "/usr/bin/chromium", shutil.which("chromium-browser"))
                 if p and Path(p).exists()), None)


def test_report_renders_in_headless_chromium(fitted, report, tmp_path):
    browser = _chromium()
    if browser is None:
        pytest.skip("chromium not installed: .ci/run installs Debian's chromium when apt-get is available")
    base = [browser, *CHROMIUM_FLAGS, f"--user-data-dir={tmp_path / 'profile'}"]
    shot = tmp_path / "shot.png"
    subprocess.run(base + [f"--screenshot={shot}", "--window-size=1200,3000", report.as_uri()],
                   capture_output=True, timeout=90, check=True)
    dom = subprocess.run(base + ["--dump-dom", report.as_uri()], capture_output=True, text=True, timeout=90,
                         check=True).stdout
    page = parse(dom)
    assert len(page.images) == len(TEMPERATURES) + 2
    assert all(src.startswith("data:image/png;base64,") for src in page.images)
    assert shot.read_bytes().startswith(PNG_SIGNATURE)
    import matplotlib.image

    pixels = matplotlib.image.imread(shot)[..., :3]
    assert pixels.shape[:2] == (3000, 1200)
    dark = (pixels.mean(axis=2) < 0.5).mean()
    assert 0.005 < dark < 0.5, f"the screenshot is {dark:.1%} dark: not a rendered report"
    assert np.ptp(pixels) > 0.5


# ---------------------------------------------------------------------------------------------
# sample temperatures, supporting-information tables, figure formats, no absolute paths
# ---------------------------------------------------------------------------------------------

CALIBRATION = "setpoint_k,temperature_k\n180,182.5\n250,251.5\n300,301.0\n350,350.5\n"


def _text_outside_figures(text: str) -> str:
    import re

    return re.sub(r'data:[^"]+', "", text)


def test_calibrated_report_shows_sample_temperature_beside_set_point(fitted, tmp_path):
    from dnmr.activation.temperature_calibration import read_temperature_calibration
    from dnmr.activation.thermometers import THERMOMETER_CAUTIONS

    (tmp_path / "cal.csv").write_text(CALIBRATION)
    text = write_report(fitted, calibration=tmp_path / "cal.csv", output=tmp_path / "r.html").read_text(encoding="utf-8")
    page = parse(text)
    true = read_temperature_calibration(tmp_path / "cal.csv").true_temperature(TEMPERATURES)
    header = next(r for r in page.rows if r[:2] == ["T set / K", "sample T / K"])
    assert header[2] == "process"
    for setpoint, t, err in zip(TEMPERATURES, true.temperature_k, true.stderr):
        assert any(r[:2] == [f"{setpoint:.2f}", format_with_error(t, err)] for r in page.rows)
    assert html.escape(THERMOMETER_CAUTIONS, quote=True) in text
    # the supporting-information tables beside the report carry the same sample temperatures
    si = tmp_path / "r-supporting-information"  # beside r.html, named after it
    rows = list(__import__("csv").DictReader((si / "si_rates.csv").open(encoding="utf-8")))
    assert [float(r["setpoint_k"]) for r in rows] == TEMPERATURES
    assert [float(r["temperature_k"]) for r in rows] == pytest.approx(true.temperature_k, rel=1e-12)
    bound = next(r for r in rows if r["status"] == "upper-bound")
    assert bound["gibbs_stderr"] == "" and float(bound["gibbs_lower_kj_mol"]) > 0  # a bound, no error bar
    md = (si / "si_tables.md").read_text(encoding="utf-8")
    expected = eyring_fit_file(fitted / "rates.csv", calibration=read_temperature_calibration(tmp_path / "cal.csv"))[0]
    assert format_with_error(expected.enthalpy_kj_mol, expected.enthalpy_stderr) in md
    assert (si / "si_tables.tex").is_file() and (si / "eyring.png").read_bytes().startswith(PNG_SIGNATURE)


def test_report_holds_no_absolute_path(fitted, report):
    text = _text_outside_figures(report.read_text(encoding="utf-8"))
    root = str(fitted.resolve().parents[1])
    assert root not in text and "/tmp/" not in text
    results = json.loads((fitted / "results.json").read_text())
    first = Path(results["spectra"][0]["file"])
    import os

    assert os.path.relpath(first, fitted.resolve()) in text  # named relative to the results folder


def test_report_embeds_svg_figures_and_writes_the_chosen_format(fitted, tmp_path):
    import matplotlib.pyplot as plt

    from dnmr.io.output import figures_as, save_figure

    copy = tmp_path / "out"
    shutil.copytree(fitted, copy, ignore=shutil.ignore_patterns("report.html", "supporting-information"))
    with figures_as("svg"):  # as `dnmr fit --figure-format svg` draws them
        for png in (copy / "figures").glob("*.png"):
            png.unlink()
            fig = plt.figure()
            fig.gca().plot([0, 1], [0, 1])
            save_figure(fig, png, close=True)
    assert not list((copy / "figures").glob("*.png")) and len(list((copy / "figures").glob("*.svg"))) == 4
    run = CliRunner().invoke(cli, ["report", str(copy), "--figure-format", "pdf"])
    assert run.exit_code == 0, run.output
    page = parse((copy / "report.html").read_text(encoding="utf-8"))
    assert sum(src.startswith("data:image/svg+xml;base64,") for src in page.images) == len(TEMPERATURES)
    assert (copy / "supporting-information" / "eyring.pdf").read_bytes().startswith(b"%PDF")


# --- magnetisation-transfer fits beside the lineshape fits -----------------------------------------------

def _transfer_folders(folder: Path) -> list[Path]:
    """Two selective-inversion fits (dnmr transfer) of the same invented process ("flip") below the series'
    range: integrals from the McConnell (1958) biexponential (tests/reference_transfer.py) at rates from the
    Eyring equation (tests/reference_eyring.py) for the series' activation parameters."""
    from reference_eyring import eyring_rate
    from test_series import ENTROPY_J_MOL_K
    from test_transfer import DELAYS, MODEL_TOML, inversion_data

    from dnmr.fitting.transfer import run_transfer

    (folder / "model.toml").write_text(MODEL_TOML.replace('name = "rotation"', 'name = "flip"'))
    out = []
    for t in (236.0, 246.0):
        y = inversion_data(eyring_rate(t, ENTHALPY_KJ_MOL, ENTROPY_J_MOL_K), seed=int(t))
        (folder / f"si{t:.0f}.csv").write_text("delay_s,syn,anti\n" + "".join(
            f"{float(d)!r},{float(a)!r},{float(b)!r}\n" for d, (a, b) in zip(DELAYS, y)))
        (folder / f"si{t:.0f}.toml").write_text(
            f'model = "model.toml"\ntemperature_k = {t}\nexperiment = "inversion"\ndata = "si{t:.0f}.csv"\n'
            '[options]\ninverted = ["syn"]\n')
        run_transfer(folder / f"si{t:.0f}.toml", folder / f"si{t:.0f}")
        out.append(folder / f"si{t:.0f}")
    return out


def test_transfer_fits_are_shown_and_join_the_eyring_analysis(fitted, tmp_path):
    transfer = _transfer_folders(tmp_path)
    path = write_report(fitted, output=tmp_path / "joint.html", transfer=transfer)
    text = path.read_text(encoding="utf-8")
    page = parse(text)
    assert len(page.images) == len(TEMPERATURES) + 2 + len(transfer)  # + each transfer fit's fit.png
    assert "Magnetisation-transfer fits" in text and "inversion at 236.0 K" in text and "inversion at 246.0 K" in text
    assert text.index('id="fits"') < text.index('id="transfer"') < text.index('id="eyring"')
    expected = eyring_fit_file([fitted / "rates.csv"] + [f / "rates.csv" for f in transfer])[0].to_dict()
    assert expected["methods"]["inversion"] == 2
    value, shown = parse(text).parameters["enthalpy_kj_mol"]
    assert value == pytest.approx(expected["enthalpy_kj_mol"], rel=1e-12)
    assert shown == format_with_error(expected["enthalpy_kj_mol"], expected["enthalpy_stderr"])
    assert abs(expected["enthalpy_kj_mol"] - ENTHALPY_KJ_MOL) < 4 * expected["enthalpy_stderr"]
    assert "inversion (2 rates)" in html.unescape(text)
    si = list(__import__("csv").DictReader((tmp_path / "joint-supporting-information" / "si_rates.csv").open()))
    assert sorted(float(r["temperature_k"]) for r in si) == sorted(TEMPERATURES + [236.0, 246.0])  # transfer rates too
    run = CliRunner().invoke(cli, ["report", str(fitted), "--transfer", str(transfer[0]), "-o", str(tmp_path / "c.html")])
    assert run.exit_code == 0 and (tmp_path / "c.html").is_file()
    bad = CliRunner().invoke(cli, ["report", str(fitted), "--transfer", str(tmp_path), "-o", str(tmp_path / "d.html")])
    assert bad.exit_code == 2 and "dnmr transfer" in bad.output and len(bad.output.strip().splitlines()) == 1
