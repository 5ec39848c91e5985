"""Colours and styles of the report and the 3D viewer, all in one place.

Categorical colours follow the Okabe–Ito palette, chosen to stay distinguishable under the
common forms of colour-vision deficiency; the clearance-deficit scale is a perceptually uniform
sequential map (matplotlib's ``magma``, trimmed at both ends so neither end fades into a white
or black background) that stays ordered in lightness when seen in grey.

References
----------
.. [1] Okabe, M. and Ito, K. (2008). *Color Universal Design (CUD): how to make figures and
   presentations that are friendly to colorblind people*. https://jfly.uni-koeln.de/color/
.. [2] van der Walt, S. and Smith, N. (2015). *A better default colormap for matplotlib*
   (viridis / magma family: perceptually uniform, colour-blind readable). SciPy 2015.
"""
from __future__ import annotations

import numpy as np

# --- Okabe–Ito palette [1] -------------------------------------------------------------------
BLACK = "#000000"
ORANGE = "#E69F00"
SKY_BLUE = "#56B4E9"
BLUISH_GREEN = "#009E73"
YELLOW = "#F0E442"
BLUE = "#0072B2"
VERMILLION = "#D55E00"
REDDISH_PURPLE = "#CC79A7"
# Neutrals (not part of the palette; used for terrain and background elements).
GREY = "#8C8C8C"
LIGHT_GREY = "#C8C8C8"
DARK_GREY = "#3A3A3A"
TERRAIN = "#A89F8E"

#: Colour of each ASPRS class code in the viewer and in profile plots.
CLASS_COLOURS: dict[int, str] = {
    0: LIGHT_GREY,        # never classified
    1: LIGHT_GREY,        # unclassified
    2: TERRAIN,           # ground
    3: "#7FCFB5",         # low vegetation: bluish green, lightened
    4: "#3FB795",         # medium vegetation
    5: BLUISH_GREEN,      # high vegetation
    6: REDDISH_PURPLE,    # building
    7: "#E0E0E0",         # low noise
    9: SKY_BLUE,          # water
    10: DARK_GREY,        # rail
    11: GREY,             # road surface
    13: BLUE,             # shield wire
    14: ORANGE,           # phase conductor
    15: DARK_GREY,        # tower
    16: YELLOW,           # insulator / connector
    17: GREY,             # bridge deck
    18: "#E0E0E0",        # high noise
}
#: Colour of classes not listed in :data:`CLASS_COLOURS`.
OTHER_CLASS_COLOUR = LIGHT_GREY

#: Wire curves: one colour and line style per condition.
CONDITION_STYLES: dict[str, dict] = {
    "survey": {"colour": BLUE, "linestyle": "-", "label": "at survey"},
    "mot": {"colour": VERMILLION, "linestyle": "--", "label": "at MOT"},
    "wind_left": {"colour": SKY_BLUE, "linestyle": ":", "label": "in wind (left)"},
    "wind_right": {"colour": SKY_BLUE, "linestyle": ":", "label": "in wind (right)"},
    "ice": {"colour": REDDISH_PURPLE, "linestyle": "-.", "label": "under ice"},
}
REQUIRED_CLEARANCE_COLOUR = BLACK
REQUIRED_CLEARANCE_LINESTYLE = (0, (1.5, 2.5))  # dotted
GROUND_LINE_COLOUR = "#6E6455"
GROUND_FILL_COLOUR = "#E9E4DA"
VEGETATION_POINT_COLOUR = BLUISH_GREEN
STRUCTURE_COLOUR = DARK_GREY

#: Matplotlib colour map name of the deficit scale and the trimmed range used from it.
DEFICIT_CMAP = "magma_r"
DEFICIT_CMAP_RANGE = (0.15, 0.85)

# --- viewer ------------------------------------------------------------------------------------
VIEWER_BACKGROUND = "#F5F5F2"
VIEWER_TEXT_COLOUR = "#202020"
VIEWER_POINT_SIZE = 2.0
VIEWER_WIRE_WIDTH = 3.0
VIEWER_MARKER_SIZE_PX = (14.0, 30.0)  # smallest and largest violation marker [pixel]
VIEWER_MARKER_SIZE_STEPS = 5          # marker sizes used between the two
VIEWER_FONT_SIZE = 10
CAUTION_BACKGROUND = "#FFF4EC"

# --- report ------------------------------------------------------------------------------------
FIGURE_DPI = 100
PROFILE_FIGSIZE_IN = (10.0, 4.2)
PLAN_FIGSIZE_IN = (10.0, 5.5)

REPORT_CSS = """
:root { --ink:#1d1d1d; --muted:#5b5b5b; --rule:#d6d6d6; --accent:#0072B2; --warn:#D55E00; }
* { box-sizing: border-box; }
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif;
       color: var(--ink); margin: 0 auto; max-width: 1180px; padding: 1.2rem 1.6rem 3rem;
       line-height: 1.45; background: #fff; }
h1 { font-size: 1.7rem; margin: .2rem 0 .2rem; }
h2 { font-size: 1.3rem; margin: 2rem 0 .6rem; border-bottom: 2px solid var(--rule);
     padding-bottom: .2rem; }
h3 { font-size: 1.1rem; margin: 1.4rem 0 .4rem; }
.subtitle { color: var(--muted); margin: 0 0 1rem; }
.caution { border: 2px solid var(--warn); background: #fff4ec; padding: .7rem 1rem;
           margin: 1rem 0; font-weight: 600; border-radius: 4px; }
.caution p { margin: .2rem 0; }
.caution .note { font-weight: 400; }
.table-wrap { overflow-x: auto; max-width: 100%; }
table.findings td:nth-child(7) { min-width: 22rem; }
table { border-collapse: collapse; margin: .4rem 0 1rem; font-size: .86rem; }
th, td { border: 1px solid var(--rule); padding: .25rem .5rem; text-align: left;
         vertical-align: top; }
th { background: #f2f2f2; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
tr.status-not_fitted td { background: #f7f7f7; color: var(--muted); }
.badge { display: inline-block; padding: 0 .45rem; border-radius: .6rem; font-size: .78rem;
         border: 1px solid var(--rule); }
.badge.fitted { background: #e6f2ea; }
.badge.partial { background: #fdf3d6; }
.badge.not_fitted { background: #eeeeee; }
.kv th { width: 14rem; }
figure { margin: .4rem 0 1rem; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--rule); }
figcaption { color: var(--muted); font-size: .84rem; }
.span { page-break-inside: avoid; }
.muted { color: var(--muted); }
code, .mono { font-family: ui-monospace, "DejaVu Sans Mono", monospace; font-size: .82rem; }
nav ol { columns: 2; font-size: .9rem; }
footer { margin-top: 2.5rem; color: var(--muted); font-size: .8rem; }
"""


def hex_to_rgb(colour: str) -> tuple[int, int, int]:
    """Convert ``#RRGGBB`` to a tuple of three integers 0–255."""
    c = colour.lstrip("#")
    if len(c) != 6:
        raise ValueError(f"colour {colour!r} is not of the form #RRGGBB.")
    return int(c[0:2], 16), int(c[2:4], 16), int(c[4:6], 16)


def class_rgb(classification: np.ndarray) -> np.ndarray:
    """Colour of each point from its ASPRS class (vectorised lookup).

    Parameters
    ----------
    classification
        ASPRS class codes, shape (n,). [-]

    Returns
    -------
    rgb : uint8 array of shape (n, 3).
    """
    table = np.tile(np.array(hex_to_rgb(OTHER_CLASS_COLOUR), dtype=np.uint8), (256, 1))
    for code, colour in CLASS_COLOURS.items():
        table[code] = hex_to_rgb(colour)
    return table[np.asarray(classification, dtype=np.uint8)]


def deficit_colormap():
    """The deficit colour map (a matplotlib ``ListedColormap``, trimmed per the theme)."""
    from matplotlib import colormaps
    from matplotlib.colors import ListedColormap

    base = colormaps[DEFICIT_CMAP]
    lo, hi = DEFICIT_CMAP_RANGE
    return ListedColormap(base(np.linspace(lo, hi, 256)), name="clearaudit_deficit")


def deficit_range(deficits_m: np.ndarray) -> tuple[float, float]:
    """Colour-scale limits for clearance deficits: from 0 to the largest deficit. [m]"""
    d = np.asarray(deficits_m, dtype=float)
    d = d[np.isfinite(d)]
    top = float(d.max()) if d.size else 1.0
    return 0.0, max(top, 0.1)


def deficit_rgb(deficit_m, vmin_m: float, vmax_m: float) -> np.ndarray:
    """Colour of each deficit on the deficit scale.

    Parameters
    ----------
    deficit_m
        Clearance deficits (required minus actual clearance). [m]
    vmin_m, vmax_m
        Limits of the scale. [m]

    Returns
    -------
    rgb : float array of shape (n, 3) in 0–1.
    """
    if not vmax_m > vmin_m:
        raise ValueError("the deficit scale's upper limit must exceed its lower limit.")
    d = np.atleast_1d(np.asarray(deficit_m, dtype=float))
    t = np.clip((np.nan_to_num(d, nan=vmin_m) - vmin_m) / (vmax_m - vmin_m), 0.0, 1.0)
    return deficit_colormap()(t)[:, :3]
