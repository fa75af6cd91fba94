"""The HTML store report: self-contained, every plot an embedded PNG that a browser can decode."""

import base64
import io
import re
import shutil
import subprocess
from datetime import datetime

import numpy as np
import pytest

from graphkit.report import write_report

_IMG = re.compile(r'<img src="data:image/png;base64,([A-Za-z0-9+/=]+)"')
_PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)


def _versions(n):
    return [{"version": i, "status": "complete", "created_at": datetime(2026, 11, i), "is_current": i == n,
             "n_nodes": 1000 + i, "dim": 16,
             "metrics": {"link_auc_cosine": 0.90 + 0.01 * i, "micro_f1_at_10": 0.8, "per_ratio": [{"ratio": 0.1}],
                         "passed": True, "note": "text"},
             "timings": {"ingest": 1.0, "walks": 2.0 + i, "train": 5.0, "publish": 0.2}}
            for i in range(1, n + 1)]


@pytest.fixture(scope="module")
def full_report(tmp_path_factory):
    rng = np.random.default_rng(0)
    out = write_report(tmp_path_factory.mktemp("report") / "sub" / "report.html", versions=_versions(3),
                       degrees=rng.zipf(2.3, 2000), visit_counts=rng.poisson(40, 2000),
                       vectors=rng.normal(size=(2000, 16)).astype(np.float32), labels=rng.integers(0, 5, 2000),
                       title="Store <demo>")
    return out


def _images(html):
    return [base64.b64decode(m, validate=True) for m in _IMG.findall(html)]


def test_report_is_self_contained(full_report):
    html = full_report.read_text(encoding="utf-8")
    images = _images(html)
    assert len(images) == 5  # degrees, visits, projection, metric history, timings
    assert all(img.startswith(_PNG_MAGIC) for img in images)
    assert not re.search(r"https?://", html)
    assert all(src.startswith("data:") for src in re.findall(r'src="([^"]*)"', html))
    assert "<title>Store &lt;demo&gt;</title>" in html  # escaped


def test_report_images_decode(full_report):
    import matplotlib.image

    for img in _images(full_report.read_text(encoding="utf-8")):
        pixels = matplotlib.image.imread(io.BytesIO(img), format="png")  # reference decoder: matplotlib's PNG reader
        assert pixels.shape[0] > 100 and pixels.shape[1] > 100
        assert pixels.std() > 0.01  # not a blank canvas


def test_report_tables(full_report):
    html = full_report.read_text(encoding="utf-8")
    assert html.index("<td>3</td>") < html.index("<td>1</td>")  # newest first
    assert "<th>link_auc_cosine</th>" in html and "<th>micro_f1_at_10</th>" in html
    assert "<th>passed</th>" not in html and "<th>per_ratio</th>" not in html  # numbers only
    assert "2026-11-02 00:00:00" in html and "<td>1002</td>" in html


def test_report_missing_pieces(tmp_path):
    one = write_report(tmp_path / "one.html", versions=_versions(1)[:1], degrees=None, visit_counts=None,
                       vectors=None, labels=None, title="t")
    html = one.read_text(encoding="utf-8")
    assert len(_images(html)) == 2  # history (one point) and timings only
    assert "No degrees given." in html and "No vectors given." in html and "single point" in html
    empty = write_report(tmp_path / "empty.html", versions=[], degrees=np.zeros(5, np.int64), title="t")
    html = empty.read_text(encoding="utf-8")
    assert len(_images(html)) == 0 and "No versions." in html and "are zero" in html


def test_report_many_labels_and_missing_ones(tmp_path):
    rng = np.random.default_rng(1)
    labels = rng.integers(0, 40, 500).astype(object)
    labels[::7] = None
    out = write_report(tmp_path / "r.html", versions=[], vectors=rng.normal(size=(500, 4)), labels=labels,
                       title="t")
    html = out.read_text(encoding="utf-8")
    assert len(_images(html)) == 1 and "40 distinct" in html
    with pytest.raises(ValueError, match=r"labels must have one entry per vector row \(500\), got 3"):
        write_report(tmp_path / "bad.html", versions=[], vectors=rng.normal(size=(500, 4)), labels=[1, 2, 3],
                     title="t")


def test_report_subsamples_projection(tmp_path, monkeypatch):
    from graphkit import report

    monkeypatch.setattr(report, "MAX_PROJECTED_POINTS", 300)
    out = write_report(tmp_path / "r.html", versions=[], vectors=np.random.default_rng(2).normal(size=(1000, 3)),
                       title="t")
    assert "Showing 300 of 1000 vectors." in out.read_text(encoding="utf-8")


# Counts the images the browser decoded (naturalWidth > 0) once the page has loaded.
_COUNT_SCRIPT = """<script>
window.addEventListener("load", function () {
  var ok = 0, all = document.images;
  for (var i = 0; i < all.length; i++) { if (all[i].complete && all[i].naturalWidth > 0) { ok++; } }
  document.title = "decoded " + ok + " of " + all.length;
});
</script>"""


@pytest.mark.skipif(shutil.which("chromium") is None, reason="Debian's chromium package is not installed")
def test_report_renders_in_chromium(full_report, tmp_path):
    import matplotlib.image

    page = full_report.read_text(encoding="utf-8")
    # A deliberately broken image shows the count can come out short.
    page = page.replace("</body>", '<img src="data:image/png;base64,AAAA">' + _COUNT_SCRIPT + "</body>")
    probe = tmp_path / "probe.html"
    probe.write_text(page, encoding="utf-8")
    shot = tmp_path / "shot.png"
    cmd = ["chromium", "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", "--window-size=1200,3000",
           "--dump-dom", probe.as_uri()]
    run = subprocess.run(cmd, capture_output=True, text=True, timeout=120, env={"HOME": str(tmp_path),
                                                                               "PATH": "/usr/bin:/bin"})
    title = re.search(r"<title>([^<]*)</title>", run.stdout)
    assert title is not None, run.stderr[-2000:]
    assert title.group(1) == "decoded 5 of 6"
    pixels = matplotlib.image.imread(shot)
    assert pixels.shape[:2] == (3000, 1200) and pixels.std() > 0.05  # the page drew something
