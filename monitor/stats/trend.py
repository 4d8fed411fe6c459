"""The weighted sums behind every inverse-variance trend in expwatch.

Both the spillover trend (relative effect against the treatment share of each ramp phase,
:func:`monitor.stats.interference.effect_trend`) and the novelty trend (per-age effect against
``log(1 + age)``, :func:`monitor.stats.novelty.age_trend`) are fixed-effect meta-regressions:
weighted least squares with weights ``w = 1 / se^2`` and the variances taken as known
(M. Borenstein et al., "Introduction to Meta-Analysis", Wiley, 2009, ch. 20). Cochran's Q
(W. G. Cochran, Biometrics 10(1), 101-129, 1954) is ``sum w (y - ybar)^2``. This module
computes the sums once; each caller adds its own rule for when a trend is defined.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True, eq=False)
class WeightedSums:
    """Weighted moments along the last axis, over the usable cells only.

    ``w`` are the weights (0 where unusable), ``k`` the usable cells, ``sw = sum w``,
    ``ybar``/``xbar`` the weighted means, ``dx``/``dy`` the centred values (0 where unusable),
    ``sxx = sum w dx^2``, ``sxy = sum w dx dy`` and ``q = sum w dy^2`` (Cochran's Q).
    ``slope`` is ``sxy / sxx`` wherever ``sxx > 0`` (0 elsewhere).
    """

    w: np.ndarray
    k: np.ndarray
    sw: np.ndarray
    ybar: np.ndarray
    xbar: np.ndarray
    dx: np.ndarray
    dy: np.ndarray
    sxx: np.ndarray
    sxy: np.ndarray
    q: np.ndarray

    @property
    def safe_sw(self) -> np.ndarray:
        return np.where(self.sw > 0, self.sw, 1.0)


def weighted_sums(y: np.ndarray, se: np.ndarray, x: np.ndarray, ok: np.ndarray) -> WeightedSums:
    """Inverse-variance weighted sums of ``y`` on ``x`` over the cells where ``ok``.

    ``y``, ``se``, ``x`` and ``ok`` have one shape; cells where ``ok`` is False may hold
    anything (they get weight 0 and are never divided by).
    """
    w = np.where(ok, 1.0 / np.where(ok, se, 1.0) ** 2, 0.0)
    y0, x0 = np.where(ok, y, 0.0), np.where(ok, x, 0.0)
    k = ok.sum(axis=-1)
    sw = w.sum(axis=-1)
    safe_sw = np.where(sw > 0, sw, 1.0)
    ybar = (w * y0).sum(axis=-1) / safe_sw
    xbar = (w * x0).sum(axis=-1) / safe_sw
    dx = np.where(ok, x0 - xbar[..., None], 0.0)
    dy = np.where(ok, y0 - ybar[..., None], 0.0)
    return WeightedSums(w=w, k=k, sw=sw, ybar=ybar, xbar=xbar, dx=dx, dy=dy,
                        sxx=(w * dx * dx).sum(axis=-1), sxy=(w * dx * dy).sum(axis=-1),
                        q=(w * dy * dy).sum(axis=-1))
