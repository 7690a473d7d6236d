"""Colours used by every cohortlens figure, defined once.

Stratum colours are a qualitative set chosen to stay apart for readers with
red-green colour-vision deficiency. They are based on the published
Okabe & Ito (2008) colour-universal-design set, reordered, with its yellow (too faint as a thin
line on white) replaced by a brown and its black reserved for the highlighted
subject. The module also carries a small colour-vision simulation so that the
tests can check the claim instead of trusting it.
"""
from __future__ import annotations

from collections.abc import Iterable

import numpy as np

#: qualitative colours for strata 0, 1, 2, ... (cycled beyond its length)
STRATUM_COLORS: tuple[str, ...] = (
    "#0072B2",  # blue
    "#E69F00",  # orange
    "#009E73",  # bluish green
    "#CC79A7",  # reddish purple
    "#56B4E9",  # sky blue
    "#D55E00",  # vermillion
    "#7F4F24",  # brown (replaces the set's yellow, too faint on white)
)
#: subjects or rows without a stratum (missing covariate) and pooled summaries
NO_STRATUM_COLOR = "#5E5E5E"
#: the selected subject, drawn on top of everything
HIGHLIGHT_COLOR = "#111111"
#: pooled ("all subjects") curves and reference lines
REFERENCE_COLOR = "#404040"
#: light grid on the white background
GRID_COLOR = "#E3E6EA"
#: axis lines, muted text, footnotes
MUTED_TEXT_COLOR = "#4F5964"
#: diverging scale for correlations: negative (vermillion side) .. 0 (white) .. positive (blue side)
DIVERGING_SCALE: tuple[tuple[float, str], ...] = (
    (0.0, "#8F3A00"),
    (0.25, "#E0884A"),
    (0.5, "#FFFFFF"),
    (0.75, "#5FA2CF"),
    (1.0, "#00436B"),
)
#: label used by the analysis layer for subjects with no covariate value
NO_VALUE_LABEL = "No value"


def stratum_colors(n: int) -> list[str]:
    """Colours for ``n`` strata, in stratum-code order.

    Parameters
    ----------
    n : int
        Number of strata (codes ``0 .. n-1``).

    Returns
    -------
    list of str
        Hex colours; the palette is cycled when ``n`` exceeds its length.
    """
    if n < 0:
        raise ValueError(f"n == {n}, must be >= 0")
    return [STRATUM_COLORS[i % len(STRATUM_COLORS)] for i in range(n)]


def color_for_code(code: int) -> str:
    """Colour of one stratum code; negative codes (no stratum, pooled) are neutral grey."""
    code = int(code)
    if code < 0:
        return NO_STRATUM_COLOR
    return STRATUM_COLORS[code % len(STRATUM_COLORS)]


def stratum_colours(labels: Iterable[str]) -> dict[str, str]:
    """Map stratum labels (in stratum-code order) to colours.

    The label :data:`NO_VALUE_LABEL` maps to :data:`NO_STRATUM_COLOR` and does
    not use up a palette slot, so a label keeps its colour whether or not
    subjects without a value are present.

    Parameters
    ----------
    labels : iterable of str
        Stratum labels in code order, optionally including ``"No value"``.

    Returns
    -------
    dict
        ``{label: hex colour}``.
    """
    out: dict[str, str] = {}
    k = 0
    for lab in labels:
        if lab == NO_VALUE_LABEL:
            out[lab] = NO_STRATUM_COLOR
        elif lab not in out:
            out[lab] = color_for_code(k)
            k += 1
    return out


def with_alpha(color: str, alpha: float) -> str:
    """``rgba(...)`` string of a hex colour with opacity ``alpha`` in [0, 1]."""
    r, g, b = hex_to_rgb(color)
    return f"rgba({r},{g},{b},{float(np.clip(alpha, 0, 1)):.3g})"


def hex_to_rgb(color: str) -> tuple[int, int, int]:
    """``"#RRGGBB"`` to an (r, g, b) tuple of ints in 0..255."""
    c = color.lstrip("#")
    if len(c) != 6:
        raise ValueError(f"not a #RRGGBB colour: {color!r}")
    return int(c[0:2], 16), int(c[2:4], 16), int(c[4:6], 16)


# ---------------------------------------------------------------- colour-vision checks
#: Machado, Oliveira & Fernandes (2009) full-severity simulation matrices (linear RGB)
_CVD_MATRICES = {
    "protanopia": np.array([[0.152286, 1.052583, -0.204868],
                            [0.114503, 0.786281, 0.099216],
                            [-0.003882, -0.048116, 1.051998]]),
    "deuteranopia": np.array([[0.367322, 0.860646, -0.227968],
                              [0.280085, 0.672501, 0.047413],
                              [-0.011820, 0.042940, 0.968881]]),
    "tritanopia": np.array([[1.255528, -0.076749, -0.178779],
                            [-0.078411, 0.930809, 0.147602],
                            [0.004733, 0.691367, 0.303900]]),
}


def _srgb_to_linear(c: np.ndarray) -> np.ndarray:
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def _linear_to_lab(lin: np.ndarray) -> np.ndarray:
    m = np.array([[0.4124564, 0.3575761, 0.1804375],
                  [0.2126729, 0.7151522, 0.0721750],
                  [0.0193339, 0.1191920, 0.9503041]])
    xyz = lin @ m.T / np.array([0.95047, 1.0, 1.08883])
    eps = 216 / 24389
    f = np.where(xyz > eps, np.cbrt(xyz), (24389 / 27 * xyz + 16) / 116)
    return np.stack([116 * f[:, 1] - 16, 500 * (f[:, 0] - f[:, 1]),
                     200 * (f[:, 1] - f[:, 2])], axis=1)


def simulated_lab(colors: Iterable[str], vision: str = "normal") -> np.ndarray:
    """CIELAB coordinates of colours as seen with a given colour vision.

    Parameters
    ----------
    colors : iterable of str
        Hex colours.
    vision : {"normal", "protanopia", "deuteranopia", "tritanopia"}
        Simulated colour vision (full-severity dichromacy).

    Returns
    -------
    ndarray, shape (n, 3)
        L*, a*, b* per colour.
    """
    rgb = np.array([hex_to_rgb(c) for c in colors], dtype=float) / 255.0
    lin = _srgb_to_linear(rgb)
    if vision != "normal":
        lin = np.clip(lin @ _CVD_MATRICES[vision].T, 0.0, 1.0)
    return _linear_to_lab(lin)


def min_pairwise_distance(colors: Iterable[str], vision: str = "normal") -> float:
    """Smallest CIE76 colour difference between any two of ``colors`` under ``vision``."""
    lab = simulated_lab(list(colors), vision)
    d = np.sqrt(((lab[:, None, :] - lab[None, :, :]) ** 2).sum(-1))
    iu = np.triu_indices(len(lab), 1)
    return float(d[iu].min()) if len(iu[0]) else float("inf")
