"""Matplotlib figures of the report: the plan view and one profile per span.

All figures are drawn with the Agg backend (no display needed) and returned as PNG bytes.
Styles come from :mod:`clearaudit.theme`; lengths are converted to the display unit here.
"""
from __future__ import annotations

import io
import math

import matplotlib

matplotlib.use("Agg", force=False)
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.colors import Normalize  # noqa: E402

from clearaudit import theme  # noqa: E402
from clearaudit.report.format import DisplayUnits  # noqa: E402
from clearaudit.report.outputs import OutputFolder, to_number  # noqa: E402

VEGETATION = (3, 4, 5)
GROUND = 2
#: Largest number of vegetation points drawn in one span profile.
MAX_PROFILE_POINTS = 15_000
#: Vegetation drawn in a span profile: within this distance of the span's axis. [m]
PROFILE_HALF_WIDTH_M = 20.0
#: ... and within this distance beyond its ends. [m]
PROFILE_BEYOND_ENDS_M = 5.0


def png_bytes(fig, dpi: int = theme.FIGURE_DPI) -> bytes:
    """Render a figure to PNG bytes (palette-quantised when Pillow is available) and close it."""
    try:
        from PIL import Image
    except ImportError:  # pragma: no cover - Pillow ships with matplotlib
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight", facecolor="white")
        plt.close(fig)
        return buf.getvalue()
    # rendered to an uncompressed PNG (the pixels only pass through it: ~40 ms less a figure
    # than compressing them), then palette-quantised; the smaller of that and the true-colour
    # image is kept
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight", facecolor="white",
                pil_kwargs={"compress_level": 0})
    plt.close(fig)
    img = Image.open(io.BytesIO(buf.getvalue())).convert("RGB")
    del buf
    out = io.BytesIO()
    img.quantize(colors=256, method=Image.Quantize.MEDIANCUT, dither=Image.Dither.NONE).save(
        out, format="PNG", optimize=True)
    full = io.BytesIO()
    img.save(full, format="PNG")  # the true-colour image, compressed as matplotlib does
    return out.getvalue() if out.tell() < full.tell() else full.getvalue()


def render_profiles(items: list) -> list[bytes]:
    """Span profiles of a batch, for an engine's workers: one PNG per item.

    Each item is ``(folder, units, span_id, vegetation_xyz, ground_xyz)``: the saved outputs
    (:class:`~clearaudit.report.outputs.OutputFolder`), the unit system's name, the span, and
    the vegetation and ground points the report cut to the span's box (see
    :func:`clearaudit.report.html.profile_jobs`): the same image as the report draws itself.
    """
    return [span_profile(folder, sid, DisplayUnits(units), vegetation_xyz=veg, ground_xyz=ground)
            for folder, units, sid, veg, ground in items]


def _deficit_norm(folder: OutputFolder, units: DisplayUnits) -> tuple[Normalize, object]:
    """Colour normalisation of deficits in display units (same scale in every figure)."""
    d = np.array([to_number(v.get("deficit_m")) for v in folder.violations])
    lo, hi = theme.deficit_range(d)
    return Normalize(units.length(lo), units.length(hi)), theme.deficit_colormap()


def plan_view(folder: OutputFolder, units: DisplayUnits) -> bytes:
    """Plan of the line: structures, wires at survey, violations coloured by deficit.

    Parameters
    ----------
    folder
        The saved audit outputs.
    units
        Display unit system.

    Returns
    -------
    PNG image. [bytes]
    """
    f = units.length_factor
    st = list(folder.structures.values())
    xy_all = [folder.to_local_m([[to_number(s.get("x")), to_number(s.get("y"))] for s in st])]
    xy_all += [folder.violation_xyz_local_m()[:, :2]]
    xy_all = np.vstack(xy_all) if any(len(a) for a in xy_all) else np.zeros((0, 2))
    width, height = theme.PLAN_FIGSIZE_IN
    if len(xy_all) and np.all(np.isfinite(xy_all)):
        dx, dy = np.ptp(xy_all, axis=0) + 40.0
        height = float(np.clip(width * 0.8 * dy / dx + 1.2, 3.2, height))
    fig, ax = plt.subplots(figsize=(width, height))
    drawn_wire = drawn_axis = False
    for span_id in folder.span_ids():
        span_has_curve = False
        for w in folder.wires_of(span_id):
            c = folder.curve_local_m(w, "survey")
            if c is None:
                continue
            ax.plot(c[:, 0] * f, c[:, 1] * f, color=theme.CONDITION_STYLES["survey"]["colour"],
                    lw=0.9, alpha=0.9, label=None if drawn_wire else "wire (fitted, at survey)")
            drawn_wire = span_has_curve = True
        span = folder.span_record(span_id)
        axis = folder.span_axis(span)
        if axis is not None:
            start, u, length = axis
            mid = (start + u * length / 2) * f
            if not span_has_curve:
                end = (start + u * length) * f
                ax.plot([start[0] * f, end[0]], [start[1] * f, end[1]], color=theme.GREY,
                        lw=1.0, ls=(0, (4, 3)),
                        label=None if drawn_axis else "span without fitted wires")
                drawn_axis = True
            ax.annotate(span_id, mid, textcoords="offset points", xytext=(0, -14), ha="center",
                        fontsize=7.5, color=theme.DARK_GREY)
    if st:
        xy = folder.to_local_m([[to_number(s.get("x")), to_number(s.get("y"))] for s in st]) * f
        ax.scatter(xy[:, 0], xy[:, 1], marker="^", s=60, color=theme.STRUCTURE_COLOUR,
                   zorder=4, label="structure")
        for s, p in zip(st, xy, strict=True):
            ax.annotate(str(s.get("id")), p, textcoords="offset points", xytext=(4, 6),
                        fontsize=8, fontweight="bold")
    if folder.violations:
        norm, cmap = _deficit_norm(folder, units)
        v = folder.violation_xyz_local_m() * f
        d = units.length(np.nan_to_num([to_number(r.get("deficit_m")) for r in folder.violations]))
        sc = ax.scatter(v[:, 0], v[:, 1], c=d, cmap=cmap, norm=norm, s=30 + 90 * np.clip(norm(d), 0.0, 1.0),
                        edgecolors="black", linewidths=0.6, zorder=5, label="violation")
        cb = fig.colorbar(sc, ax=ax, shrink=0.8, pad=0.02)
        cb.set_label(f"clearance deficit [{units.length_unit}]")
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_xlabel(f"easting from the local origin [{units.length_unit}]")
    ax.set_ylabel(f"northing from the local origin [{units.length_unit}]")
    ax.grid(True, color="#e4e4e4", lw=0.6)
    if drawn_wire or st:
        ax.legend(loc="best", fontsize=8, framealpha=0.9)
    return png_bytes(fig)


def _ground_line(folder: OutputFolder, span: dict, ground_xyz: np.ndarray | None):
    """Station [m] and elevation [m] of the ground along the span axis."""
    prof = (folder.model.get("ground_profile") or {}).get(str(span.get("span_id")))
    if prof:
        a = np.asarray(prof, dtype=float)
        if a.ndim == 2 and a.shape[1] >= 2 and len(a):
            return a[:, 0], _abs_z(folder, a[:, 1])
    if ground_xyz is None or not len(ground_xyz):
        return None
    station, offset = folder.station_offset(span, ground_xyz[:, :2])
    axis = folder.span_axis(span)
    if axis is None:
        return None
    near = (np.abs(offset) < 3.0) & (station >= 0) & (station <= axis[2])
    if near.sum() < 3:
        return None
    s, z = station[near], ground_xyz[near, 2]
    bins = np.floor(s / 2.0).astype(int)
    order = np.argsort(bins, kind="stable")
    bins, s, z = bins[order], s[order], z[order]
    uniq, start = np.unique(bins, return_index=True)
    ends = np.append(start[1:], len(bins))
    # median per 2 m bin (small number of bins: one reduceat per statistic)
    s_mean = np.add.reduceat(s, start) / (ends - start)
    z_med = np.array([np.median(z[a:b]) for a, b in zip(start, ends, strict=True)])
    return s_mean, _local_to_abs_z(folder, z_med)


def _abs_z(folder: OutputFolder, z_crs) -> np.ndarray:
    """Absolute elevation [m] from CRS heights."""
    return np.asarray(z_crs, dtype=float) * folder.vertical_unit_m


class PointsByCell:
    """Points grouped by square cells of their plan position once, so that each span's
    profile looks only at the points in its box rather than at all of them (a long line's
    report draws hundreds of spans over millions of points).

    Parameters
    ----------
    xyz
        Points in local metres, shape (n, 3). [m]
    cell_m
        Cell edge. [m]
    """

    def __init__(self, xyz: np.ndarray, cell_m: float = 50.0):
        self.xyz = np.asarray(xyz, dtype=float).reshape(-1, 3)
        self.cell_m = float(cell_m)
        xy = self.xyz[:, :2]
        self.lo = xy.min(axis=0) if len(xy) else np.zeros(2)
        ij = np.floor((xy - self.lo) / self.cell_m).astype(np.int64)
        self.ny = int(ij[:, 1].max()) + 1 if len(ij) else 1
        key = ij[:, 0] * self.ny + ij[:, 1]
        self.order = np.argsort(key, kind="stable")
        self.keys, self.starts = np.unique(key[self.order], return_index=True)
        self.starts = np.append(self.starts, len(key))

    def within_box(self, x0: float, y0: float, x1: float, y1: float) -> np.ndarray:
        """Positions (ascending, as in ``xyz``) of the points with ``x0 <= x <= x1`` and
        ``y0 <= y <= y1``."""
        if not len(self.keys) or x1 < x0 or y1 < y0:
            return np.zeros(0, dtype=np.int64)
        i0, j0 = np.floor((np.array([x0, y0]) - self.lo) / self.cell_m).astype(np.int64)
        i1, j1 = np.floor((np.array([x1, y1]) - self.lo) / self.cell_m).astype(np.int64)
        j0, j1 = max(j0, 0), min(j1, self.ny - 1)
        parts = []
        for i in range(max(i0, 0), i1 + 1):  # one row of cells after the other (few)
            a, b = np.searchsorted(self.keys, [i * self.ny + j0, i * self.ny + j1 + 1])
            if b > a:
                parts.append(self.order[self.starts[a]:self.starts[b]])
        if not parts:
            return np.zeros(0, dtype=np.int64)
        pos = np.sort(np.concatenate(parts))
        x, y = self.xyz[pos, 0], self.xyz[pos, 1]
        return pos[(x >= x0) & (x <= x1) & (y >= y0) & (y <= y1)]

    def near_span(self, axis: tuple, reach_m: float) -> np.ndarray:
        """Positions (ascending) of the points in the box of a span's axis segment grown by
        ``reach_m`` (and 1 m for round-off): every point within ``reach_m`` of the segment
        is among them, and every point within ``a`` beyond its ends and ``b`` across it
        when ``a + b <= reach_m`` (each coordinate moves by at most ``a + b``).

        Parameters
        ----------
        axis
            ``(start, unit_direction, length)`` of :meth:`OutputFolder.span_axis`. [m]
        reach_m
            How far from the segment the points can lie. [m]
        """
        start, u, length = axis
        end = start + u * length
        pad = float(reach_m) + 1.0
        return self.within_box(min(start[0], end[0]) - pad, min(start[1], end[1]) - pad,
                               max(start[0], end[0]) + pad, max(start[1], end[1]) + pad)


def _local_to_abs_z(folder: OutputFolder, z_local_m) -> np.ndarray:
    """Absolute elevation [m] from local heights (metres above the origin)."""
    return np.asarray(z_local_m, dtype=float) + folder.origin[2] * folder.vertical_unit_m


def span_profile(
    folder: OutputFolder,
    span_id: str,
    units: DisplayUnits,
    *,
    vegetation_xyz: np.ndarray | None = None,
    ground_xyz: np.ndarray | None = None,
    corridor_half_width_m: float = PROFILE_HALF_WIDTH_M,
) -> bytes:
    """Side profile of one span.

    Shows the ground line, vegetation points near the wires, each wire at survey and at MOT, the
    required ground clearance below the lowest MOT curve (when the rule is known) and the span's
    violations coloured by deficit.

    Parameters
    ----------
    folder
        The saved audit outputs.
    span_id
        The span to draw.
    units
        Display unit system.
    vegetation_xyz, ground_xyz
        Vegetation and ground points in local metres, shape (n, 3); may be ``None``. [m]
        The report passes only the points in the span's box (:class:`PointsByCell`), in
        their order: the same points are drawn as from all of them.
    corridor_half_width_m
        Vegetation farther than this from the span axis is not drawn. [m]

    Returns
    -------
    PNG image. [bytes]
    """
    f = units.length_factor
    span = folder.span_record(span_id)
    wires = folder.wires_of(span_id)
    axis = folder.span_axis(span)
    fig, ax = plt.subplots(figsize=theme.PROFILE_FIGSIZE_IN)
    length = axis[2] if axis is not None else to_number(span.get("span_length_m"))

    ground = _ground_line(folder, span, ground_xyz) if axis is not None else None
    if ground is not None:
        gs, gz = ground
        ax.plot(gs * f, gz * f, color=theme.GROUND_LINE_COLOUR, lw=1.4, label="ground")
    if vegetation_xyz is not None and len(vegetation_xyz) and axis is not None:
        s, off = folder.station_offset(span, vegetation_xyz[:, :2])
        b = PROFILE_BEYOND_ENDS_M
        near = (np.abs(off) <= corridor_half_width_m) & (s >= -b) & (s <= length + b)
        idx = np.flatnonzero(near)
        if idx.size > MAX_PROFILE_POINTS:
            idx = np.random.default_rng(0).choice(idx, MAX_PROFILE_POINTS, replace=False)
        if idx.size:
            ax.scatter(s[idx] * f, _local_to_abs_z(folder, vegetation_xyz[idx, 2]) * f, s=2,
                       color=theme.VEGETATION_POINT_COLOUR, alpha=0.55, lw=0,
                       label=f"vegetation within {units.fmt_length(corridor_half_width_m, 0)}")

    # Structures as vertical bars.
    st = folder.structures
    for sid, station in ((span.get("from_structure"), 0.0), (span.get("to_structure"), length)):
        s = st.get(str(sid))
        if s is None or not math.isfinite(station):
            continue
        z0, z1 = to_number(s.get("z_ground")), to_number(s.get("z_top"))
        if math.isfinite(z0) and math.isfinite(z1):
            ax.plot([station * f] * 2, _abs_z(folder, [z0, z1]) * f,
                    color=theme.STRUCTURE_COLOUR, lw=3, solid_capstyle="butt")
            ax.annotate(str(sid), (station * f, _abs_z(folder, z1) * f), textcoords="offset points",
                        xytext=(0, 4), ha="center", fontsize=8, fontweight="bold")

    # Wires at survey and MOT.
    grid = np.linspace(0, length, 200) if math.isfinite(length) else None
    mot_low = None
    labelled = set()
    for w in wires:
        for cond in ("survey", "mot"):
            c = folder.curve_local_m(w, cond)
            if c is None or axis is None:
                continue
            s, _ = folder.station_offset(span, c[:, :2])
            z = _local_to_abs_z(folder, c[:, 2])
            style = theme.CONDITION_STYLES[cond]
            lw = 1.6 if w.get("role") != "shield" else 1.0
            ax.plot(s * f, z * f, color=style["colour"], ls=style["linestyle"], lw=lw,
                    label=None if cond in labelled else f"wires {style['label']}")
            labelled.add(cond)
            if cond == "mot" and w.get("role") != "shield" and grid is not None:
                order = np.argsort(s)
                zi = np.interp(grid, s[order], z[order], left=np.nan, right=np.nan)
                mot_low = zi if mot_low is None else np.fmin(mot_low, zi)
    required = folder.required_clearance_m("ground")
    if mot_low is not None and math.isfinite(required):
        ax.plot(grid * f, (mot_low - required) * f, color=theme.REQUIRED_CLEARANCE_COLOUR,
                ls=theme.REQUIRED_CLEARANCE_LINESTYLE, lw=1.2,
                label=f"required ground clearance below MOT ({units.fmt_length(required)})")

    # Violations of this span.
    rows = [r for r in folder.violations if str(r.get("span_id")) == span_id]
    if rows and axis is not None:
        norm, cmap = _deficit_norm(folder, units)
        v = folder.violation_xyz_local_m(rows)
        s, _ = folder.station_offset(span, v[:, :2])
        d = units.length(np.nan_to_num([to_number(r.get("deficit_m")) for r in rows]))
        top = np.argsort(d, kind="stable")  # largest deficit drawn last, on top
        ax.scatter(s[top] * f, _local_to_abs_z(folder, v[top, 2]) * f, c=d[top], cmap=cmap,
                   norm=norm, s=70, marker="o", edgecolors="black", linewidths=0.8, zorder=6,
                   label="violation (colour = deficit)")
        # One label per marker position (a tree seen at survey and at MOT shares its point).
        key = np.round(s / 4.0).astype(np.int64)  # markers within ~4 m share one label
        _, first, inverse = np.unique(key, return_index=True, return_inverse=True)
        for g, i0 in enumerate(first):
            ids = "\n".join(f"{rows[i].get('id')} ({rows[i].get('condition')})"
                             for i in np.flatnonzero(inverse.ravel() == g))
            ax.annotate(ids, (s[i0] * f, _local_to_abs_z(folder, v[i0, 2]) * f),
                        textcoords="offset points", xytext=(8, -5), fontsize=7.5, va="top",
                        bbox={"boxstyle": "round,pad=0.15", "fc": "white", "ec": "none",
                              "alpha": 0.75})

    if not any(folder.curve_local_m(w, c) is not None for w in wires for c in ("survey", "mot")):
        ax.text(0.5, 0.92, "no wire fitted in this span", transform=ax.transAxes, ha="center",
                va="top", color=theme.DARK_GREY, fontsize=10, style="italic")
    start = span.get("from_structure") or "the survey edge (partial span)"
    ax.set_xlabel(f"distance from {start} [{units.length_unit}]")
    ax.set_ylabel(f"elevation [{units.length_unit}]")
    title = f"Span {span_id}"
    if math.isfinite(length):
        title += f" — {units.fmt_length(length, 1)}"
    ax.set_title(title)
    ax.grid(True, color="#e4e4e4", lw=0.6)
    if math.isfinite(length):
        ax.set_xlim(-0.03 * length * f, 1.03 * length * f)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.16), ncol=3, fontsize=8,
                  frameon=False)
    if not ax.has_data():
        ax.text(0.5, 0.5, "nothing to draw: no fitted wires, ground or points for this span",
                transform=ax.transAxes, ha="center", va="center", color=theme.GREY)
    return png_bytes(fig)
