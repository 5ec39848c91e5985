"""Tests of the HTML report (clearaudit.report.html), including a headless Chromium load.

Unit conversions are checked against the definition of the international foot
(1 ft = 0.3048 m exactly, NIST Handbook 44, Appendix C) and of the pound-force
(1 lbf = 4.4482216152605 N exactly, NIST SP 811, Appendix B.8), not against our own factors.
"""
from __future__ import annotations

import csv
import html
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from report_fixture import make_output_folder

from clearaudit import CAUTION
from clearaudit.errors import InputError
from clearaudit.report.html import build_report

NASTY_NAME = 'Kestrel <script>alert("x")</script> & Marsh 132 kV'
CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                  "--no-first-run", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync"]


@pytest.fixture(scope="module")
def out_dir(tmp_path_factory):
    return make_output_folder(tmp_path_factory.mktemp("report") / "audit", line_name=NASTY_NAME)


@pytest.fixture(scope="module")
def metric_html(out_dir):
    path = build_report(out_dir)
    assert path == out_dir / "report.html"
    return path.read_text(encoding="utf-8")


@pytest.fixture(scope="module")
def imperial_html(out_dir):
    path = build_report(out_dir, units="imperial", out_path=out_dir / "report_imperial.html")
    return path.read_text(encoding="utf-8")


@pytest.fixture(scope="session")
def chromium():
    """Path of a Chromium binary; installs Debian's ``chromium`` when missing and root."""
    for name in ("chromium", "chromium-browser", "google-chrome"):
        exe = shutil.which(name)
        if exe:
            return exe
    if hasattr(os, "geteuid") and os.geteuid() == 0 and shutil.which("apt-get"):
        env = dict(os.environ, DEBIAN_FRONTEND="noninteractive")
        r = subprocess.run(["apt-get", "install", "-y", "chromium"], env=env,
                           capture_output=True, timeout=900)
        if r.returncode != 0:
            subprocess.run(["apt-get", "update"], env=env, capture_output=True, timeout=600)
            subprocess.run(["apt-get", "install", "-y", "chromium"], env=env,
                           capture_output=True, timeout=900)
        exe = shutil.which("chromium")
        if exe:
            return exe
    pytest.skip("headless Chromium is not installed (apt-get install -y chromium) and cannot "
                "be installed here (not root or no apt-get)")


def _spans(out_dir):
    with open(out_dir / "spans.csv", newline="") as f:
        return list(csv.DictReader(f))


def test_self_contained(metric_html):
    low = metric_html.lower()
    assert "<script" not in low  # the report needs no JavaScript at all
    assert "<link" not in low
    for pattern in (r'src\s*=\s*"(?!data:)', r'href\s*=\s*"(?!#)', r"url\("):
        assert not re.search(pattern, low), f"external reference matching {pattern!r}"
    assert "data:image/png;base64," in metric_html


def test_escaping_of_input_text(metric_html):
    assert '<script>alert("x")</script>' not in metric_html
    assert "&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt; &amp; Marsh" in metric_html
    # run.json option with markup is shown as text, not as markup.
    assert "<b>bold</b>" not in metric_html
    assert "fixture &lt;b&gt;bold&lt;/b&gt; &amp; co" in metric_html


def test_caution_verbatim_and_near_top(metric_html):
    caution = html.escape(CAUTION, quote=True)
    assert caution in metric_html
    first = metric_html.index(caution)
    assert first < metric_html.index("<section"), "the caution must come before the sections"
    assert "verified against the code in force" in metric_html[first:first + 2000]


def test_every_span_has_profile_image(out_dir, metric_html):
    span_ids = sorted({r["span_id"] for r in _spans(out_dir)})
    found = re.findall(r'<img data-span="([^"]+)"', metric_html)
    assert sorted(found) == span_ids


def test_summary_and_unfitted_reasons(metric_html):
    assert "3 (fitted 1, partial 1, not fitted 1)" in metric_html
    assert "12 (fitted 7, partial 1, not fitted 4)" in metric_html
    assert "too few wire points (9) to fit a catenary" in metric_html
    assert "wire runs off the survey after 62 % of the span" in metric_html
    # Ranked vegetation list: priorities appear in order.
    veg = metric_html[metric_html.index('id="vegetation"'):metric_html.index('id="other-violations"')]
    prios = [int(p) for p in re.findall(r'<tr><td class="num">(\d+)</td><td>V\d+', veg)]
    assert prios == sorted(prios) and len(prios) == 5


def test_metric_units(out_dir, metric_html):
    row = next(r for r in _spans(out_dir) if r["span_id"] == "S001-S002" and r["wire_id"] == "P1")
    sag = float(row["sag_survey_m"])
    ci = float(row["sag_survey_ci95_m"])
    assert f"{sag:,.2f} ± {ci:,.2f} m" in metric_html
    tension_kn = float(row["horizontal_tension_n"]) / 1000.0
    ci_kn = float(row["horizontal_tension_ci95_n"]) / 1000.0
    # the interval is shown with two significant digits, the value to the same decimals
    digits = max(1, 1 - int(np.floor(np.log10(ci_kn))))
    assert f"{tension_kn:,.{digits}f} ± {ci_kn:,.{digits}f} kN" in metric_html
    assert "18.0 °C" in metric_html


def test_imperial_units(out_dir, imperial_html):
    row = next(r for r in _spans(out_dir) if r["span_id"] == "S001-S002" and r["wire_id"] == "P1")
    foot = 0.3048  # international foot, exact (NIST Handbook 44, Appendix C)
    lbf = 4.4482216152605  # pound-force, exact (NIST SP 811, B.8)
    sag_ft = float(row["sag_survey_m"]) / foot
    ci_ft = float(row["sag_survey_ci95_m"]) / foot
    assert f"{sag_ft:,.2f} ± {ci_ft:,.2f} ft" in imperial_html
    ci_lbf = float(row["horizontal_tension_ci95_n"]) / lbf
    digits = max(0, 1 - int(np.floor(np.log10(ci_lbf))))
    assert f"{float(row['horizontal_tension_n']) / lbf:,.{digits}f} ± " in imperial_html
    assert " lbf" in imperial_html
    assert "64.4 °F" in imperial_html  # 18 °C = 64.4 °F (°F = °C × 9/5 + 32)
    # No length in metres left in the span tables.
    spans = imperial_html[imperial_html.index('id="spans"'):imperial_html.index('id="vegetation"')]
    assert not re.search(r"\d m<", spans)


def test_errors(tmp_path, out_dir):
    with pytest.raises(InputError):
        build_report(tmp_path / "nowhere")
    (tmp_path / "empty").mkdir()
    with pytest.raises(InputError):
        build_report(tmp_path / "empty")
    with pytest.raises(ValueError):
        build_report(out_dir, units="cubits")


@pytest.mark.browser
def test_loads_in_headless_chromium(chromium, out_dir, metric_html, tmp_path):
    # A test copy of the report with a probe script that records how many images decoded.
    probe = ("<script>window.addEventListener('load',()=>{const i=[...document.images];"
             "document.body.setAttribute('data-decoded',i.filter(x=>x.complete&&x.naturalWidth>0)"
             ".length);document.body.setAttribute('data-spans',"
             "document.querySelectorAll('img[data-span]').length);});</script>")
    test_copy = tmp_path / "probe.html"
    test_copy.write_text(metric_html.replace("</body>", probe + "</body>"), encoding="utf-8")
    profile = tmp_path / "chromium-profile"
    cmd = [chromium, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", "--enable-logging=stderr",
           "--v=0", "--virtual-time-budget=5000", "--dump-dom", test_copy.as_uri()]
    r = subprocess.run(cmd, capture_output=True, text=True, timeout=180)
    assert r.returncode == 0, r.stderr[-2000:]
    n_spans = len({row["span_id"] for row in _spans(out_dir)})
    assert f'data-spans="{n_spans}"' in r.stdout
    m = re.search(r'data-decoded="(\d+)"', r.stdout)
    assert m and int(m.group(1)) == n_spans + 1  # every profile and the plan view decoded
    console_errors = [ln for ln in r.stderr.splitlines()
                      if "CONSOLE" in ln and ("Error" in ln or "Uncaught" in ln)]
    assert not console_errors, console_errors
    assert "net::ERR" not in r.stderr


def test_fixture_follows_the_output_contract(out_dir):
    checker = Path("/work/shared/tools/check_outputs.py")
    if not checker.exists():
        pytest.skip("shared output checker not available")
    r = subprocess.run([sys.executable, str(checker), str(out_dir)], capture_output=True,
                       text=True, timeout=60)
    assert r.returncode == 0, r.stdout


def test_report_without_cloud_or_run_record(out_dir, tmp_path):
    # A folder with only model.json, spans.csv and violations.csv still gives a full report.
    part = tmp_path / "partial"
    part.mkdir()
    for name in ("model.json", "spans.csv", "violations.csv"):
        shutil.copy(out_dir / name, part / name)
    text = build_report(part, units="imperial").read_text(encoding="utf-8")
    assert len(re.findall(r"<img data-span=", text)) == 3
    assert "run.json is missing" in text
    assert "classified.laz" in text


def test_reason_text_follows_the_unit_system():
    # Reasons are written in SI by the audit; an imperial report shows them in feet
    # (1 ft = 0.3048 m exactly, NIST Handbook 44, Appendix C).
    from clearaudit.report.format import DisplayUnits
    from clearaudit.report.html import _reason_in_units

    text = "vegetation 0.33 m inside the 1.22 m requirement at survey; grows in 2.5 years"
    assert _reason_in_units(text, DisplayUnits("metric")) == text
    out = _reason_in_units(text, DisplayUnits("imperial"))
    assert f"{0.33 / 0.3048:.2f} ft" in out and f"{1.22 / 0.3048:.2f} ft" in out
    assert " m " not in out and "2.5 years" in out
