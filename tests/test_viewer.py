"""Tests of the 3D viewer (clearaudit.viewer), rendered off-screen.

The marker check projects a violation's world position to the screen with VTK's own
``vtkCoordinate`` (world -> display, independent of our code) and looks for the marker's
colour from the theme's deficit scale in the rendered pixels there.
"""
from __future__ import annotations

import numpy as np
import pytest

pv = pytest.importorskip("pyvista")

from report_fixture import make_output_folder  # noqa: E402

from clearaudit import theme, viewer  # noqa: E402
from clearaudit.report.outputs import read_outputs  # noqa: E402

WINDOW = (900, 560)


@pytest.fixture(scope="module")
def out_dir(tmp_path_factory):
    return make_output_folder(tmp_path_factory.mktemp("viewer") / "audit")


@pytest.fixture(scope="module")
def scene(out_dir):
    pl = viewer.build_scene(out_dir, off_screen=True, window_size=WINDOW)
    yield pl
    pl.close()


def _window_min_distance(img, xy, rgb255, half=3):
    """Smallest RGB distance to ``rgb255`` in a small window around display point ``xy``."""
    h = img.shape[0]
    col, row = int(round(xy[0])), int(round(h - 1 - xy[1]))
    win = img[max(row - half, 0): row + half + 1, max(col - half, 0): col + half + 1, :3]
    return float(np.min(np.linalg.norm(win.astype(float) - rgb255, axis=2)))


def test_offscreen_render_is_not_blank(scene):
    img = scene.screenshot(return_img=True)
    assert img.shape[:2] == (WINDOW[1], WINDOW[0])
    colours = np.unique(img.reshape(-1, img.shape[2])[:, :3], axis=0)
    assert len(colours) > 50, "the off-screen render looks blank"
    # Class colours of the theme are drawn (ground and vegetation points).
    for code in (2, 5):
        target = np.array(theme.hex_to_rgb(theme.CLASS_COLOURS[code]), dtype=float)
        d = np.linalg.norm(img[..., :3].astype(float) - target, axis=2)
        assert (d < 12).sum() > 20, f"class {code} colour not found in the render"


def test_violation_colour_at_projected_marker(scene):
    rows = scene.violation_rows
    assert len(rows) >= 1
    lo, hi = scene.deficit_limits_m
    scene.set_layer_visible("violations", True)
    img_on = scene.screenshot(return_img=True)
    scene.set_layer_visible("violations", False)
    img_off = scene.screenshot(return_img=True)
    scene.set_layer_visible("violations", True)
    checked = 0
    for i, r in enumerate(rows):
        xy = scene.marker_display_xy(i)
        if not (0 <= xy[0] < WINDOW[0] and 0 <= xy[1] < WINDOW[1]):
            continue
        expected = theme.deficit_rgb(float(r["deficit_m"]), lo, hi)[0] * 255.0
        # Markers are unlit, so the pixel shows the colour-map colour itself (8-bit LUT).
        if _window_min_distance(img_on, xy, expected) < 20.0:
            checked += 1
    # Overlapping markers (one tree at survey and at MOT) hide one another: most must show.
    assert checked >= len(rows) - 2, f"only {checked} of {len(rows)} markers found"
    # The top-priority marker's colour disappears when the layer is hidden.
    xy = scene.marker_display_xy(0)
    expected = theme.deficit_rgb(float(rows[0]["deficit_m"]), lo, hi)[0] * 255.0
    assert _window_min_distance(img_on, xy, expected) < 20.0
    assert _window_min_distance(img_off, xy, expected) > 20.0


def test_next_violation_moves_camera_and_shows_details(scene):
    scene.current_violation = -1
    scene.next_violation()
    assert scene.current_violation == 0
    np.testing.assert_allclose(scene.camera.focal_point, scene.violation_centres[0], atol=1e-6)
    text = scene.details_actor.GetInput()
    assert scene.violation_rows[0]["id"] in text and "deficit" in text
    scene.next_violation()
    assert scene.current_violation == 1
    scene.previous_violation()
    assert scene.current_violation == 0


def test_pick_describes_marker_or_span(scene):
    text = scene.describe_nearest(scene.violation_centres[1] + np.array([0.5, 0.0, 0.0]))
    assert scene.violation_rows[1]["id"] in text
    start, u, length = scene.span_axes["S002-S003"]
    mid = np.array([*(start + u * length / 2), 150.0])
    text = scene.describe_nearest(mid)
    assert text.startswith("Span S002-S003")
    assert "P3" in text


def test_layers_toggle(scene):
    for name in viewer.LAYERS:
        assert scene.layers[name], f"layer {name} is empty"
        scene.set_layer_visible(name, False)
        assert not any(a.GetVisibility() for a in scene.layers[name])
        scene.set_layer_visible(name, True)
    with pytest.raises(ValueError):
        scene.set_layer_visible("no such layer", True)


def test_decimation_keeps_all_wire_points(out_dir):
    folder = read_outputs(out_dir)
    _, cls_all = folder.read_points()
    xyz, cls = folder.read_points(keep_fraction=0.05, always_keep=viewer.WIRE_CLASSES)
    n_wire = int(np.isin(cls_all, viewer.WIRE_CLASSES).sum())
    assert int(np.isin(cls, viewer.WIRE_CLASSES).sum()) == n_wire
    n_other = int((~np.isin(cls_all, viewer.WIRE_CLASSES)).sum())
    kept_other = int((~np.isin(cls, viewer.WIRE_CLASSES)).sum())
    # Binomial thinning: 5 % kept, within 5 standard deviations.
    sd = np.sqrt(n_other * 0.05 * 0.95)
    assert abs(kept_other - 0.05 * n_other) < 5 * sd


def test_screenshot_file_and_imperial_labels(out_dir, tmp_path):
    png = viewer.screenshot(out_dir, tmp_path / "v.png", window_size=(640, 400), units="imperial")
    assert png.exists() and png.stat().st_size > 5_000
    pl = viewer.build_scene(out_dir, off_screen=True, window_size=(640, 400), units="imperial",
                            widgets=False, max_points=5_000)
    try:
        assert "ft" in pl.describe_violation(0)
        assert pl.n_points_drawn < 5_000 + 6_000  # thinned points plus every wire point
    finally:
        pl.close()


def test_bad_arguments(out_dir):
    with pytest.raises(ValueError):
        viewer.build_scene(out_dir, off_screen=True, max_points=0)
    with pytest.raises(ValueError):
        viewer.build_scene(out_dir, off_screen=True, units="furlongs")


def test_export_html(out_dir, tmp_path):
    pytest.importorskip("trame_pyvista", reason="export_html needs trame-pyvista")
    pytest.importorskip("nest_asyncio2", reason="export_html needs nest_asyncio2")
    path = viewer.export_html(out_dir, tmp_path / "scene.html", max_points=20_000)
    text = path.read_text(encoding="utf-8", errors="replace")
    assert path.stat().st_size > 50_000
    assert "<html" in text.lower()
