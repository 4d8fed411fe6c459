"""Small PNG charts for the digest (matplotlib, Agg canvas, no global pyplot state).

Two charts, each drawn only for an experiment whose finding it illustrates:

* :func:`allocation_chart`: the cumulative share of each variant since the
  experiment started, against the cumulative share the design implies. With
  ramp phases the designed share changes over time, so the design line is the
  unit-weighted average of each hour's designed share,
  ``sum_h n_h w_h(v) / sum_h n_h``: exactly what the observed cumulative share
  should be if every phase ran as designed.
* :func:`guardrail_chart`: each guardrail's relative effect with its
  always-valid confidence-sequence band: over the recorded runs when there are
  several, else as one bar per guardrail at the latest run.

Both return a :class:`Chart` (PNG bytes and a text alternative that states what
the chart shows in numbers); inputs with nothing to draw return None. A chart is
meant to be shown :attr:`Chart.width` CSS pixels wide or narrower and is drawn
at twice that many pixels, so it stays sharp on high-density screens; its
smallest text is :data:`SMALLEST_FONT_PT` points at that width.
"""

from __future__ import annotations

import io
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

import numpy as np

from monitor.errors import ConfigError

__all__ = ["CSS_PX_PER_INCH", "Chart", "PIXEL_RATIO", "SMALLEST_FONT_PT", "allocation_chart", "cumulative_shares",
           "guardrail_chart", "require_matplotlib"]

CSS_PX_PER_INCH = 100
"""Figure inches to CSS pixels at the chart's intended display width."""
PIXEL_RATIO = 2
"""PNG pixels per CSS pixel."""
SMALLEST_FONT_PT = 10.0
"""The smallest text in a chart (tick labels, legend), in points at the intended width."""
_WIDTH_IN = 4.4
_HEIGHT_IN = 2.7
_LABEL_PT = 10.5
_STATUS_COLOUR = {"alert": "#c62828", "warn": "#b26a00", "ok": "#1f5f99"}
_STATUS_RANK = {"ok": 0, "warn": 1, "alert": 2}


@dataclass(frozen=True)
class Chart:
    png: bytes
    alt: str
    """What the chart shows, in words and numbers, for readers who cannot see it."""
    width: int
    """Intended display width in CSS pixels (the PNG is :data:`PIXEL_RATIO` times wider)."""


def require_matplotlib() -> None:
    """Raise a one-line :class:`ConfigError` naming the extra to install when
    matplotlib, which draws the charts, is not installed."""
    try:
        import matplotlib  # noqa: F401
    except ModuleNotFoundError as exc:
        if exc.name != "matplotlib":
            raise
        raise ConfigError("charts need matplotlib, which is not installed: pip install 'expwatch[charts]'") from None


def _figure(height_in: float = _HEIGHT_IN) -> Any:
    require_matplotlib()
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(_WIDTH_IN, height_in), dpi=CSS_PX_PER_INCH, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _time_axis(ax: Any, times: Sequence[datetime]) -> None:
    """Dates on x, limited to the data (a lone time gets an hour either side, never
    matplotlib's default of years)."""
    from matplotlib.dates import AutoDateLocator, ConciseDateFormatter

    lo, hi = min(times), max(times)
    pad = max((hi - lo) * 0.02, timedelta(minutes=30))
    ax.set_xlim(lo - pad, hi + pad)
    loc = AutoDateLocator(minticks=3, maxticks=5)
    ax.xaxis.set_major_locator(loc)
    ax.xaxis.set_major_formatter(ConciseDateFormatter(loc))


def _finish(fig: Any, ax: Any, alt: str) -> Chart:
    ax.tick_params(labelsize=SMALLEST_FONT_PT)
    ax.xaxis.get_offset_text().set_fontsize(SMALLEST_FONT_PT)
    ax.grid(alpha=0.25)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=CSS_PX_PER_INCH * PIXEL_RATIO)
    return Chart(_smaller_png(buf.getvalue()), alt, round(_WIDTH_IN * CSS_PX_PER_INCH))


def _smaller_png(png: bytes) -> bytes:
    """The PNG as a 64-colour palette image (a third of the bytes; the charts have few colours)."""
    from PIL import Image

    with Image.open(io.BytesIO(png)) as im:
        out = io.BytesIO()
        im.convert("RGB").quantize(colors=64, method=Image.Quantize.MEDIANCUT, dither=Image.Dither.NONE).save(
            out, format="PNG", optimize=True)
    return out.getvalue()


def _day(t: datetime) -> str:
    return f"{t:%Y-%m-%d %H:%M} UTC"


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
                     variants: Sequence[str], subject: str) -> Chart | None:
    """The cumulative share of every variant (solid) against the design (dashed,
    same colour); ``subject`` (e.g. "x at stage assigned") opens the text
    alternative. None when there are no units."""
    units = np.asarray(units, dtype=float)
    if units.size == 0 or units.sum() <= 0:
        return None
    observed, expected = cumulative_shares(units, designed)
    first = int(np.argmax(units.sum(axis=1) > 0))
    x = list(hours)[first:]
    fig = _figure()
    ax = fig.subplots()
    for j, v in enumerate(variants):
        line, = ax.plot(x, 100 * observed[first:, j], lw=1.8, label=str(v))
        ax.plot(x, 100 * expected[first:, j], lw=1.2, ls="--", color=line.get_color())
    ax.set_ylabel("cumulative share, %", fontsize=_LABEL_PT)
    ax.plot([], [], color="grey", lw=1.2, ls="--", label="design")
    fig.legend(loc="outside lower center", ncol=min(len(variants) + 1, 4), fontsize=SMALLEST_FONT_PT, frameon=False)
    _time_axis(ax, x)
    shares = "; ".join(f"{v} {100 * observed[-1, j]:.1f}% (design {100 * expected[-1, j]:.1f}%)"
                       for j, v in enumerate(variants))
    alt = (f"Allocation of {subject}: cumulative share of each variant from {_day(x[0])} to {_day(x[-1])}, "
           f"solid observed, dashed designed; at the end {shares}.")
    return _finish(fig, ax, alt)


def guardrail_chart(series: Sequence[dict[str, Any]], subject: str) -> Chart | None:
    """Guardrail relative effects with their confidence-sequence bands.

    Parameters
    ----------
    series
        One dict per guardrail: ``label``, ``times`` (run times), ``effect``,
        ``lower``, ``upper`` (relative, e.g. 0.03 = +3%) and optionally
        ``status`` (``ok``, ``warn`` or ``alert`` at the latest run); points
        whose effect or bounds are None are left out.
    subject
        Opens the text alternative (e.g. the experiment id).

    Returns
    -------
    Chart or None
        None when no series has a complete point.

    Notes
    -----
    With one run time in all, each guardrail is one row: a dot for the effect
    and a bar for its band. With several, each guardrail is a line over the
    runs with its band shaded (a guardrail seen at one run only gets a dot and a
    bar); the x axis spans the runs, lines are nudged apart by 1% of that span
    so equal values stay visible, and the worst status is drawn on top in its
    colour.
    """
    clean = []
    for s in series:
        pts = [(t, e, lo, hi) for t, e, lo, hi in zip(s["times"], s["effect"], s["lower"], s["upper"])
               if e is not None and lo is not None and hi is not None]
        if pts:
            clean.append((str(s["label"]), str(s.get("status", "ok")), pts))
    if not clean:
        return None
    clean.sort(key=lambda c: _STATUS_RANK.get(c[1], 0))  # worst last: drawn on top
    times = sorted({t for _, _, pts in clean for t, *_ in pts})
    if len(times) == 1:
        fig = _figure(0.9 + 0.55 * len(clean))
        ax = fig.subplots()
        from matplotlib.transforms import blended_transform_factory

        label_at = blended_transform_factory(ax.transAxes, ax.transData)
        for row, (label, status, pts) in enumerate(clean):
            _, e, lo, hi = pts[-1]
            colour = _STATUS_COLOUR.get(status, _STATUS_COLOUR["ok"])
            ax.errorbar([100 * e], [row], xerr=[[100 * (e - lo)], [100 * (hi - e)]], fmt="o", ms=5, capsize=4,
                        lw=2, color=colour)
            ax.text(0.01, row + 0.22, label + ("" if status == "ok" else f" ({status})"), transform=label_at,
                    fontsize=SMALLEST_FONT_PT, color=colour, va="bottom")
        ax.set_yticks([])
        ax.set_ylim(-0.5, len(clean) - 0.1)
        ax.axvline(0, color="grey", lw=0.8)
        ax.set_xlabel("relative effect, % (bar: always-valid band)", fontsize=_LABEL_PT)
    else:
        fig = _figure()
        ax = fig.subplots()
        span = times[-1] - times[0]
        k = len(clean)
        for i, (label, status, pts) in enumerate(clean):
            nudge = span * 0.01 * (i - (k - 1) / 2)
            t = [p[0] + nudge for p in pts]
            e, lo, hi = (100 * np.array([p[j] for p in pts], dtype=float) for j in (1, 2, 3))
            colour = _STATUS_COLOUR.get(status) if status != "ok" else None
            z = 3 + _STATUS_RANK.get(status, 0)
            name = label + ("" if status == "ok" else f" ({status})")
            if len(pts) == 1:
                ax.errorbar(t, e, yerr=[e - lo, hi - e], fmt="o", ms=5, capsize=4, lw=2, color=colour, label=name,
                            zorder=z)
                continue
            line, = ax.plot(t, e, marker="o", ms=3.5, lw=1.8 if status == "ok" else 2.4, color=colour, label=name,
                            zorder=z)
            ax.fill_between(t, lo, hi, color=line.get_color(), alpha=0.18, lw=0, zorder=z - 1)
        ax.axhline(0, color="grey", lw=0.8)
        ax.set_ylabel("relative effect, %", fontsize=_LABEL_PT)
        fig.legend(loc="outside lower center", ncol=1 if k > 2 else k, fontsize=SMALLEST_FONT_PT, frameon=False)
        _time_axis(ax, times)
    runs = "at the latest run" if len(times) == 1 else f"over {len(times)} runs from {_day(times[0])} to {_day(times[-1])}"
    parts = "; ".join(f"{label} {100 * pts[-1][1]:+.1f}% (band {100 * pts[-1][2]:+.1f}% to {100 * pts[-1][3]:+.1f}%"
                      f"{'' if status == 'ok' else ', ' + status})" for label, status, pts in reversed(clean))
    alt = f"Guardrail effects of {subject} {runs}, relative to control with always-valid bands; latest: {parts}."
    return _finish(fig, ax, alt)
