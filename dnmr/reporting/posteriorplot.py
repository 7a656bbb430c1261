"""The pairwise posterior figure: every sampled quantity's density with its 95 % interval (or one-sided
bound), every pair's 68 % and 95 % credible regions, and their correlation coefficients.
"""
from __future__ import annotations

import matplotlib
import numpy as np

from dnmr.errors import InputError
from dnmr.reporting.plotting import INK, PALETTE, figure_text, plt

PAIRS_HUE = PALETTE["indigo"]  # credible regions and marginal densities
TRUE_VALUE_COLOUR = PALETTE["vermilion"]
REGION_ALPHA = {0.95: 0.28, 0.68: 0.7}  # lighter: the 95 % region; darker: the 68 % region inside it
MARGINAL_ALPHA = (0.22, 0.55)  # a marginal density; its 95 % interval (or the side of its one-sided bound)
#: The key printed under the figure.
PAIRS_KEY = ("pairs: 68 % (dark) and 95 % (light) credible regions;  ● medians\n"
             "diagonal: density, 95 % interval (or the side of a one-sided 95 % bound) darker;  | median or bound\n"
             "r: correlation coefficient;  ◆ ▲ true values")
KEY_HEIGHT_IN, LABELS_HEIGHT_IN = 0.45, 1.0  # room under the panels for the axis labels and the key


def _credible_levels(density: np.ndarray, masses=(0.95, 0.68)) -> list[float]:
    """Density levels enclosing `masses` of a 2-D histogram (highest-density regions), ascending."""
    flat = np.sort(density.ravel())[::-1]
    cumulative = np.cumsum(flat) / flat.sum()
    levels = [float(flat[min(np.searchsorted(cumulative, m), flat.size - 1)]) for m in masses]
    return sorted(set(levels))


def _fixed(value: float, decimals: int) -> str:
    return f"{value:.{decimals}f}".replace("-", "−")


def _marginal_numbers(x: np.ndarray, one_sided: str | None) -> tuple[tuple[float, float], float, str]:
    """The shaded range of a marginal, where its tick goes, and its text: the 95 % central interval with
    the median (rounded to two significant digits of the interval's half-width), or the one-sided 95 %
    bound (the range from the lowest or to the highest sample)."""
    if one_sided in ("upper-bound", "lower-bound"):
        upper = one_sided == "upper-bound"
        bound = float(np.percentile(x, 95.0 if upper else 5.0))
        shaded = (float(x.min()), bound) if upper else (bound, float(x.max()))
        return shaded, bound, f"{'<' if upper else '>'} {bound:.3g}".replace("-", "−") + "\n(95 % bound)"
    low, median, high = (float(v) for v in np.percentile(x, [2.5, 50.0, 97.5]))
    half = 0.5 * (high - low)
    decimals = int(max(0, 1 - np.floor(np.log10(half)))) if half > 0 else 3
    numbers = f"{_fixed(median, decimals)}\n95 %: {_fixed(low, decimals)} to {_fixed(high, decimals)}"
    return (low, high), median, numbers


def _draw_marginal(ax, x: np.ndarray, span: tuple[float, float], bins: int, one_sided: str | None) -> None:
    """Smoothed density filled lightly, its 95 % interval (or bound side) darker, the median (or bound)
    as a tick, the numbers in the upper left."""
    from scipy.ndimage import gaussian_filter1d

    counts, edges = np.histogram(x, bins=2 * bins, range=span, density=True)
    centres = 0.5 * (edges[1:] + edges[:-1])
    density = gaussian_filter1d(counts, 1.5)
    (low, high), tick, text = _marginal_numbers(x, one_sided)
    ax.fill_between(centres, density, color=PAIRS_HUE, alpha=MARGINAL_ALPHA[0], lw=0)
    inside = (centres >= low) & (centres <= high)
    ax.fill_between(centres, density, where=inside, color=PAIRS_HUE, alpha=MARGINAL_ALPHA[1], lw=0,
                    interpolate=True)
    ax.plot(centres, density, color=PAIRS_HUE, lw=0.9)
    ax.plot([tick, tick], [0.0, float(np.interp(tick, centres, density))], color=INK, lw=1.2)
    ax.set_ylim(0.0, 1.55 * float(density.max()))
    ax.text(0.03, 0.96, text, transform=ax.transAxes, ha="left", va="top", fontsize=7.5, color=INK)


def _draw_pair(ax, xs: np.ndarray, ys: np.ndarray, spans, bins: int) -> None:
    """68 % and 95 % highest-density regions of two quantities, filled, with their median as a dot."""
    from scipy.ndimage import gaussian_filter

    hist, xe, ye = np.histogram2d(xs, ys, bins=bins, range=spans)
    density = gaussian_filter(hist.T, 1.0)
    centres = 0.5 * (xe[1:] + xe[:-1]), 0.5 * (ye[1:] + ye[:-1])
    levels = _credible_levels(density)
    top = float(density.max())
    if len(levels) == 2 and levels[0] < levels[1] < top:
        for level, mass in zip(levels, (0.95, 0.68)):
            ax.contourf(*centres, density, levels=[level, top * 1.01], colors=[PAIRS_HUE],
                        alpha=REGION_ALPHA[mass])
        ax.contour(*centres, density, levels=levels[:1], colors=[PAIRS_HUE], linewidths=0.8)
    else:  # too few distinct samples for regions: show the samples themselves
        ax.plot(xs, ys, ".", color=PAIRS_HUE, ms=1.5, alpha=0.4)
    ax.plot(np.median(xs), np.median(ys), "o", color=INK, ms=3)


def _mark_true_values(ax, x_true: float | None, y_true: float | None) -> None:
    """A diamond where both true values are known; else a triangle on the axis of the one that is."""
    style = {"color": TRUE_VALUE_COLOUR, "mec": INK, "mew": 0.6, "clip_on": False, "zorder": 5}
    if x_true is not None and y_true is not None:
        ax.plot(x_true, y_true, "D", ms=6, **style)
    elif x_true is not None:
        ax.plot(x_true, 0.0, "^", ms=7, transform=ax.get_xaxis_transform(), **style)
    elif y_true is not None:
        ax.plot(0.0, y_true, ">", ms=7, transform=ax.get_yaxis_transform(), **style)


def _correlation_text(r: float) -> str:
    """``r = −0.97``; three decimals from |r| = 0.99 on, where two would round to ±1."""
    return f"r = {r:+.{3 if abs(r) >= 0.99 else 2}f}".replace("-", "−")


def _show_correlation(ax, r: float) -> None:
    """The correlation coefficient of a pair, in the cell mirroring its panel."""
    ax.set_axis_off()
    weight = "bold" if abs(r) >= 0.9 else "normal"
    ax.text(0.5, 0.5, _correlation_text(r), transform=ax.transAxes, ha="center", va="center",
            fontsize=10, color=INK, fontweight=weight)


def _two_lines(label: str) -> str:
    """A long axis label on two lines: after "name:", else before "/ unit"."""
    return label.replace(": ", ":\n", 1) if ": " in label else label.replace(" / ", "\n/ ", 1)


def _spans(x: np.ndarray) -> list[tuple[float, float]]:
    """Axis range of each column: the central 99.6 % of its samples, padded by 5 %."""
    spans = []
    for column in x.T:
        lo, hi = np.percentile(column, [0.2, 99.8])
        pad = 0.05 * (hi - lo) if hi > lo else max(abs(lo) * 1e-3, 1e-12)
        spans.append((float(lo - pad), float(hi + pad)))
    return spans


def _label_axes(grid, labels: list[str]) -> None:
    """Tick labels and axis labels on the outer panels of the lower triangle only."""
    p = len(labels)
    for i in range(p):
        for j in range(i + 1):
            ax = grid[i, j]
            ax.xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(4, prune="both"))
            ax.tick_params(labelsize=8, colors=INK)
            if i < p - 1:
                ax.set_xticklabels([])
            else:
                ax.set_xlabel(labels[j])
                ax.tick_params(axis="x", labelrotation=45)
            if i == j:
                ax.set_yticks([])
                for side in ("left", "right", "top"):
                    ax.spines[side].set_visible(False)
                continue
            ax.yaxis.set_major_locator(matplotlib.ticker.MaxNLocator(4, prune="both"))
            if j > 0:
                ax.set_yticklabels([])
            else:
                ax.set_ylabel(labels[i])


def plot_posterior_pairs(samples, labels, *, true_values=None, one_sided=None, bins: int | None = None,
                         figure=None, **renamed):
    """Pairwise posterior figure: every quantity's density, every pair's credible regions, correlations.

    Parameters
    ----------
    samples : (n, p) array
        Samples of p quantities (2 to 6 read best), in their units.
    labels : sequence of str
        Axis label (with unit) of each quantity.
    true_values : sequence of float or None, optional
        Known values to mark (None for a quantity without one): a diamond on the pairs where both are
        known, a triangle on the axis otherwise.
    one_sided : sequence of str or None, optional
        Per quantity "upper-bound" or "lower-bound" to shade and state only its one-sided 95 % bound
        instead of the median and 95 % interval.
    bins : int, optional
        Bins per axis of the 2-D densities (default from the number of samples, 20 to 50).
    figure : matplotlib Figure, optional
        Figure to draw into (default: a new one).

    Returns
    -------
    matplotlib.figure.Figure
        A p x p grid: on the diagonal each quantity's smoothed density with its 95 % central interval
        shaded darker, a tick at the median and the numbers; below it, each pair's 68 % and 95 %
        highest-density regions, filled, with the medians as a dot; above it, each pair's correlation
        coefficient r.  A key under the figure says what is drawn.
    """
    _refuse_renamed(renamed, {"truths": "true_values"})
    x = np.atleast_2d(np.asarray(samples, dtype=float))
    n, p = x.shape
    if len(labels) != p:
        raise InputError(f"{p} quantities but {len(labels)} labels", where="labels")
    true_values = [None] * p if true_values is None else list(true_values)
    one_sided = [None] * p if one_sided is None else list(one_sided)
    labels = [_two_lines(figure_text(label)) if len(label) > 16 else figure_text(label) for label in labels]
    bins = bins or int(np.clip(np.sqrt(n) / 2, 20, 50))
    spans = _spans(x)
    size = 2.0 * p + 0.8
    fig = figure if figure is not None else plt.figure(figsize=(size, size + KEY_HEIGHT_IN))
    grid = np.atleast_2d(fig.subplots(p, p, squeeze=False))
    correlation = np.corrcoef(x, rowvar=False) if p > 1 else np.ones((1, 1))
    for i in range(p):
        for j in range(p):
            ax = grid[i, j]
            if j > i:
                _show_correlation(ax, float(correlation[i, j]))
                continue
            if i == j:
                _draw_marginal(ax, x[:, j], spans[j], bins, one_sided[j])
                _mark_true_values(ax, true_values[j], None)
            else:
                _draw_pair(ax, x[:, j], x[:, i], [spans[j], spans[i]], bins)
                _mark_true_values(ax, true_values[j], true_values[i])
                ax.set_ylim(spans[i])
            ax.set_xlim(spans[j])
    _label_axes(grid, labels)
    height = fig.get_figheight()
    fig.subplots_adjust(hspace=0.08, wspace=0.08, bottom=(KEY_HEIGHT_IN + LABELS_HEIGHT_IN) / height)
    fig.text(0.5, 0.1 / height, PAIRS_KEY, ha="center", va="bottom", fontsize=7, color=INK, linespacing=1.4)
    return fig


def _refuse_renamed(given: dict, renamed: dict[str, str]) -> None:
    """An :class:`InputError` naming the new name of a keyword that was renamed; a TypeError for others."""
    for old in given:
        if old in renamed:
            raise InputError(f"the keyword {old!r} was renamed to {renamed[old]!r}", where=old)
        raise TypeError(f"unexpected keyword argument {old!r}")
