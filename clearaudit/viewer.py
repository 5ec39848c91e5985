"""3D viewer of a saved audit output folder (pyvista).

The scene is built from the files of the output contract only: the classified cloud
(classified.laz, coloured by class and thinned for display while keeping every wire point),
each wire's fitted curve at survey and at MOT from model.json, the violations of
violations.csv as spheres coloured and sized by clearance deficit, and structure and span
labels. Layers can be switched on and off with check boxes; a click on a marker or near a span
shows its details; the ``n`` key (``b`` for back) moves the camera to the next violation in
priority order.

Off-screen rendering (tests, screenshots, servers without a display) uses VTK's EGL render
window with Mesa's software rasteriser (llvmpipe) when no X display is set: on Debian/Ubuntu
the system packages ``libegl1``, ``libegl-mesa0``, ``libgl1-mesa-dri`` and ``libgbm1`` are
enough; no GPU and no X server are needed. Set ``VTK_DEFAULT_OPENGL_WINDOW`` yourself to
choose another back end (e.g. ``vtkOSOpenGLRenderWindow`` with ``libosmesa6``), or run under
``xvfb-run``. :func:`export_html` needs the ``trame-pyvista`` and ``nest_asyncio2`` packages.
"""
from __future__ import annotations

import math
import os
import textwrap
from pathlib import Path

import numpy as np

from clearaudit import CAUTION, theme
from clearaudit.report.format import DisplayUnits, fmt_percent
from clearaudit.report.outputs import read_outputs, to_number

WIRE_CLASSES = (13, 14)
#: Layer names, in the order of their check boxes.
LAYERS = ("points", "wires at survey", "wires at MOT", "violations", "labels")
#: Distance from the camera to a violation after jumping to it. [m]
FOCUS_DISTANCE_M = 70.0
#: A pick within this distance of a violation selects it. [m]
PICK_RADIUS_M = 4.0


def _prepare_offscreen() -> None:
    """Pick VTK's EGL window for headless rendering when there is no X display."""
    if not os.environ.get("DISPLAY") and not os.environ.get("WAYLAND_DISPLAY"):
        os.environ.setdefault("VTK_DEFAULT_OPENGL_WINDOW", "vtkEGLRenderWindow")


def _polyline_cells(curves: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Points and a VTK ``lines`` array for several polylines."""
    pts = np.vstack(curves)
    sizes = np.array([len(c) for c in curves])
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    cells = []
    for n, s in zip(sizes, starts, strict=True):
        cells.append(np.concatenate([[n], np.arange(s, s + n)]))
    return pts, np.concatenate(cells).astype(np.int64)


def _dashed_segments(curve: np.ndarray, dash_m: float = 4.0) -> np.ndarray:
    """Resample a polyline and keep every other dash; returns (k, 2, 3) segments. [m]"""
    seg = np.linalg.norm(np.diff(curve, axis=0), axis=1)
    s = np.concatenate([[0.0], np.cumsum(seg)])
    if s[-1] <= 0:
        return np.zeros((0, 2, 3))
    n = max(int(s[-1] / dash_m), 2)
    t = np.linspace(0.0, s[-1], n + 1)
    p = np.column_stack([np.interp(t, s, curve[:, k]) for k in range(3)])
    seg_pts = np.stack([p[:-1], p[1:]], axis=1)
    return seg_pts[::2]


def theme_rgb01(colour: str) -> tuple[float, float, float]:
    """A theme colour as three floats 0–1 (for VTK properties)."""
    r, g, b = theme.hex_to_rgb(colour)
    return r / 255.0, g / 255.0, b / 255.0


def _legend_actor(items: list[tuple[str, str, str]]):
    """A legend box with coloured icons and dark text (readable for every entry colour).

    ``items`` are (label, colour, icon) with icon ``square``, ``line`` or ``dashed``.
    """
    import vtk
    from vtkmodules.util.numpy_support import numpy_to_vtk

    legend = vtk.vtkLegendBoxActor()
    legend.SetNumberOfEntries(len(items))
    n = 16
    for i, (label, colour, icon) in enumerate(items):
        pix = np.full((n, n, 3), 255, dtype=np.uint8)
        rgb = np.array(theme.hex_to_rgb(colour), dtype=np.uint8)
        if icon == "square":
            pix[2:-2, 2:-2] = rgb
        else:
            band = pix[6:10]
            if icon == "dashed":
                band[:, [c for c in range(n) if (c // 4) % 2 == 0]] = rgb
            else:
                band[:] = rgb
        img = vtk.vtkImageData()
        img.SetDimensions(n, n, 1)
        arr = numpy_to_vtk(pix.reshape(-1, 3), deep=True, array_type=vtk.VTK_UNSIGNED_CHAR)
        arr.SetNumberOfComponents(3)
        img.GetPointData().SetScalars(arr)
        legend.SetEntry(i, img, label, theme_rgb01(theme.VIEWER_TEXT_COLOUR))
    legend.GetPositionCoordinate().SetCoordinateSystemToNormalizedViewport()
    legend.GetPositionCoordinate().SetValue(0.83, 0.03)
    legend.GetPosition2Coordinate().SetValue(0.15, 0.24)
    legend.UseBackgroundOn()
    legend.SetBackgroundColor(1.0, 1.0, 1.0)
    legend.SetBackgroundOpacity(0.9)
    legend.BorderOn()
    return legend


def _make_plotter_class():
    import pyvista as pv

    class AuditPlotter(pv.Plotter):
        """A pyvista ``Plotter`` holding one audit scene (see :func:`build_scene`).

        Attributes
        ----------
        folder : OutputFolder
            The outputs shown.
        units : DisplayUnits
            Display unit system of labels and details.
        layers : dict[str, list]
            Actors of each toggleable layer.
        violation_centres : numpy.ndarray
            Marker centres in scene coordinates (local metres), in priority order. [m]
        violation_sizes_px : numpy.ndarray
            Marker diameters on screen. [pixel]
        violation_rows : list[dict]
            The violations.csv rows of the markers, same order.
        current_violation : int
            Index of the violation the camera last jumped to (-1: none).
        span_axes : dict[str, tuple]
            Plan axis (start [m], unit direction, length [m]) of each span.
        n_points_drawn : int
            Cloud points in the scene after thinning.
        """

        # Declared here because pyvista plotters refuse new instance attributes.
        folder = None
        units = None
        layers: dict = {}
        violation_centres = np.zeros((0, 3))
        violation_sizes_px = np.zeros(0)
        violation_rows: list = []
        current_violation = -1
        span_axes: dict = {}
        n_points_drawn = 0
        deficit_limits_m = (0.0, 1.0)
        details_actor = None

        def set_layer_visible(self, name: str, visible: bool) -> None:
            """Show or hide one layer (see :data:`LAYERS`)."""
            if name not in self.layers:
                raise ValueError(f"unknown layer {name!r}; layers are {', '.join(self.layers)}.")
            for actor in self.layers[name]:
                actor.SetVisibility(bool(visible))
            self.render()

        def show_details(self, text: str) -> None:
            """Write ``text`` into the details box (upper right)."""
            self.details_actor.SetInput(text)
            self.render()

        def focus_violation(self, index: int) -> None:
            """Move the camera to a violation and show its details."""
            n = len(self.violation_rows)
            if n == 0:
                self.show_details("No violations in this audit.")
                return
            index %= n
            self.current_violation = index
            centre = self.violation_centres[index]
            cam = self.camera
            direction = np.asarray(cam.position) - np.asarray(cam.focal_point)
            norm = np.linalg.norm(direction)
            direction = direction / norm if norm > 0 else np.array([0.0, -1.0, 0.5])
            cam.focal_point = tuple(centre)
            cam.position = tuple(centre + direction * FOCUS_DISTANCE_M)
            self.reset_camera_clipping_range()
            self.show_details(self.describe_violation(index))

        def next_violation(self) -> None:
            """Jump to the next violation in priority order (key ``n``)."""
            self.focus_violation(self.current_violation + 1)

        def previous_violation(self) -> None:
            """Jump to the previous violation (key ``b``)."""
            self.focus_violation(max(self.current_violation, 0) - 1)

        def describe_violation(self, index: int) -> str:
            """Details of one violation as plain text (display units)."""
            r = self.violation_rows[index]
            u = self.units
            cond = {"mot": "at MOT", "survey": "at survey", "wind": "in wind",
                    "ice": "under ice"}.get(r.get("condition"), str(r.get("condition")))
            lines = [
                f"Violation {r.get('id')} - priority {r.get('priority'):.0f}"
                if math.isfinite(to_number(r.get("priority"))) else f"Violation {r.get('id')}",
                f"{r.get('kind')} {cond}",
                f"span {r.get('span_id')}, wire {r.get('wire_id')}",
                f"clearance {u.fmt_length(r.get('clearance_m'), 2, r.get('clearance_ci95_m'))}",
                f"required {u.fmt_length(r.get('required_m'))}",
                f"deficit {u.fmt_length(r.get('deficit_m'))}",
            ]
            if r.get("certainty"):
                lines.append(f"certainty: {r.get('certainty')}")
            if r.get("reason"):
                lines.append(str(r.get("reason")))
            lat, lon = to_number(r.get("latitude")), to_number(r.get("longitude"))
            if math.isfinite(lat) and math.isfinite(lon):
                lines.append(f"lat {lat:.6f}, lon {lon:.6f} (WGS 84)")
            return "\n".join(lines)

        def describe_span(self, span_id: str) -> str:
            """Details of one span as plain text (display units)."""
            f, u = self.folder, self.units
            span = f.span_record(span_id)
            length = to_number(span.get("span_length_m"))
            lines = [f"Span {span_id} ({span.get('from_structure')} -> {span.get('to_structure')})",
                     f"length {u.fmt_length(length, 1)}, status {span.get('status') or '-'}"]
            for w in f.wires_of(span_id):
                st = str(w.get("status", ""))
                if st == "not_fitted":
                    lines.append(f"{w.get('wire_id')}: not fitted ({w.get('note') or '-'})")
                    continue
                lines.append(
                    f"{w.get('wire_id')}: sag {u.fmt_length(w.get('sag_survey_m'), 2)} now, "
                    f"{u.fmt_length(w.get('sag_mot_m'), 2)} at MOT; "
                    f"H {u.fmt_force(w.get('horizontal_tension_n'))} "
                    f"({fmt_percent(w.get('rated_strength_pct'))} RTS)")
            return "\n".join(lines)

        def describe_nearest(self, point) -> str:
            """Details of the violation marker or span nearest to a picked point.

            Parameters
            ----------
            point
                Picked position in scene coordinates (local metres). [m]
            """
            p = np.asarray(point, dtype=float).reshape(3)
            if len(self.violation_centres):
                d = np.linalg.norm(self.violation_centres - p, axis=1)
                i = int(np.argmin(d))
                if d[i] <= PICK_RADIUS_M:
                    self.current_violation = i
                    return self.describe_violation(i)
            best, best_d = None, math.inf
            for sid, axis in self.span_axes.items():
                start, u, length = axis
                t = np.clip((p[:2] - start) @ u, 0.0, length)
                dist = np.linalg.norm(p[:2] - (start + t * u))
                if dist < best_d:
                    best, best_d = sid, dist
            if best is not None and best_d <= 40.0:
                return self.describe_span(best)
            return "Nothing selected: click a violation marker or near a span."

        def _on_pick(self, point) -> None:
            if point is None:
                return
            self.show_details(self.describe_nearest(point))

        def marker_display_xy(self, index: int) -> tuple[float, float]:
            """Display coordinates (pixels from the lower-left corner) of a violation marker."""
            import vtk

            c = vtk.vtkCoordinate()
            c.SetCoordinateSystemToWorld()
            c.SetValue(*map(float, self.violation_centres[index]))
            x, y = c.GetComputedDoubleDisplayValue(self.renderer)
            return float(x), float(y)

    return AuditPlotter


def build_scene(
    out_dir: str | Path,
    *,
    max_points: int = 2_000_000,
    units: str = "metric",
    off_screen: bool | None = None,
    window_size: tuple[int, int] = (1600, 1000),
    widgets: bool = True,
    seed: int = 0,
):
    """Build the 3D scene of a saved audit output folder.

    Parameters
    ----------
    out_dir
        Folder written by ``clearaudit audit --out DIR``.
    max_points
        Approximate number of cloud points drawn; the cloud is thinned at random to this many,
        keeping every wire point. [-]
    units
        ``"metric"`` or ``"imperial"``: units of labels and details (the scene itself is in
        metres relative to the model's local origin).
    off_screen
        Render without a window (``None``: pyvista's global setting).
    window_size
        Window size. [pixel]
    widgets
        Add the layer check boxes.
    seed
        Random seed of the thinning (the same folder gives the same picture).

    Returns
    -------
    AuditPlotter
        A ``pyvista.Plotter`` subclass with the scene, its layers and navigation methods.

    Raises
    ------
    ValueError
        For a bad ``max_points`` or unit system.
    clearaudit.errors.InputError
        When the folder or its model.json is missing or unreadable.
    """
    if not isinstance(max_points, (int, np.integer)) or max_points < 1:
        raise ValueError("max_points must be a positive whole number.")
    du = DisplayUnits(units)
    folder = read_outputs(out_dir)
    import pyvista as pv

    if off_screen or (off_screen is None and pv.OFF_SCREEN):
        _prepare_offscreen()
    plotter_cls = _make_plotter_class()
    pl = plotter_cls(off_screen=off_screen, window_size=list(window_size))
    pl.folder, pl.units = folder, du
    pl.layers = {name: [] for name in LAYERS}
    pl.current_violation = -1
    pl.set_background(theme.VIEWER_BACKGROUND)
    pl.span_axes = {}
    for sid in folder.span_ids():
        axis = folder.span_axis(folder.span_record(sid))
        if axis is not None:
            pl.span_axes[sid] = axis

    # Point cloud, coloured by class.
    n_total = folder.point_count()
    if n_total:
        xyz, cls = folder.read_points(keep_fraction=min(1.0, max_points / n_total),
                                      always_keep=WIRE_CLASSES, seed=seed)
        if len(xyz):
            cloud = pv.PolyData(xyz.astype(np.float32))
            cloud["class_rgb"] = theme.class_rgb(cls)
            actor = pl.add_mesh(cloud, scalars="class_rgb", rgb=True, style="points",
                                point_size=theme.VIEWER_POINT_SIZE, name="points",
                                show_scalar_bar=False, lighting=False)
            pl.layers["points"].append(actor)
        pl.n_points_drawn = len(xyz)
    else:
        pl.n_points_drawn = 0

    # Wire curves: survey solid, MOT dashed.
    survey, mot = [], []
    for sid in folder.span_ids():
        for w in folder.wires_of(sid):
            c = folder.curve_local_m(w, "survey")
            if c is not None:
                survey.append(c)
            c = folder.curve_local_m(w, "mot")
            if c is not None:
                mot.append(c)
    if survey:
        pts, lines = _polyline_cells(survey)
        mesh = pv.PolyData(pts, lines=lines)
        pl.layers["wires at survey"].append(pl.add_mesh(
            mesh, color=theme.CONDITION_STYLES["survey"]["colour"],
            line_width=theme.VIEWER_WIRE_WIDTH, name="wires_survey", lighting=False,
            label="wire at survey"))
    if mot:
        segs = np.concatenate([_dashed_segments(c) for c in mot])
        pts = segs.reshape(-1, 3)
        lines = np.column_stack([np.full(len(segs), 2), np.arange(0, 2 * len(segs), 2),
                                 np.arange(1, 2 * len(segs), 2)]).ravel()
        mesh = pv.PolyData(pts, lines=lines)
        pl.layers["wires at MOT"].append(pl.add_mesh(
            mesh, color=theme.CONDITION_STYLES["mot"]["colour"],
            line_width=theme.VIEWER_WIRE_WIDTH, name="wires_mot", lighting=False,
            label="wire at MOT (dashed)"))

    # Violations: sphere markers coloured by deficit and sized by deficit (screen-size spheres,
    # so they stay visible from far away and do not hide the tree when zoomed in).
    pl.violation_rows = list(folder.violations)
    centres = folder.violation_xyz_local_m()
    deficit = np.nan_to_num(np.array([to_number(r.get("deficit_m")) for r in pl.violation_rows]))
    lo, hi = theme.deficit_range(deficit)
    smin, smax = theme.VIEWER_MARKER_SIZE_PX
    steps = theme.VIEWER_MARKER_SIZE_STEPS
    level = np.round(np.clip((deficit - lo) / (hi - lo), 0, 1) * (steps - 1)).astype(int)
    sizes = smin + (smax - smin) * level / max(steps - 1, 1)
    pl.violation_centres, pl.violation_sizes_px = centres, sizes
    pl.deficit_limits_m = (lo, hi)
    first = True
    for size in np.unique(sizes):
        sel = sizes == size
        markers = pv.PolyData(centres[sel])
        markers["deficit"] = du.length(deficit[sel])
        actor = pl.add_mesh(
            markers, scalars="deficit", cmap=theme.deficit_colormap(),
            clim=(du.length(lo), du.length(hi)), style="points", point_size=float(size),
            render_points_as_spheres=True, lighting=False, name=f"violations_{size:g}",
            show_scalar_bar=first,
            scalar_bar_args={"title": f"clearance deficit [{du.length_unit}]",
                             "color": theme.VIEWER_TEXT_COLOUR, "vertical": True,
                             "position_x": 0.91, "position_y": 0.3, "height": 0.45,
                             "width": 0.045, "fmt": "%.1f", "title_font_size": 14,
                             "label_font_size": 12} if first else None)
        pl.layers["violations"].append(actor)
        first = False
    if len(centres) and pl.scalar_bar is not None:
        pl.layers["violations"].append(pl.scalar_bar)

    # Labels: structures at their tops, spans at mid-span above the wires.
    st = list(folder.structures.values())
    if st:
        top = np.array([[to_number(s.get("x")), to_number(s.get("y")),
                         to_number(s.get("z_top")) if math.isfinite(to_number(s.get("z_top")))
                         else to_number(s.get("z_ground"))] for s in st])
        ok = np.all(np.isfinite(top), axis=1)
        if ok.any():
            pos = folder.to_local_m(top[ok]) + np.array([0.0, 0.0, 4.0])
            pl.layers["labels"].append(pl.add_point_labels(
                pos, [str(s.get("id")) for s, k in zip(st, ok, strict=True) if k],
                font_size=14, text_color=theme.VIEWER_TEXT_COLOUR, shape_color="white",
                shape_opacity=0.75, show_points=False, always_visible=True, bold=True,
                name="structure_labels"))
    span_pos, span_txt = [], []
    for sid, (start, u, length) in pl.span_axes.items():
        mid = start + u * length / 2
        zs = [c[:, 2].max() for w in folder.wires_of(sid)
              for c in [folder.curve_local_m(w, "survey")] if c is not None]
        a, b = (folder.structures.get(str(folder.span_record(sid).get(k)), {})
                for k in ("from_structure", "to_structure"))
        z_top = [to_number(s.get("z_top")) for s in (a, b)]
        z_top = [folder.to_local_m([[0, 0, z]])[0, 2] for z in z_top if math.isfinite(z)]
        z = max(zs) if zs else (max(z_top) if z_top else 0.0)
        span_pos.append([mid[0], mid[1], z + 6.0])
        span_txt.append(sid)
    if span_pos:
        pl.layers["labels"].append(pl.add_point_labels(
            np.array(span_pos), span_txt, font_size=11, text_color=theme.DARK_GREY,
            shape_opacity=0.0, show_points=False, always_visible=True, name="span_labels"))

    # Texts: title, caution, details box, help.
    title = folder.line_name or "clearaudit scene"
    pl.add_text(f"{title} - {len(pl.violation_rows)} violations", position="upper_left",
                font_size=theme.VIEWER_FONT_SIZE + 2, color=theme.VIEWER_TEXT_COLOUR,
                name="title")
    pl.details_actor = pl.add_text(
        "Click a marker or a span for details.\nKeys: n = next violation, b = previous.",
        position=(0.99, 0.985), viewport=True, font_size=theme.VIEWER_FONT_SIZE,
        color=theme.VIEWER_TEXT_COLOUR, name="details")
    prop = pl.details_actor.GetTextProperty()
    prop.SetJustificationToRight()
    prop.SetVerticalJustificationToTop()
    prop.SetBackgroundColor(1.0, 1.0, 1.0)
    prop.SetBackgroundOpacity(0.8)
    legend = [("ground", theme.CLASS_COLOURS[2], "square"),
              ("vegetation", theme.CLASS_COLOURS[5], "square"),
              ("building", theme.CLASS_COLOURS[6], "square"),
              ("tower", theme.CLASS_COLOURS[15], "square"),
              ("phase wire points", theme.CLASS_COLOURS[14], "square"),
              ("shield wire points", theme.CLASS_COLOURS[13], "square"),
              ("wire at survey", theme.CONDITION_STYLES["survey"]["colour"], "line"),
              ("wire at MOT", theme.CONDITION_STYLES["mot"]["colour"], "dashed")]
    pl.add_actor(_legend_actor(legend), name="legend")
    caution = pl.add_text(textwrap.fill(CAUTION, 90), position="lower_left",
                          font_size=theme.VIEWER_FONT_SIZE, color=theme.VIEWER_TEXT_COLOUR,
                          name="caution")
    prop = caution.GetTextProperty()
    prop.SetBackgroundColor(theme_rgb01(theme.CAUTION_BACKGROUND))
    prop.SetBackgroundOpacity(0.95)
    prop.SetFrame(True)
    prop.SetFrameColor(theme_rgb01(theme.VERMILLION))
    prop.SetFrameWidth(2)

    if widgets:
        size, x0, y0 = 22, 12, int(window_size[1]) - 90
        for i, name in enumerate(LAYERS):
            y = y0 - i * (size + 8)
            pl.add_checkbox_button_widget(
                (lambda value, n=name: pl.set_layer_visible(n, value)), value=True,
                position=(x0, y), size=size, color_on=theme.BLUE, color_off=theme.LIGHT_GREY,
                background_color=theme.DARK_GREY)
            pl.add_text(name, position=(x0 + size + 8, y + 3), font_size=theme.VIEWER_FONT_SIZE,
                        color=theme.VIEWER_TEXT_COLOUR, name=f"layer_label_{i}")
    pl.add_key_event("n", pl.next_violation)
    pl.add_key_event("b", pl.previous_violation)
    pl.enable_point_picking(callback=pl._on_pick, show_message=False, show_point=False,
                            left_clicking=True, use_picker=False)
    _default_camera(pl)
    return pl


def _default_camera(pl) -> None:
    """An oblique view from the left of the line, fitted to the scene."""
    axes = list(pl.span_axes.values())
    if not axes:
        pl.view_isometric()
        return
    starts = np.array([a[0] for a in axes])
    ends = np.array([a[0] + a[1] * a[2] for a in axes])
    p0, p1 = starts[0], ends[-1]
    d = p1 - p0
    length = float(np.linalg.norm(d)) or 1.0
    u = d / length
    left = np.array([-u[1], u[0]])
    centre = np.array([*(p0 + p1) / 2, 0.0])
    bounds = pl.bounds
    centre[2] = (bounds[4] + bounds[5]) / 2 if np.all(np.isfinite(bounds)) else 0.0
    pos = centre + np.array([*(-left * 0.7 * length), 0.35 * length])
    pos[:2] -= u * 0.25 * length
    pl.camera_position = [tuple(pos), tuple(centre), (0.0, 0.0, 1.0)]
    pl.reset_camera()
    pl.camera.zoom(1.6)


def show(out_dir: str | Path, *, units: str = "metric", max_points: int = 2_000_000) -> None:
    """Open the interactive 3D viewer of an audit output folder (needs a display)."""
    pl = build_scene(out_dir, units=units, max_points=max_points, off_screen=False)
    pl.show(title=f"clearaudit - {pl.folder.line_name or Path(out_dir).name}")


def screenshot(
    out_dir: str | Path,
    png_path: str | Path,
    *,
    window_size: tuple[int, int] = (1600, 1000),
    units: str = "metric",
    max_points: int = 2_000_000,
) -> Path:
    """Render the scene off-screen to a PNG file (no display or GPU needed).

    Parameters
    ----------
    out_dir
        Audit output folder.
    png_path
        PNG file to write.
    window_size
        Image size (width, height). [pixel]
    units, max_points
        See :func:`build_scene`.

    Returns
    -------
    Path of the PNG.
    """
    pl = build_scene(out_dir, units=units, max_points=max_points, off_screen=True,
                     window_size=window_size)
    path = Path(png_path)
    path.parent.mkdir(parents=True, exist_ok=True)
    try:
        pl.screenshot(str(path))
    finally:
        pl.close()
    return path


def export_html(
    out_dir: str | Path,
    html_path: str | Path,
    *,
    units: str = "metric",
    max_points: int = 300_000,
) -> Path:
    """Write the scene as one shareable interactive HTML file (vtk.js, opens offline).

    Check boxes, picking and key bindings are not part of the export; the layers, labels and
    caution text are. Needs the ``trame-pyvista`` and ``nest_asyncio2`` packages.

    Parameters
    ----------
    out_dir
        Audit output folder.
    html_path
        HTML file to write.
    units, max_points
        See :func:`build_scene` (fewer points by default: the file embeds them).

    Returns
    -------
    Path of the HTML file.
    """
    pl = build_scene(out_dir, units=units, max_points=max_points, off_screen=True,
                     widgets=False)
    path = Path(html_path)
    path.parent.mkdir(parents=True, exist_ok=True)
    try:
        try:
            component = pl.trame
        except (ImportError, AttributeError) as e:
            raise ImportError("export_html needs the 'trame-pyvista' and 'nest_asyncio2' "
                              "packages: pip install trame-pyvista nest_asyncio2") from e
        component.export_html(str(path))
    finally:
        pl.close()
    return path
