"""Notebooks: dnmr's results show themselves in Jupyter (report and inline figure), and the example
notebook runs a whole study on the bundled demo data in a real kernel (nbclient, ipykernel)."""
from __future__ import annotations

import base64
import os
import re
from pathlib import Path

import nbformat
import pytest
from nbclient import NotebookClient

import dnmr
from dnmr.demo import demo_data_dir
from dnmr.io.modelfile import read_toml

ROOT = Path(__file__).resolve().parent.parent
NOTEBOOK = ROOT / "examples" / "demo_study.ipynb"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # the first eight bytes of every PNG file (PNG specification, ISO/IEC 15948)


def embedded_pngs(html: str) -> list[bytes]:
    return [base64.b64decode(m) for m in re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', html)]


def test_simulated_spectrum_shows_its_summary_and_figure():
    model = dnmr.load_model(demo_data_dir() / "model.toml")
    html = dnmr.simulate(model.at_temperature(300.0), points=512)._repr_html_()
    assert "A simulated spectrum on a ppm grid" in html and "<pre>" in html and "MHz" in html
    pngs = embedded_pngs(html)
    assert len(pngs) == 1 and pngs[0].startswith(PNG_SIGNATURE)


def test_a_figure_that_cannot_be_drawn_is_said_and_the_text_still_shows():
    from dnmr.notebook import NotebookView

    class Broken(NotebookView):
        """A result whose figure fails."""

        def report(self):
            return "numbers <&> words"

        def plot(self):
            raise RuntimeError("no data")

    html = Broken()._repr_html_()
    assert "numbers &lt;&amp;&gt; words" in html and "(no figure: RuntimeError: no data)" in html


@pytest.fixture(scope="module")
def executed(tmp_path_factory):
    """The example notebook, run top to bottom in a fresh kernel (in a scratch folder)."""
    notebook = nbformat.read(NOTEBOOK, as_version=4)
    here = tmp_path_factory.mktemp("notebook")
    path = os.pathsep.join(p for p in (str(ROOT), os.environ.get("PYTHONPATH", "")) if p)
    previous = os.environ.get("PYTHONPATH")
    os.environ["PYTHONPATH"] = path  # the kernel imports this checkout's dnmr
    try:
        NotebookClient(notebook, timeout=300, kernel_name="python3",
                       resources={"metadata": {"path": str(here)}}).execute()
    finally:
        if previous is None:
            os.environ.pop("PYTHONPATH")
        else:
            os.environ["PYTHONPATH"] = previous
    return notebook


def cell_html(notebook, source_start: str) -> str:
    cell = next(c for c in notebook.cells if c.cell_type == "code" and c.source.strip().endswith(source_start))
    return "".join(o.get("data", {}).get("text/html", "") for o in cell.outputs)


@pytest.mark.parametrize("last_line, heading", [
    ("dnmr.simulate(model.at_temperature(300.0))", "A simulated spectrum on a ppm grid"),
    ("measured", "A measured 1D spectrum"),
    ("fit", "The fit of a whole series"),
    ("fit.outcomes[1].fit", "The fit of one spectrum"),
    ("eyring", "Eyring (and Arrhenius) analysis"),
    ("plan", "Everything to know before booking the magnet"),
])
def test_every_result_of_the_notebook_shows_its_report_and_figure(executed, last_line, heading):
    html = cell_html(executed, last_line)
    assert heading in html and "<pre>" in html
    assert [p[:8] for p in embedded_pngs(html)] == [PNG_SIGNATURE]
    assert "Traceback" not in html


def test_notebook_recovers_the_invented_barrier(executed):
    """The demo spectra were made from an invented truth (dnmr/data/demo/truth.toml); four of them give
    ΔG‡(298.15 K) within a few tenths of a kJ/mol of it."""
    truth = read_toml(demo_data_dir() / "truth.toml")
    text = cell_html(executed, "eyring")
    found = re.search(r"[dΔ]G‡\(298\.15 K\)\s+([\d.]+) ± ([\d.]+) kJ/mol", text.replace("&#x27;", "'"))
    assert found, "the Eyring report shows ΔG‡ at 298.15 K"
    value, error = map(float, found.groups())
    assert abs(value - truth["gibbs_298_kj_mol"]) < max(4 * error, 0.3)
    assert "toluene-d8" in cell_html(executed, "plan")
