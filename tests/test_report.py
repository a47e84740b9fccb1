"""HTML reports: escaping, self-containment, and rendering in headless Chromium.

The rendering test installs Debian's chromium through scripts/ensure_browser.sh when
no browser is found (common practice, no source), renders a comparison report of
three film candidates and checks the DOM Chromium built and its screenshot.
"""

from __future__ import annotations

import base64
import io
import re
import shutil
import subprocess
import tempfile
import types
from pathlib import Path

import numpy as np
import pytest
from conftest import skip_or_fail
from test_compare import film, write_specs
from test_sweep import closed_form_evaluator, film_beta_c

from designer import report as rp

ROOT = Path(__file__).resolve().parents[1]
CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                  "--no-first-run", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync"]


def _png(color=(200, 30, 30)) -> bytes:
    from PIL import Image

    buf = io.BytesIO()
    Image.new("RGB", (8, 6), color).save(buf, format="PNG")
    return buf.getvalue()


def test_text_is_escaped_and_the_file_needs_nothing_from_outside():
    png = _png()
    rep = rp.Report("A <b>title</b>", subtitle="x & y", sections=(
        rp.Section("S <1>", (rp.Paragraph("<script>alert(1)</script>"),
                             rp.Facts((("k<", "v>"),)),
                             rp.Table(("a", "b"), (("<i>", "2"),), caption="c&d"),
                             rp.Image(png, "cap", "alt\"text"))),),
        provenance={"spec_sha256": "<none>"})
    html = rp.render_html(rep)
    assert "<script>" not in html and "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "A &lt;b&gt;title&lt;/b&gt;" in html and "&lt;i&gt;" in html
    assert 'alt="alt&quot;text"' in html
    # offline: no external references of any kind
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:|//)""", html)
    assert "<link" not in html and "@import" not in html
    data = re.findall(r'src="data:image/png;base64,([^"]+)"', html)
    assert len(data) == 1 and base64.b64decode(data[0]) == png


def test_image_refuses_non_png():
    with pytest.raises(ValueError, match="PNG"):
        rp.image(b"GIF89a....")


def test_number_formatting():
    assert rp.fmt(None) == "—" and rp.fmt(float("nan")) == "—"
    assert rp.fmt(2.0921577846300645e-08) == "2.092e-08"
    assert rp.fmt([3.0, 4.0], "V") == "5 V"          # [re, im] -> modulus
    assert rp.fmt(0.123456, digits=2) == "0.12"


def test_evaluation_section_shows_the_headline():
    result = {"electron": {"voltage_V": 2e5, "beta": 0.6953},
              "laser": {"wavelength_m": 8e-7, "angle_deg": 30.0, "peak_field_V_per_m": 1.0},
              "sample": {"family": "membrane"},
              "coupling": {"beta_c": 2.0921577846300645e-08, "structure_factor": 0.6485,
                           "damage_factor": None, "max_field_rule": "planar stack"}}
    sec = rp.evaluation_section(result)
    html = rp.render_html(rp.Report("r", sections=(sec,)))
    assert re.search(r'<dl class="headline"><dt>[^<]*</dt><dd>2\.092e-08</dd>', html)
    assert "0.6485" in html and "planar stack" in html and "membrane" in html


# -- headless Chromium ---------------------------------------------------------------

def _browser() -> str:
    proc = subprocess.run(["bash", str(ROOT / "scripts" / "ensure_browser.sh")],
                          capture_output=True, text=True, timeout=900)
    lines = proc.stdout.strip().splitlines()
    path = lines[-1] if lines else ""
    if not path or not shutil.which(path):
        skip_or_fail("no Chromium available: " + proc.stderr.strip()[-300:])
    return path


def _chromium(browser: str, *args: str) -> subprocess.CompletedProcess:
    with tempfile.TemporaryDirectory(prefix="velomatch-chromium-") as profile:
        return subprocess.run([browser, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", *args],
                              capture_output=True, text=True, timeout=180)


def test_compare_report_renders_in_headless_chromium(tmp_path):
    from designer.compare import compare_command

    browser = _browser()
    raws = {"alpha-film": film(200.0, 40.0), "bravo-film": film(600.0, 40.0),
            "charlie-film": film(1000.0, 60.0)}
    paths = write_specs(tmp_path, raws)
    out = tmp_path / "cmp"

    args = types.SimpleNamespace(specs=paths, out=str(out), overwrite=False)
    assert compare_command(args, evaluator=closed_form_evaluator, workers=0) == 0
    page = (out / "report.html").resolve().as_uri()

    dom = _chromium(browser, "--dump-dom", page)
    assert dom.returncode == 0, dom.stderr[-500:]
    html = dom.stdout
    assert "<table" in html and html.count("<img") == 3
    for name, raw in raws.items():
        headline = format(film_beta_c(raw), ".4g")   # |beta_c|, 4 significant digits
        row = re.search(rf'<tr[^>]*id="candidate-{name}"[^>]*>(.*?)</tr>', html, re.S)
        assert row is not None, name
        cells = re.findall(r"<td>(.*?)</td>", row.group(1))
        assert cells[1] == name and cells[3] == headline

    shot = tmp_path / "shot.png"
    res = _chromium(browser, f"--screenshot={shot}", "--window-size=1200,1600",
                    "--hide-scrollbars", page)
    assert res.returncode == 0 and shot.exists(), res.stderr[-500:]
    from PIL import Image

    img = Image.open(shot).convert("RGB")
    assert img.size == (1200, 1600)
    pixels = np.asarray(img, dtype=float)
    assert len(img.getcolors(maxcolors=1 << 24)) > 50
    assert pixels.std() > 10.0
    # the dark header band is drawn (the page is styled, not a blank default page)
    assert pixels[:40].mean() < 120 < pixels[200:].mean()


@pytest.mark.slow
def test_evaluation_report_of_the_real_pipeline(tmp_path):
    """``evaluate --report`` page: the headline is the pipeline's |beta_c|, which for a
    film is the closed form of test_sweep (Born & Wolf ch. 1 Airy fields)."""
    import tomli_w

    from designer.evaluate import evaluate, evaluation_json
    from designer.spec import load_spec

    raw = film(200.0, 40.0)
    path = tmp_path / "f.toml"
    path.write_text(tomli_w.dumps(raw))
    ev = evaluate(load_spec(path))
    result = evaluation_json(ev)
    html = rp.evaluation_report(ev, result)
    assert result["coupling"]["beta_c"] == pytest.approx(film_beta_c(raw), rel=1e-9)
    assert f"<dd>{format(result['coupling']['beta_c'], '.4g')}</dd>" in html
    assert "Evaluation of f.toml" in html and html.count("data:image/png;base64,") == 1
