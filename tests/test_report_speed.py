"""The report's faster paths draw exactly what the plain ones drew.

- ``OutputFolder.read_points`` decodes only the x/y, z and class layers of classified.laz and
  scales only the kept points: checked against laspy reading every layer and scaling every
  point itself (laspy's ``x = X * scale + offset``, the reference outside the project), for
  a layered (format 6) and a point-interleaved (format 3) file, with the same thinning.
- A span profile given the points cut to the box the span can reach
  (:class:`~clearaudit.report.plots.PointsByCell`, :func:`~clearaudit.report.html.profile_jobs`:
  what the report and the workers of a Dask run draw from) gives the PNG bytes of the profile
  given every point.
- ``png_bytes`` renders through an uncompressed PNG: the pixels are those of matplotlib's own
  ``savefig(bbox_inches="tight")`` PNG, quantised the same way.
"""
from __future__ import annotations

import io

import laspy
import numpy as np
import pytest
from report_fixture import make_output_folder

from clearaudit.report import plots
from clearaudit.report.format import DisplayUnits
from clearaudit.report.html import _PROFILE_REACH_M
from clearaudit.report.outputs import read_outputs


@pytest.fixture(scope="module")
def out_dir(tmp_path_factory):
    return make_output_folder(tmp_path_factory.mktemp("report-speed") / "audit",
                              line_name="Kestrel Ridge 132 kV")


def _reference_points(path, classes, keep_fraction, always_keep, seed, chunk_size, to_local):
    """Every layer decoded and every point scaled by laspy; the same random thinning."""
    rng = np.random.default_rng(seed)
    xyz_parts, cls_parts = [], []
    with laspy.open(path) as reader:
        for chunk in reader.chunk_iterator(chunk_size):
            cls = np.asarray(chunk.classification, dtype=np.uint8)
            mask = np.ones(len(cls), bool) if classes is None else np.isin(cls, classes)
            if keep_fraction < 1.0:
                mask &= (rng.random(len(cls)) < keep_fraction) | np.isin(cls, always_keep)
            xyz = np.column_stack([np.asarray(chunk.x)[mask], np.asarray(chunk.y)[mask],
                                   np.asarray(chunk.z)[mask]])
            xyz_parts.append(to_local(xyz))
            cls_parts.append(cls[mask])
    return np.concatenate(xyz_parts), np.concatenate(cls_parts)


@pytest.mark.parametrize("point_format", [6, 3])
def test_read_points_matches_laspy(out_dir, tmp_path, point_format):
    folder = read_outputs(out_dir)
    if point_format != 6:  # the same points in a point-interleaved format (no layers)
        las = laspy.read(folder.cloud_path)
        converted = laspy.convert(las, point_format_id=point_format, file_version="1.2")
        converted.write(folder.cloud_path)
    with laspy.open(folder.cloud_path) as reader:
        assert reader.header.point_format.id == point_format
        n = reader.header.point_count
    chunk = max(1, n // 3 + 7)  # several chunks, the last one short
    for kw in ({"classes": (2, 3, 4, 5), "keep_fraction": 0.4},
               {"keep_fraction": 0.25, "always_keep": (13, 14, 15, 16)},
               {"classes": (3, 4, 5)},
               {}):
        got = folder.read_points(chunk_size=chunk, seed=3, **kw)
        want = _reference_points(folder.cloud_path, kw.get("classes"),
                                 kw.get("keep_fraction", 1.0), kw.get("always_keep", ()), 3,
                                 chunk, folder.to_local_m)
        assert len(got[0]) > 0
        np.testing.assert_array_equal(got[0], want[0])
        np.testing.assert_array_equal(got[1], want[1])


def test_points_by_cell_box_and_span():
    rng = np.random.default_rng(5)
    xyz = rng.uniform(-300, 300, size=(20000, 3))
    xyz[::7, :2] = np.round(xyz[::7, :2] / 50.0) * 50.0  # on cell edges and box edges
    index = plots.PointsByCell(xyz, cell_m=50.0)
    for x0, y0, x1, y1 in ((-20.0, -40.0, 30.0, 100.0), (50.0, 50.0, 50.0, 50.0),
                           (400.0, 0.0, 500.0, 10.0), (-300.0, -300.0, 300.0, 300.0),
                           (-1000.0, -1000.0, 1000.0, 1000.0), (10.0, 10.0, 0.0, 0.0)):
        want = np.flatnonzero((xyz[:, 0] >= x0) & (xyz[:, 0] <= x1)
                              & (xyz[:, 1] >= y0) & (xyz[:, 1] <= y1))
        np.testing.assert_array_equal(index.within_box(x0, y0, x1, y1), want)
    # every point within the reach of a span's segment (any direction) is near it, and so
    # is every point a profile draws (5 m beyond the ends, 20 m across: reach 25 m)
    for angle in (0.0, 0.3, 0.7853981633974483, 1.5707963267948966, 2.5):
        u = np.array([np.cos(angle), np.sin(angle)])
        start, length, reach = np.array([-120.0, 35.0]), 260.0, 25.0
        rel = xyz[:, :2] - start
        s, off = rel @ u, rel @ np.array([-u[1], u[0]])
        dist = np.hypot(np.clip(s, None, 0.0) + np.clip(s - length, 0.0, None), off)
        drawn = (s >= -5.0) & (s <= length + 5.0) & (np.abs(off) <= 20.0)
        got = index.near_span((start, u, length), reach)
        assert np.all(np.diff(got) > 0)
        assert np.isin(np.flatnonzero(dist <= reach), got).all()
        assert np.isin(np.flatnonzero(drawn), got).all() and drawn.sum() > 50
    assert len(plots.PointsByCell(np.zeros((0, 3))).within_box(0, 0, 1, 1)) == 0


def test_span_profile_same_with_points_by_cell(out_dir):
    folder = read_outputs(out_dir)
    units = DisplayUnits("metric")
    xyz, cls = folder.read_points(classes=plots.VEGETATION + (plots.GROUND,))
    veg = xyz[np.isin(cls, plots.VEGETATION)]
    assert len(veg) > 100
    # points at the edges of what a profile draws (stations -5 ... length + 5, 20 m either
    # side of the axis), just inside and just outside: the band of x must keep them all
    extra = []
    for sid in folder.span_ids():
        axis = folder.span_axis(folder.span_record(sid))
        if axis is None:
            continue
        start, u, length = axis
        v = np.array([-u[1], u[0]])
        for s in (-5.2, -4.9, 0.0, length + 4.9, length + 5.2):
            for off in (-20.3, -19.9, 0.0, 19.9, 20.3):
                extra.append([*(start + s * u + off * v), 3.0])
    veg = np.vstack([veg, np.array(extra)])
    index = plots.PointsByCell(veg)
    for sid in folder.span_ids():
        plain = plots.span_profile(folder, sid, units, vegetation_xyz=veg)
        axis = folder.span_axis(folder.span_record(sid))
        # the points cut to the span's box with the report's reach, as the report (and a
        # worker) passes them
        cut = veg if axis is None else veg[index.near_span(axis, _PROFILE_REACH_M)]
        banded = plots.span_profile(folder, sid, units, vegetation_xyz=cut)
        assert banded == plain, sid


def test_span_profile_thinned_vegetation_same(out_dir, monkeypatch):
    """With more points near a span than a profile draws, the same random subset is drawn."""
    folder = read_outputs(out_dir)
    units = DisplayUnits("metric")
    xyz, cls = folder.read_points(classes=plots.VEGETATION)
    monkeypatch.setattr(plots, "MAX_PROFILE_POINTS", max(10, len(xyz) // 20))
    sid = folder.span_ids()[0]
    span = folder.span_record(sid)
    axis = folder.span_axis(span)
    s, off = folder.station_offset(span, xyz[:, :2])
    drawn = (np.abs(off) <= plots.PROFILE_HALF_WIDTH_M) & (s >= -5.0) & (s <= axis[2] + 5.0)
    assert drawn.sum() > plots.MAX_PROFILE_POINTS  # the thinning really happens
    cut = xyz[plots.PointsByCell(xyz).near_span(axis, _PROFILE_REACH_M)]
    assert plots.span_profile(folder, sid, units, vegetation_xyz=cut) == \
        plots.span_profile(folder, sid, units, vegetation_xyz=xyz)


def test_png_bytes_pixels_as_savefig():
    from PIL import Image

    def figure():
        fig, ax = plots.plt.subplots(figsize=(6, 3))
        x = np.linspace(0, 300, 200)
        ax.plot(x, 40 + 1e-3 * (x - 150) ** 2, label="wire")
        ax.scatter(x[::5], 20 + np.sin(x[::5]), s=4, alpha=0.5, label="trees")
        ax.set_title("Span A-B")
        ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.16), ncol=2)
        return fig

    ref = io.BytesIO()
    fig = figure()
    fig.savefig(ref, format="png", dpi=100, bbox_inches="tight", facecolor="white")
    plots.plt.close(fig)
    want = Image.open(io.BytesIO(ref.getvalue())).convert("RGB").quantize(
        colors=256, method=Image.Quantize.MEDIANCUT, dither=Image.Dither.NONE).convert("RGB")
    got = Image.open(io.BytesIO(plots.png_bytes(figure(), dpi=100))).convert("RGB")
    assert got.size == want.size
    np.testing.assert_array_equal(np.asarray(got), np.asarray(want))


def test_profile_jobs_draw_what_the_report_drew(out_dir):
    """The jobs (points cut per span) give every span the profile drawn from all points."""
    from clearaudit.report.html import MAX_REPORT_POINTS, profile_jobs

    folder = read_outputs(out_dir)
    units = DisplayUnits("imperial")
    n = folder.point_count()
    xyz, cls = folder.read_points(classes=plots.VEGETATION + (plots.GROUND,),
                                  keep_fraction=min(1.0, MAX_REPORT_POINTS / n))
    is_veg = np.isin(cls, plots.VEGETATION)
    jobs = profile_jobs(folder, units)
    pngs = plots.render_profiles(jobs)
    assert [j[2] for j in jobs] == folder.span_ids()
    for (_, _, sid, veg, _), png in zip(jobs, pngs, strict=True):
        assert veg is None or len(veg) < is_veg.sum()
        assert png == plots.span_profile(folder, sid, units, vegetation_xyz=xyz[is_veg],
                                         ground_xyz=xyz[~is_veg]), sid


def testprofiles_on_engine_a_dask_cluster_same_report(out_dir, tmp_path):
    """Two local Dask workers draw the profiles: the report is the one drawn here."""
    pytest.importorskip("distributed")
    import re

    from clearaudit.distributed import engine_for
    from clearaudit.pipeline import profiles_on_engine
    from clearaudit.report.html import build_report

    here = build_report(out_dir, out_path=tmp_path / "here.html").read_text(encoding="utf-8")
    with engine_for(workers=2) as engine:
        there = build_report(out_dir, out_path=tmp_path / "there.html",
                             map_profiles=profiles_on_engine(engine)).read_text(encoding="utf-8")
    stamp = re.compile(r"report generated [^·<]*")
    assert stamp.sub("", there) == stamp.sub("", here)
    assert there.count("data:image/png;base64,") == here.count("data:image/png;base64,") > 3


def test_report_command_on_a_local_cluster(out_dir, tmp_path):
    """``clearaudit report DIR --workers 2``: the same images as the report drawn here; a bad
    worker count is one line and exit code 2, the report left as it was."""
    pytest.importorskip("distributed")
    import re
    import shutil
    import subprocess
    import sys

    folder = tmp_path / "audit"
    shutil.copytree(out_dir, folder)
    (folder / "report.html").unlink(missing_ok=True)
    cmd = [sys.executable, "-m", "clearaudit.cli", "report", str(folder)]
    bad = subprocess.run(cmd + ["--workers", "-1"], capture_output=True, text=True, timeout=300)
    assert bad.returncode == 2 and len(bad.stderr.strip().splitlines()) == 1
    assert "--workers" in bad.stderr and "Traceback" not in bad.stderr
    assert not (folder / "report.html").exists()
    done = subprocess.run(cmd + ["--workers", "2"], capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-2000:]
    from clearaudit.report.html import build_report

    here = build_report(out_dir, out_path=tmp_path / "here.html").read_text(encoding="utf-8")
    there = (folder / "report.html").read_text(encoding="utf-8")
    images = re.compile(r"data:image/png;base64,[A-Za-z0-9+/=]+")
    assert images.findall(there) == images.findall(here)
    assert len(images.findall(here)) > 3
