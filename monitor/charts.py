"""Small PNG charts for the digest (matplotlib, Agg canvas, no global pyplot state).

Two charts per experiment:

* :func:`allocation_chart`: the cumulative share of each variant since the
  experiment started, against the cumulative share the design implies. With
  ramp phases the designed share changes over time, so the design line is the
  unit-weighted average of each hour's designed share,
  ``sum_h n_h w_h(v) / sum_h n_h``: exactly what the observed cumulative share
  should be if every phase ran as designed.
* :func:`guardrail_chart`: each guardrail's relative effect over runs with its
  always-valid confidence-sequence band.

Both return PNG bytes; inputs with nothing to draw return None.
"""

from __future__ import annotations

import io
from collections.abc import Sequence
from datetime import datetime
from typing import Any

import numpy as np

from monitor.errors import ConfigError

__all__ = ["allocation_chart", "cumulative_shares", "guardrail_chart", "require_matplotlib"]

_FIGSIZE = (5.2, 2.3)
_DPI = 90


def require_matplotlib() -> None:
    """Raise a one-line :class:`ConfigError` naming the extra to install when
    matplotlib, which draws the charts, is not installed."""
    try:
        import matplotlib  # noqa: F401
    except ModuleNotFoundError as exc:
        if exc.name != "matplotlib":
            raise
        raise ConfigError("charts need matplotlib, which is not installed: pip install 'expwatch[charts]'") from None


def _figure() -> Any:
    require_matplotlib()
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=_FIGSIZE, dpi=_DPI)
    FigureCanvasAgg(fig)
    fig.subplots_adjust(left=0.12, right=0.98, top=0.88, bottom=0.24)
    return fig


def _dates(ax: Any) -> None:
    from matplotlib.dates import AutoDateLocator, ConciseDateFormatter

    loc = AutoDateLocator(minticks=3, maxticks=6)
    ax.xaxis.set_major_locator(loc)
    ax.xaxis.set_major_formatter(ConciseDateFormatter(loc))


def _png(fig: Any) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=_DPI)  # fixed margins: one draw, not two
    return buf.getvalue()


def cumulative_shares(units: np.ndarray, designed: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Cumulative observed and designed shares.

    Parameters
    ----------
    units : ndarray, shape (n_hours, n_variants)
        New units per hour and variant.
    designed : ndarray, shape (n_hours, n_variants)
        Designed share of each variant in each hour's phase (rows sum to 1; a
        row of an hour outside every phase may be all zero and then carries no
        weight).

    Returns
    -------
    observed, expected : ndarray, shape (n_hours, n_variants)
        ``cumsum(units) / cumsum(total)`` and ``cumsum(total * designed) /
        cumsum(total)``.

    Notes
    -----
    Hours before the first unit have no share: those rows are 0 (never NaN), and
    callers should plot from the first hour with units.
    """
    units = np.asarray(units, dtype=float)
    designed = np.asarray(designed, dtype=float)
    if units.shape != designed.shape or units.ndim != 2:
        raise ValueError("units and designed must be 2-d arrays of the same shape (hours x variants)")
    total = units.sum(axis=1)
    cum_total = np.cumsum(total)
    safe = np.where(cum_total > 0, cum_total, 1.0)[:, None]
    observed = np.cumsum(units, axis=0) / safe
    expected = np.cumsum(designed * total[:, None], axis=0) / safe
    zero = cum_total <= 0
    observed[zero] = 0.0
    expected[zero] = 0.0
    return observed, expected


def allocation_chart(hours: Sequence[datetime], units: np.ndarray, designed: np.ndarray,
                     variants: Sequence[str], title: str) -> bytes | None:
    """PNG of the cumulative share of every variant (solid) against the design
    (dashed, same colour). None when there are no units."""
    units = np.asarray(units, dtype=float)
    if units.size == 0 or units.sum() <= 0:
        return None
    observed, expected = cumulative_shares(units, designed)
    first = int(np.argmax(units.sum(axis=1) > 0))
    x = list(hours)[first:]
    fig = _figure()
    ax = fig.subplots()
    for j, v in enumerate(variants):
        line, = ax.plot(x, observed[first:, j], lw=1.6, label=str(v))
        ax.plot(x, expected[first:, j], lw=1.0, ls="--", color=line.get_color())
    ax.set_ylabel("cumulative share", fontsize=8)
    fig.suptitle(title, x=0.01, ha="left", fontsize=9)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=7, ncol=min(len(variants), 4), loc="best", title="solid: observed, dashed: design",
              title_fontsize=6)
    ax.grid(alpha=0.25)
    _dates(ax)
    return _png(fig)


def guardrail_chart(series: Sequence[dict[str, Any]], title: str) -> bytes | None:
    """PNG of guardrail relative effects over runs with their confidence-sequence bands.

    Parameters
    ----------
    series
        One dict per guardrail: ``label``, ``times`` (run times), ``effect``,
        ``lower``, ``upper`` (relative, e.g. 0.03 = +3%); points whose effect or
        bounds are None are left out.
    title
        Chart title.

    Returns
    -------
    bytes or None
        None when no series has a complete point.
    """
    clean = []
    for s in series:
        pts = [(t, e, lo, hi) for t, e, lo, hi in zip(s["times"], s["effect"], s["lower"], s["upper"])
               if e is not None and lo is not None and hi is not None]
        if pts:
            clean.append((str(s["label"]), pts))
    if not clean:
        return None
    fig = _figure()
    ax = fig.subplots()
    if all(len(pts) == 1 for _, pts in clean):
        # one run so far: a forest plot of the latest estimates is easier to read than dots on a time axis
        fig.subplots_adjust(left=0.34)
        y = np.arange(len(clean))[::-1]
        eff = 100 * np.array([pts[0][1] for _, pts in clean])
        lo = 100 * np.array([pts[0][2] for _, pts in clean])
        hi = 100 * np.array([pts[0][3] for _, pts in clean])
        ax.errorbar(eff, y, xerr=np.vstack([eff - lo, hi - eff]), fmt="o", ms=4, capsize=3, lw=1.4)
        ax.set_yticks(y, [label for label, _ in clean], fontsize=7)
        ax.axvline(0, color="grey", lw=0.8)
        ax.set_xlabel("relative effect, % (bars: always-valid band)", fontsize=8)
        ax.set_ylim(-0.7, len(clean) - 0.3)
    else:
        for label, pts in clean:
            t, e, lo, hi = zip(*pts)
            line, = ax.plot(t, 100 * np.asarray(e), marker="o", ms=3, lw=1.4, label=label)
            ax.fill_between(t, 100 * np.asarray(lo), 100 * np.asarray(hi), color=line.get_color(), alpha=0.18, lw=0)
        ax.axhline(0, color="grey", lw=0.8)
        ax.set_ylabel("relative effect, %", fontsize=8)
        ax.legend(fontsize=7, loc="best")
        _dates(ax)
    fig.suptitle(title, x=0.01, ha="left", fontsize=9)
    ax.tick_params(labelsize=7)
    ax.grid(alpha=0.25)
    return _png(fig)
