"""The HTML report as a real browser sees it (specan/report.py).

Each test writes a report, lets Debian's headless chromium load it and run its
script, and reads back the DOM chromium dumps (``--dump-dom``): every catalogue
row, the flags, the images, the order, and that header strings are text, not
markup. Skips, saying so, where no chromium is installed (CI installs it).
"""

from __future__ import annotations

import os
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from specan import pipeline, report

pytestmark = pytest.mark.browser

EVIL = "<script>document.body.setAttribute('data-pwned','yes')</script>"


def _chromium():
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    if os.environ.get("CI"):
        pytest.fail("no chromium in CI: .ci/run should have installed Debian's chromium")
    pytest.skip("no chromium on this machine (CI installs Debian's chromium; apt-get install -y chromium)")


def dump_dom(page: Path, tmp_path: Path, fragment: str = "") -> str:
    """The DOM of ``page`` after chromium has loaded it and run its scripts."""
    profile = tmp_path / f"chromium-profile{len(fragment)}"
    cmd = [_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
           "--disable-component-update", "--no-first-run", "--disable-sync", f"--user-data-dir={profile}",
           "--dump-dom", page.resolve().as_uri() + fragment]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    assert "<html" in done.stdout
    return done.stdout


class _Dom(HTMLParser):
    """Collects body attributes, script elements and the catalogue's rows from dumped HTML."""

    def __init__(self, text):
        super().__init__(convert_charrefs=True)
        self.body = {}
        self.scripts = 0
        self.rows = []  # {"attrs", "cells": [text], "imgs": [src], "links": [href], "flags": [text]}
        self.headers = []
        self._in_tbody = self._in_th = False
        self._cell = None
        self._flag = None
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "body":
            self.body = a
        elif tag == "script":
            self.scripts += 1
        elif tag == "tbody":
            self._in_tbody = True
        elif tag == "th":
            self._in_th = True
            self.headers.append(a.get("data-column"))
        elif self._in_tbody and tag == "tr":
            self.rows.append({"attrs": a, "cells": [], "imgs": [], "links": [], "flags": []})
        elif self._in_tbody and tag == "td":
            self._cell = []
        elif self._in_tbody and tag == "img":
            self.rows[-1]["imgs"].append(a.get("src", ""))
        elif self._in_tbody and tag == "a":
            self.rows[-1]["links"].append(a.get("href", ""))
        elif self._in_tbody and tag == "span" and "flag" in (a.get("class") or ""):
            self._flag = []

    def handle_endtag(self, tag):
        if tag == "tbody":
            self._in_tbody = False
        elif tag == "th":
            self._in_th = False
        elif self._in_tbody and tag == "td" and self._cell is not None:
            self.rows[-1]["cells"].append("".join(self._cell).strip())
            self._cell = None
        elif tag == "span" and self._flag is not None:
            self.rows[-1]["flags"].append("".join(self._flag))
            self._flag = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)
        if self._flag is not None:
            self._flag.append(data)


def _thumb_and_plot(out: Path, stem: str):
    from specan.plots import _canvas, _png

    fig = _canvas(2, 1)
    fig.add_subplot().plot([0, 1], [1, 0])
    (out / "plots").mkdir(parents=True, exist_ok=True)
    (out / "plots" / f"{stem}.png").write_bytes(_png(fig, 50))
    (out / "plots" / f"{stem}_thumb.png").write_bytes(_png(fig, 30))
    return f"plots/{stem}.png", f"plots/{stem}_thumb.png"


def _records(out):
    """Hand-made rows: what the report must show, whatever the science stages do today."""
    rows = [
        ("n1/plain.fits", "Plain Star", "ok", "", "", 120.0, 12.5),
        ("n1/evil.fits", EVIL, "ok", "", "emission", 80.0, -3.0),
        ("n1/amp.fits", 'Smith & "Jones" <b>', "partial", "velocity: too few lines", "low_snr", 4.0, None),
        ("n1/broken.fits", "", "error", "read: size 8657 bytes is not a multiple of 2880: the FITS file is truncated",
         "", None, None),
        ("n1/fast.fits", "Runner", "ok", "", "high_velocity,unbound", 95.0, 612.0),
    ]
    records = []
    for i, (file, obj, status, reason, flags, snr, rv) in enumerate(rows):
        values = {"file": file, "object": obj, "status": status, "reason": reason, "flags": flags,
                  "snr": snr, "rv": rv, "rv_err": None if rv is None else 1.5}
        if status != "error":
            values["plot"], values["thumbnail"] = _thumb_and_plot(out, f"s{i}")
        records.append({"values": values, "units": {"rv": "km / s", "rv_err": "km / s"}})
    return rows, records


def test_report_rows_flags_images_order_and_escaping(tmp_path):
    out = tmp_path / "out"
    rows, records = _records(out)
    cat = pipeline.assemble_catalogue(records, meta={"created_utc": "2025-09-15T05:00:00Z"})
    page = out / "report.html"
    report.write_report(cat, out, page)
    dom = _Dom(dump_dom(page, tmp_path))

    # the page's own script ran (it marks the body) and nothing was injected
    assert dom.body.get("data-sortable") == "ready"
    assert "data-pwned" not in dom.body
    assert dom.scripts == 1
    # every catalogue row, once
    files = [r["attrs"]["data-file"] for r in dom.rows]
    assert sorted(files) == sorted(r[0] for r in rows)
    # needing a look first: the error, then flagged or declined rows (by file), then the rest
    assert files == ["n1/broken.fits", "n1/amp.fits", "n1/evil.fits", "n1/fast.fits", "n1/plain.fits"]
    by_file = {r["attrs"]["data-file"]: r for r in dom.rows}
    # header strings appear as text, exactly
    col = dom.headers.index("object")  # headers include the plot column
    assert by_file["n1/evil.fits"]["cells"][col] == EVIL
    assert by_file["n1/amp.fits"]["cells"][col] == 'Smith & "Jones" <b>'
    # flags as separate badges
    assert by_file["n1/fast.fits"]["flags"] == ["high_velocity", "unbound"]
    assert by_file["n1/evil.fits"]["flags"] == ["emission"]
    assert by_file["n1/plain.fits"]["flags"] == []
    # thumbnails embedded, linking to the full plots beside the page
    for file, r in by_file.items():
        if file == "n1/broken.fits":
            assert r["imgs"] == [] and "truncated" in r["cells"][dom.headers.index("reason")]
            continue
        assert len(r["imgs"]) == 1 and r["imgs"][0].startswith("data:image/png;base64,")
        assert len(r["links"]) == 1 and (out / r["links"][0]).is_file()
    # units in the headings
    assert "RV (km / s)" in dump_dom(page, tmp_path)


def test_report_sorts_in_the_browser(tmp_path):
    out = tmp_path / "out"
    _, records = _records(out)
    cat = pipeline.assemble_catalogue(records)
    page = out / "report.html"
    report.write_report(cat, out, page)
    dom = _Dom(dump_dom(page, tmp_path, "#sort=-rv"))
    col = dom.headers.index("rv")
    shown = [r["cells"][col] for r in dom.rows]
    numbers = [float(x) for x in shown if x]
    assert numbers == sorted(numbers, reverse=True) == [612.0, 12.5, -3.0]
    assert shown[3:] == ["", ""]  # blanks last


def test_report_of_a_real_run(tmp_path, monkeypatch):
    from test_pipeline import BASIC, small_night, write_spectrum

    monkeypatch.setattr(pipeline, "code_fingerprint", lambda: "test")
    night = small_night(tmp_path / "night", count=2)
    write_spectrum(night / "evil.fits", name=EVIL, seed=7)
    out = tmp_path / "out"
    summary = pipeline.run([night], out, stages=BASIC, plots="all")
    dom = _Dom(dump_dom(out / "report.html", tmp_path))
    assert dom.body.get("data-sortable") == "ready" and "data-pwned" not in dom.body
    assert dom.scripts == 1
    cat = summary.catalogue
    assert sorted(r["attrs"]["data-file"] for r in dom.rows) == sorted(str(f) for f in cat["file"])
    col = dom.headers.index("object")
    assert EVIL in [r["cells"][col] for r in dom.rows]
    n_plots = int(np.sum([bool(p) for p in cat["plot"]]))
    assert n_plots == 3
    assert sum(len(r["imgs"]) for r in dom.rows) == n_plots
    for r in dom.rows:
        for href in r["links"]:
            assert (out / href).is_file()
    # errors first
    statuses = [r["attrs"]["class"] for r in dom.rows]
    assert statuses[:3] == ["error"] * 3


def test_report_states_its_assumptions(tmp_path, monkeypatch):
    from test_pipeline import BASIC, small_night

    monkeypatch.setattr(pipeline, "code_fingerprint", lambda: "test")
    night = small_night(tmp_path / "night", count=1)
    out = tmp_path / "out"
    pipeline.run([night], out, stages=BASIC)
    html = (out / "report.html").read_text()
    section = html[html.index('id="assumptions"'):]
    section = section[: section.index("</ul>")]
    for needed in ("Morton 2000", "IERS", "Galactocentric", "533 km/s", "Fitzpatrick (1999)"):
        assert needed in section, needed


def test_report_names_the_templates_and_the_parameter_model(tmp_path, monkeypatch):
    # the velocity templates and the parameter model are assumptions too (their sources: MILES)
    from test_pipeline import plain_night

    monkeypatch.setattr(pipeline, "code_fingerprint", lambda: "test")
    night = plain_night(tmp_path / "night", 1)
    out = tmp_path / "out"
    cat = pipeline.run([night], out, stages=("read", "prepare", "velocity", "classify"), plots="none").catalogue
    html = (out / "report.html").read_text()
    section = html[html.index('id="assumptions"'):]
    section = section[: section.index("</ul>")]
    assert "Velocity templates:" in section and "rv_err combines" in section
    kind = str(cat["template_kind"][0])
    assert {"library": "MILES library", "synth": "synthetic spectra"}[kind] in section
    assert "quadratic spectral model learnt from the MILES library at 4.5 A" in section
    # the built-in calibration types with the library neighbours, and the report says so
    assert str(cat["type_evidence"][0]) == "criteria and library neighbours"
    assert "MILES library stars whose whole spectra match best" in section
