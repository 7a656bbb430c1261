"""How dnmr's results show themselves in a Jupyter notebook: their report and their figure, inline.

Every result class (spectra, fits, series fits, Eyring and global results, plans...) inherits
:class:`NotebookView`, whose ``_repr_html_`` is what Jupyter displays for the last value of a cell: the
first line of the class's docstring as a heading, the result's ``report()`` (else its ``str``) as
preformatted text, and the figure its ``plot()`` draws as an embedded PNG image.
"""
from __future__ import annotations

import base64
import html

FIGURE_DPI = 96
"""Resolution (dots per inch) of the figures embedded in a notebook."""


class NotebookView:
    """Mixin: Jupyter shows the result as its report and its figure."""

    __slots__ = ()

    def _repr_html_(self) -> str:
        """The result as HTML for Jupyter: heading, report text, figure (embedded PNG)."""
        return result_html(self)


def result_html(result) -> str:
    """HTML of `result`: the first line of its class docstring, its report (or str), its figure.

    A figure that cannot be drawn (a failed fit has none) is replaced by one line saying why.
    """
    title = (type(result).__doc__ or type(result).__name__).strip().splitlines()[0].rstrip(".")
    report = getattr(result, "report", None)
    text = report() if callable(report) else str(result)
    parts = [f"<p><strong>{html.escape(title)}</strong></p>", f"<pre>{html.escape(text)}</pre>"]
    if callable(getattr(result, "plot", None)):
        try:
            parts.append(figure_html(result.plot()))
        except Exception as err:  # the text still shows; say why the figure does not
            parts.append(f"<p>(no figure: {html.escape(f'{type(err).__name__}: {err}')})</p>")
    return '<div class="dnmr-result">' + "".join(parts) + "</div>"


def figure_html(figure) -> str:
    """An ``<img>`` element holding `figure` (a matplotlib Figure, or Axes) as an embedded PNG; the figure
    is closed, so that the notebook does not show it a second time."""
    from dnmr.io.output import figure_bytes  # the one renderer of figures; called only through _repr_html_

    figure = getattr(figure, "figure", figure)  # an Axes gives its Figure
    data = base64.b64encode(figure_bytes(figure, "png", FIGURE_DPI, close=True)).decode("ascii")
    return f'<img alt="figure" src="data:image/png;base64,{data}"/>'
