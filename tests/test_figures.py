"""dnmr's figures: drawn only in dnmr's own palette, which stays apart for colour-blind readers and in grey
scale; closed after the command line saved them, left open when the Python API returns them.

The palette checks use tests/colour_vision.py: CIELAB from the sRGB standard (IEC 61966-2-1) and CIE 15,
and dichromat vision simulated with the matrices of Machado, Oliveira & Fernandes, IEEE TVCG 15, 1291
(2009) (values from memory).  The thresholds are dnmr's design targets; for scale, a CIE 1976 colour
difference of about 2.3 is just noticeable (Sharma, Digital Color Imaging Handbook, 2003; from memory).


(matplotlib keeps every pyplot figure until it is closed and warns beyond 20; a command that writes a
figure file has no further use for it, a notebook user shows and edits the one returned.)  The model is
the invented AB pair of tests/test_planning.py; the rates for `dnmr eyring` follow the Eyring equation
(Eyring, J. Chem. Phys. 3, 107 (1935); tests/reference_eyring.py) for invented activation parameters.
"""
from __future__ import annotations

import itertools

import matplotlib.pyplot as plt
import numpy as np
import pytest
from click.testing import CliRunner
from matplotlib.collections import Collection
from matplotlib.colors import to_hex, to_rgba_array
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.text import Text

import dnmr
import dnmr.io.output
from colour_vision import MACHADO_2009, colour_difference, lightness
from dnmr.cli import cli
from dnmr.io.output import save_figure
from dnmr.reporting.plotting import INK as INK_COLOUR, PALETTE, REGIME_COLOURS, SERIES
from reference_eyring import eyring_rate
from test_planning import MODEL_TOML

TEMPERATURES_K = np.array([250.0, 265.0, 280.0, 295.0, 310.0])


@pytest.fixture
def inputs(tmp_path):
    model = tmp_path / "model.toml"
    model.write_text(MODEL_TOML)
    k = eyring_rate(TEMPERATURES_K, 60.0, -5.0)
    rates = tmp_path / "rates.csv"
    rates.write_text("temperature_k,rate_per_s,rate_stderr\n"
                     + "".join(f"{t:.2f},{r:.17g},{0.05 * r:.17g}\n" for t, r in zip(TEMPERATURES_K, k)))
    return model, rates


COMMANDS = {  # command line (MODEL, RATES and OUT replaced), figure files it writes
    "simulate": (["simulate", "MODEL", "-o", "OUT/s.csv", "--plot", "OUT/s.png"], ["s.png"]),
    "stack": (["stack", "MODEL", "--rates-per-s", "10,100,1000", "-o", "OUT/stack.png"], ["stack.png"]),
    "plan": (["plan", "MODEL", "--barrier-kj-mol", "60", "--spectra", "3", "--plot", "OUT/plan.png"], ["plan.png"]),
    "timescale": (["timescale", "MODEL", "--barrier-kj-mol", "60", "--plot", "OUT/bands.png"], ["bands.png"]),
    "eyring": (["eyring", "RATES", "--plot", "OUT/eyring.png", "--posterior", "--posterior-steps", "100"],
               ["eyring.png", "eyring_posterior.png"]),
}


def run(command: str, inputs, tmp_path):
    """Run one of COMMANDS; returns the click result."""
    model, rates = inputs
    swap = {"MODEL": str(model), "RATES": str(rates)}
    args = [swap.get(w, w.replace("OUT", str(tmp_path))) for w in COMMANDS[command][0]]
    return CliRunner().invoke(cli, args)


@pytest.mark.parametrize("command", sorted(COMMANDS))
def test_cli_closes_the_figures_it_saves(command, inputs, tmp_path):
    written = COMMANDS[command][1]
    before = set(plt.get_fignums())
    result = run(command, inputs, tmp_path)
    assert result.exit_code == 0, result.output
    assert all((tmp_path / name).stat().st_size > 1000 for name in written)
    assert set(plt.get_fignums()) == before


def test_figures_returned_to_python_stay_open(inputs, tmp_path):
    ax = dnmr.simulate(dnmr.load_model(inputs[0])).plot()
    assert ax.figure.number in plt.get_fignums()
    save_figure(ax.figure, tmp_path / "kept.png")  # saving alone keeps it for the notebook
    assert ax.figure.number in plt.get_fignums()
    with pytest.raises(dnmr.InputError, match="already exists"):  # a refused write still closes when asked
        save_figure(ax.figure, tmp_path / "kept.png", close=True)
    assert ax.figure.number not in plt.get_fignums()


# --- the palette ---------------------------------------------------------------------------------------

HUES = [PALETTE[name] for name in SERIES]
MIN_LIGHTNESS_STEP = 12.0  # CIE L* between any two hues: they stay apart in a grey-scale print
MIN_REGIME_LIGHTNESS_STEP = 20.0  # the three regime bands, side by side in one figure
MIN_DICHROMAT_DIFFERENCE = 20.0  # CIE 1976 Delta E between any two hues, also against the white paper


def test_palette_hues_differ_in_lightness():
    steps = np.diff(sorted(lightness(c) for c in HUES))
    assert steps.min() >= MIN_LIGHTNESS_STEP, steps
    regimes = sorted(lightness(c) for c in REGIME_COLOURS.values())
    assert np.diff(regimes).min() >= MIN_REGIME_LIGHTNESS_STEP
    assert [lightness(REGIME_COLOURS[r]) for r in ("slow", "intermediate", "fast")] == sorted(regimes)


@pytest.mark.parametrize("deficiency", [None, *MACHADO_2009])
def test_palette_hues_stay_apart_for_colour_blind_readers(deficiency):
    for first, second in itertools.combinations(HUES + [PALETTE["paper"]], 2):
        assert colour_difference(first, second, deficiency) >= MIN_DICHROMAT_DIFFERENCE, (first, second)


def test_lightness_and_dichromat_simulation_match_published_values():
    # CIE L* of the sRGB mid grey #808080 is 53.59 and of pure red 53.24 (CIE 15 with IEC 61966-2-1;
    # common practice, from memory); a dichromat simulation keeps greys grey (Machado et al. 2009).
    assert lightness("#808080") == pytest.approx(53.59, abs=0.02)
    assert lightness("#ff0000") == pytest.approx(53.24, abs=0.02)
    for deficiency in MACHADO_2009:
        assert colour_difference("#808080", "#ffffff", deficiency) == pytest.approx(
            colour_difference("#808080", "#ffffff"), abs=1e-3)  # matrices given to 6 decimals
    assert lightness("#ffffff") == pytest.approx(100.0, abs=0.01)


# --- every figure in the palette ------------------------------------------------------------------------

def colours_of(fig) -> set[str]:
    """Every colour a visible artist of `fig` draws with (RGB hex; fully transparent ones left out)."""
    fig.canvas.draw()  # maps data to colours (colour-mapped meshes, contours) as a saved file would
    found = []
    for artist in fig.findobj(lambda a: a.get_visible()):
        if isinstance(artist, Line2D):
            found += [artist.get_color(), artist.get_markerfacecolor(), artist.get_markeredgecolor()]
        elif isinstance(artist, Patch):
            found += [artist.get_facecolor(), artist.get_edgecolor()]
        elif isinstance(artist, Collection):
            found += list(artist.get_facecolor()) + list(artist.get_edgecolor())
        elif isinstance(artist, Text) and artist.get_text():
            found.append(artist.get_color())
        elif hasattr(artist, "get_cmap"):
            raise AssertionError(f"{type(artist).__name__} draws with a colour map")
    rgba = to_rgba_array([c for c in found if not (isinstance(c, str) and c == "none")])
    return {to_hex(c[:3]) for c in rgba if c[3] > 0}


def api_figures(inputs):
    """One figure from every plotting function the command line does not already draw."""
    from dnmr.activation.eyring import eyring_fit
    from dnmr.fitting.spectrumfit import fit_spectrum
    from dnmr.reporting.eyringplot import plot_rates
    from dnmr.reporting.plotting import plot_fit_stack
    from dnmr.reporting.posteriorplot import plot_posterior_pairs
    from test_fitting import REGION, measured, mcconnell, two_site_model

    rng = np.random.default_rng(3)
    y = 50.0 * mcconnell(120.0).real + rng.normal(0.0, 0.05, 1000)  # McConnell (1958), tests/closed_forms.py
    fit = fit_spectrum(measured(y), two_site_model(rate=100.0, linewidth=1.2), region_ppm=REGION,
                       linewidth="fixed", baseline_order=0, phase="none", frequency_offset=False)
    k = eyring_rate(TEMPERATURES_K, 60.0, -5.0) * np.exp(rng.normal(0.0, 0.05, TEMPERATURES_K.size))
    lines = [eyring_fit(TEMPERATURES_K, k * scale, 0.05 * k * scale, process=name)
             for scale, name in ((1.0, "flip"), (30.0, "turn"))]
    methods = ["inversion"] * 2 + ["lineshape"] * 2 + ["saturation"]  # rates by magnetisation transfer joined
    joint = eyring_fit(TEMPERATURES_K, k, 0.05 * k, process="flip", method=methods)
    samples = rng.multivariate_normal([60.0, -5.0], [[4.0, 11.0], [11.0, 36.0]], 4000)
    return {"fit": fit.plot(), "fit stack": plot_fit_stack([fit, fit], ["250 K", "260 K"]),
            "rates": plot_rates(lines), "eyring, two processes": dnmr.reporting.eyringplot.plot_eyring(lines),
            "eyring, three methods": dnmr.reporting.eyringplot.plot_eyring([joint, lines[1]]),
            "posterior pairs": plot_posterior_pairs(samples, ["ΔH‡ / kJ mol^-1", "ΔS‡ / J mol^-1 K^-1"],
                                                    true_values=[60.0, None], one_sided=[None, "lower-bound"]),
            "spectra overlaid": overlaid(inputs[0])}


def overlaid(model_file):
    """Several spectra drawn into one Axes: each takes the next palette hue."""
    spectrum = dnmr.simulate(dnmr.load_model(model_file))
    ax = spectrum.plot()
    for _ in SERIES:
        spectrum.plot(ax=ax)
    return ax.figure


def test_every_figure_uses_only_the_palette(inputs, tmp_path, monkeypatch):
    palette = {to_hex(c) for c in PALETTE.values()}
    figures = api_figures(inputs)
    keep = dnmr.io.output.save_figure

    def recording(fig, path, **options):
        figures[path.name] = fig
        options["close"] = False
        keep(fig, path, **options)

    monkeypatch.setattr(dnmr.io.output, "save_figure", recording)
    for command in COMMANDS:
        assert run(command, inputs, tmp_path).exit_code == 0
    assert {"bands.png", "plan.png", "eyring_posterior.png"} <= set(figures)
    for name, fig in figures.items():
        assert colours_of(fig) <= palette, name
        plt.close(fig)


def _chosen_format_in_a_worker() -> str:
    from dnmr.io.output import chosen_figure_format

    return chosen_figure_format()


def test_figure_format_is_decided_in_one_place(tmp_path):
    from concurrent.futures import ProcessPoolExecutor

    from dnmr.io.output import figures_as

    fig = plt.figure()
    with figures_as("pdf"):
        written = save_figure(fig, tmp_path / "fit.png")  # a name dnmr chooses: follows the format
        kept = save_figure(fig, tmp_path / "mine.svg")  # a name the user chose: kept as it is
        with ProcessPoolExecutor(1) as pool:  # worker processes of a series fit follow it too
            assert pool.submit(_chosen_format_in_a_worker).result() == "pdf"
    plt.close(fig)
    assert written.name == "fit.pdf" and written.read_bytes().startswith(b"%PDF")
    assert kept.name == "mine.svg" and b"<svg" in kept.read_bytes()
    assert _chosen_format_in_a_worker() == "png"  # restored after the block


def _fake_fit(height: float, rng):
    """A stand-in for a SpectrumFit: one Lorentzian (Bloch slow-motion lineshape) of the given height."""
    from types import SimpleNamespace

    ppm = np.linspace(0.0, 4.0, 400)
    line = height / (1 + ((ppm - 2.0) / 0.05) ** 2)
    data = line + 0.01 * height * rng.normal(size=ppm.size)
    return SimpleNamespace(ppm=ppm, data=data, fitted=line, baseline=np.zeros_like(ppm), residuals=data - line,
                           noise=SimpleNamespace(sigma=0.01 * height), rates=[], source="x.csv", temperature_k=250.0)


def _texts(fig) -> list[str]:
    return [t.get_text() for t in fig.findobj(Text)]


def test_stacked_fits_show_their_scale_factors_and_residual_bands_are_labelled():
    from dnmr.reporting.plotting import plot_fit_stack, plot_residual_stack, plot_spectrum_fit

    rng = np.random.default_rng(3)
    fits = [_fake_fit(1.0, rng), _fake_fit(0.25, rng)]
    stack = plot_fit_stack(fits, ["250 K", "300 K"])
    texts = _texts(stack)
    assert any(t.strip() == "300 K  (×4.0)" for t in texts) and any(t.strip() == "250 K" for t in texts)
    residuals = plot_residual_stack(fits, ["250 K", "300 K"])
    assert any("±3σ of the noise" in t for t in _texts(residuals))
    single = plot_spectrum_fit(fits[0])
    assert any("±2σ of the noise" in t for t in _texts(single))
    for fig in (stack, residuals, single):
        plt.close(fig)


def test_traces_keep_their_envelope_in_every_pixel_column():
    """Min/max decimation (common practice for drawing long traces): every pixel column keeps the highest and
    the lowest point of the full trace, and its first and last, in order; checked against the full data."""
    from dnmr.reporting.plotting import envelope_points

    rng = np.random.default_rng(7)
    ppm = np.linspace(9.0, 1.0, 16384)  # high to low, as spectra are stored
    y = 1.0 / (1 + ((ppm - 4.2) / 0.01) ** 2) + 0.01 * rng.normal(size=ppm.size)
    columns = 700
    x_kept, y_kept = envelope_points(ppm, y, columns)
    assert 2 * columns <= x_kept.size <= 4 * columns
    assert np.all(np.diff(x_kept) < 0)  # the order along x is kept
    column = lambda x: np.minimum((columns * (x - ppm[0]) / (ppm[-1] - ppm[0])).astype(int), columns - 1)
    full, kept = column(ppm), column(x_kept)
    for c in range(columns):
        assert y_kept[kept == c].max() == y[full == c].max() and y_kept[kept == c].min() == y[full == c].min()
    assert (x_kept[0], x_kept[-1], y_kept[0], y_kept[-1]) == (ppm[0], ppm[-1], y[0], y[-1])
    assert envelope_points(ppm[:1000], y[:1000], columns)[0].size == 1000  # few points a column: all kept


def test_a_fit_figure_drawn_again_in_place_is_the_figure_of_the_new_fit():
    """A series draws every fit into the panels of the figure it drew before; the image is that of a new figure."""
    from dnmr.io.output import figure_bytes
    from dnmr.reporting.plotting import plot_spectrum_fit

    rng = np.random.default_rng(3)
    first, second = _fake_fit(1.0, rng), _fake_fit(0.25, rng)
    second.temperature_k, second.source = 300.0, "y.csv"
    fresh = figure_bytes(plot_spectrum_fit(second), close=True)
    reused = plot_spectrum_fit(first)
    assert plot_spectrum_fit(second, figure=reused) is reused
    assert figure_bytes(reused, close=True) == fresh


def test_figures_are_cut_to_what_is_drawn_as_matplotlib_cuts_them():
    """A PNG drawn once and cut to its drawing has the size of matplotlib's own tight crop (savefig with
    bbox_inches="tight", the reference) within a few pixels; a figure drawn beyond its edges keeps all of it
    (matplotlib crops it), and a figure not said to be inside its edges is always cropped by matplotlib."""
    import io

    from PIL import Image

    from dnmr.io.output import figure_bytes

    def size(data: bytes) -> tuple[int, int]:
        return Image.open(io.BytesIO(data)).size

    fig, ax = plt.subplots(figsize=(6.0, 4.0))
    ax.plot([0.0, 1.0], [0.0, 1.0], color=INK_COLOUR)
    ax.set_title("title")
    ax.set_ylabel("intensity")
    reference = io.BytesIO()
    fig.savefig(reference, format="png", dpi=150, bbox_inches="tight")
    cut = size(figure_bytes(fig, inside=True))
    assert all(abs(a - b) <= 3 for a, b in zip(cut, size(reference.getvalue()))), (cut, size(reference.getvalue()))
    ax.text(1.0, 0.5, "across the right edge", transform=ax.transAxes)
    assert size(figure_bytes(fig, inside=True))[0] > 6.0 * 150
    ax.text(1.3, 0.5, "beyond the right edge", transform=ax.transAxes)
    assert size(figure_bytes(fig, close=True))[0] > 6.5 * 150


def test_png_files_read_back_in_pillow_as_the_pixels_written():
    """dnmr writes its PNG files itself (dnmr.io.output.png_file: rows unfiltered, deflated); Pillow, a reader of
    the PNG standard (ISO/IEC 15948) of its own, reads back the same pixels, resolution and text, and its
    check of every chunk's CRC passes."""
    import io

    from PIL import Image

    from dnmr.io.output import png_file

    rng = np.random.default_rng(11)
    for channels, mode in ((3, "RGB"), (4, "RGBA")):
        image = rng.integers(0, 256, size=(37, 53, channels), dtype=np.uint8)
        data = png_file(image, 150, {"Software": "dnmr test"})
        Image.open(io.BytesIO(data)).verify()
        read = Image.open(io.BytesIO(data))
        assert read.mode == mode and np.array_equal(np.asarray(read), image)
        assert read.info["Software"] == "dnmr test" and round(read.info["dpi"][0]) == 150
