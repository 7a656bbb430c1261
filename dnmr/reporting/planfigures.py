"""Figures of the planning wing: the exchange regimes against temperature, and the predicted VT stack.

:meth:`dnmr.planning.timescale.TimescaleView.plot` and :meth:`dnmr.planning.plan.ExperimentPlan.plot`
draw through these; the command line saves them with :func:`dnmr.io.output.save_figure`.  Colours come
from the palette of :mod:`dnmr.reporting.plotting`.
"""
from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from matplotlib.figure import Figure

from dnmr.errors import InputError
from dnmr.formatting import rates_text
from dnmr.planning.regimes import PairTimescale
from dnmr.planning.transferplan import TransferRange
from dnmr.reporting.plotting import INK, REGIME_COLOURS, TRANSFER_COLOUR, figure_text, plot_stack, plt


def plot_regimes(pairs: Sequence[PairTimescale], figure: Figure | None = None,
                 transfer: Sequence[TransferRange] = ()) -> Figure:
    """Bands of slow, intermediate and fast exchange against temperature: one panel per field, one row per
    pair, and a row per process for the magnetisation-transfer range.

    Parameters
    ----------
    pairs : sequence of PairTimescale
        With temperatures (activation parameters known).
    figure : matplotlib Figure, optional
    transfer : sequence of TransferRange
        Ranges of magnetisation transfer (the same at every field), drawn under the pairs.

    Returns
    -------
    matplotlib.figure.Figure
        Intermediate exchange is the lineshape range; the transfer range is a bar of its own hue.
    """
    shown = [p for p in pairs if p.slow_below_k is not None and p.fast_above_k is not None]
    if not shown:
        raise InputError("the regime figure needs activation parameters (give a barrier)", where="plot")
    bars = [w for w in transfer if w.low_k is not None and w.high_k is not None and not w.is_empty]
    fields = sorted({p.proton_mhz for p in shown})
    low = min([p.slow_below_k for p in shown] + [w.low_k for w in bars]) - 30.0
    high = max(p.fast_above_k for p in shown) + 30.0
    rows = max(sum(p.proton_mhz == f for p in shown) for f in fields) + len(bars)
    fig = figure if figure is not None else plt.figure(figsize=(7.0, 1.2 + len(fields) * (0.5 + 0.45 * rows)))
    axes = np.atleast_1d(fig.subplots(len(fields), 1, sharex=True, squeeze=False)[:, 0])
    for ax, mhz in zip(axes, fields):
        here = [p for p in shown if p.proton_mhz == mhz]
        for row, p in enumerate(here):
            t_slow, t_fast = sorted((p.slow_below_k, p.fast_above_k))
            spans = {"slow": (low, t_slow - low), "intermediate": (t_slow, t_fast - t_slow),
                     "fast": (t_fast, high - t_fast)}
            for regime, span in spans.items():
                ax.broken_barh([span], (row - 0.35, 0.7), facecolor=REGIME_COLOURS[regime], edgecolor=INK,
                               linewidth=0.5, label=regime if row == 0 else None)
        for row, w in enumerate(bars, start=len(here)):
            ax.broken_barh([(w.low_k, w.high_k - w.low_k)], (row - 0.35, 0.7), facecolor=TRANSFER_COLOUR,
                           edgecolor=INK, linewidth=0.5, label="magnetisation transfer" if row == len(here) else None)
        labels = [f"{p.pair.process_name}: {p.pair.label}" for p in here] + [f"{w.process}: transfer" for w in bars]
        ax.set_yticks(range(len(labels)), [figure_text(text) for text in labels], fontsize=8)
        ax.set_ylim(-0.6, len(labels) - 0.4)
        ax.set_title(figure_text(f"{mhz:g} MHz (1H)"), fontsize=9, loc="left")
    axes[0].legend(ncol=2 if bars else 3, fontsize=8, frameon=False, loc="lower right", bbox_to_anchor=(1.0, 1.0))
    axes[-1].set_xlim(low, high)
    axes[-1].set_xlabel("temperature / K")
    fig.tight_layout()
    return fig


def plot_planned_stack(plan, figure: Figure | None = None) -> Figure:
    """Simulated spectra at the planned temperatures, stacked (lowest at the bottom), one panel per field.

    Parameters
    ----------
    plan : ExperimentPlan
        The plan (:func:`dnmr.planning.plan.plan_experiment`).
    figure : matplotlib Figure, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    shown = [f for f in plan.fields if f.temperatures]
    if not shown:
        raise InputError("the plan has no temperatures to draw", where="plot")
    tallest = max(len(f.temperatures) for f in shown)
    fig = figure if figure is not None else plt.figure(figsize=(5.0 * len(shown), 1.2 + 0.8 * tallest))
    axes = fig.subplots(1, len(shown), squeeze=False)[0]
    for ax, field_plan in zip(axes, shown):
        labels = [f"{p.temperature_k:.0f} K, {rates_text(p.rates_per_s)}" for p in field_plan.temperatures]
        plot_stack(plan.predicted_spectra(field_plan), labels, ax=ax,
                   title=f"predicted, {field_plan.proton_mhz:g} MHz (1H)")
    fig.tight_layout()
    return fig
