"""The HTML store report: self-contained, every plot an embedded PNG that a browser can decode."""

import base64
import io
import re
import shutil
import subprocess
from datetime import datetime
from pathlib import Path

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
    versions = html[html.index('<section id="versions">'):html.index('<section id="metrics">')]
    assert versions.index("<td class=\"text\">3</td>") < versions.index("<td class=\"text\">1</td>")  # newest first
    assert "2026-11-02 00:00" in versions and "1,002" in versions and "complete, current" in versions
    metrics = html[html.index('<section id="metrics">'):]
    # human labels, the catalog key only as a small code note beside them
    assert "Link ROC-AUC (cosine)<br><code>link_auc_cosine</code>" in metrics
    assert "Micro-F1 with 10% of the labels<br><code>micro_f1_at_10</code>" in metrics
    assert "passed" not in metrics and "per_ratio" not in metrics  # numbers only
    assert "<th>link_auc_cosine</th>" not in html


def test_report_missing_pieces(tmp_path):
    one = write_report(tmp_path / "one.html", versions=_versions(1)[:1], degrees=None, visit_counts=None,
                       vectors=None, labels=None, title="t")
    html = one.read_text(encoding="utf-8")
    assert len(_images(html)) == 2  # history (one point) and timings only
    assert "No degrees given." in html and "No vectors given" in html and "single point" in html
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
    assert "Showing 300 of 1,000 vectors" in out.read_text(encoding="utf-8")


def test_visible_range_does_not_zoom_noise_into_a_cliff():
    from graphkit.report import visible_range

    # the case from the issue: 0.7663 to 0.7668 on a 0-to-1 measure spans at least 0.05, not 0.0005
    lo, hi = visible_range([0.7663, 0.7668, 0.7665], scale="unit")
    assert hi - lo >= 0.05 and lo < 0.7663 and hi > 0.7668
    # a standard error widens it to at least 3 SE either side of the middle
    lo, hi = visible_range([0.80, 0.801], scale="unit", se=0.02)
    assert hi - lo >= 6 * 0.02
    # the gate line is inside; a real drop keeps its full size
    lo, hi = visible_range([0.83, 0.61], scale="unit", marks=[0.7])
    assert lo < 0.61 and hi > 0.83 and hi - lo < 0.3
    # near the ends of 0..1 the window is shifted, not cut
    lo, hi = visible_range([0.999, 0.998], scale="unit")
    assert hi - lo >= 0.05 and hi <= 1.01
    lo, hi = visible_range([0.001], scale="unit")
    assert hi - lo >= 0.05 and lo >= -0.01
    # other measures: at least 20% of the largest magnitude, never below 0 for non-negative ones
    lo, hi = visible_range([310_000, 310_400], scale="count")
    assert hi - lo >= 0.2 * 310_400 and lo >= 0
    assert visible_range([], scale="unit") == (0.0, 1.0)


def test_gates_follow_the_gate_check():
    from graphkit.quality import _GATES, failed_gates
    from graphkit.report import GATES, gate_results

    assert GATES == _GATES  # the report states the same gates the run applies (graphkit/quality.py)

    class Gates:  # the config's [gates] section as failed_gates reads it
        min_link_auc, min_micro_f1, min_macro_f1, max_neighbour_drift, max_align_residual = 0.7, 0.8, None, 0.1, None

    version = {"params": {"gates": {k: getattr(Gates, k) for k in GATES}},
               "metrics": {"link_auc_cosine": 0.65, "micro_f1_at_10": 0.85}}
    rows = {g["key"]: g for g in gate_results(version)}
    assert set(rows) == {"min_link_auc", "min_micro_f1", "max_neighbour_drift"}  # unset gates are not listed
    assert (rows["min_link_auc"]["result"], rows["min_link_auc"]["value"], rows["min_link_auc"]["threshold"]) == \
        ("FAIL", "0.6500", ">= 0.7")
    assert rows["min_micro_f1"]["passed"] and rows["max_neighbour_drift"]["passed"]  # nothing to compare with yet
    failed = {g["metric"] for g in rows.values() if not g["passed"]}
    assert failed == {reason.split(" = ")[0] for reason in failed_gates(version["metrics"], Gates)}
    version["metrics"] = {"micro_f1_at_10": 0.85, "neighbour_drift": 0.2}
    rows = {g["key"]: g for g in gate_results(version)}
    assert rows["min_link_auc"]["value"] == "not measured" and not rows["min_link_auc"]["passed"]
    assert not rows["max_neighbour_drift"]["passed"] and len(failed_gates(version["metrics"], Gates)) == 2


def _failed_last(n=3):
    versions = _versions(n)
    versions[-1].update(status="failed", is_current=False, n_nodes=None, dim=None,
                        message="failed quality gates: link_auc_cosine = 0.6100 is below [gates] min_link_auc = 0.7",
                        params={"gates": {"min_link_auc": 0.7}}, counts={"nodes": 1010, "edges": 5040})
    versions[-1]["metrics"]["link_auc_cosine"] = 0.61
    versions[-2].update(is_current=True, counts={"nodes": 1002, "edges": 5000})
    return versions


def test_report_opens_with_the_verdict(tmp_path):
    html = write_report(tmp_path / "r.html", versions=_failed_last(), title="t").read_text(encoding="utf-8")
    order = [html.index(f'<section id="{s}">') for s in ("status", "gates", "changes", "history", "timings",
                                                          "degrees", "visits", "projection", "versions", "metrics")]
    assert order == sorted(order)
    status = html[order[0]:order[1]]
    assert "Version 3 FAILED: not published" in status and "Version 2 stays current." in status
    assert "below [gates] min_link_auc = 0.7" in status and "1,010 nodes, 5,040 edges" in status
    gates = html[order[1]:order[2]]
    assert "<code>min_link_auc</code>" in gates and "0.6100" in gates and "&gt;= 0.7" in gates and "FAIL" in gates
    changes = html[order[2]:order[3]]
    assert "against version 2" in changes and "+8 (+0.8%)" in changes and "+40 (+0.8%)" in changes
    assert "-0.3100" in changes  # link AUC 0.92 -> 0.61
    assert '<tr class="failed">' in html  # the failed row is marked in the versions table
    ok = write_report(tmp_path / "ok.html", versions=_versions(2), title="t").read_text(encoding="utf-8")
    assert "Version 2 published" in ok and "It is the current version." in ok
    assert "10.2 s in the stages" in ok  # only stage entries: a run's own page, before its fixed costs are known
    assert "No quality gates configured" in ok
    first = write_report(tmp_path / "first.html", versions=_versions(1), title="t").read_text(encoding="utf-8")
    assert "nothing to compare with" in first


def test_history_marks_failed_versions_and_draws_gates(monkeypatch, tmp_path):
    from graphkit import report

    seen = []
    monkeypatch.setattr(report, "_png", lambda fig: seen.append(fig) or "")
    report._history_section(_failed_last(), [report._numeric_metrics(v) for v in _failed_last()])
    auc = next(ax for ax in seen[0].axes if ax.get_title() == "Link ROC-AUC (cosine)")
    lines = {line.get_label(): line for line in auc.get_lines()}
    assert list(lines["published"].get_xdata()) == [1, 2]  # the failed version is not on the line
    assert list(lines["failed (not published)"].get_xdata()) == [3]
    assert list(lines["gate"].get_ydata()) == [0.7, 0.7]
    assert list(auc.get_xticks()) == [1, 2, 3]
    lo, hi = auc.get_ylim()
    assert lo < 0.61 and hi > 0.93
    assert all("_" not in ax.get_title() and "_" not in ax.get_ylabel() for ax in seen[0].axes)


def test_one_version_gets_whole_number_ticks(monkeypatch):
    from graphkit import report

    seen = []
    monkeypatch.setattr(report, "_png", lambda fig: seen.append(fig) or "")
    one = _versions(1)
    report._history_section(one, [report._numeric_metrics(v) for v in one])
    for ax in seen[0].axes:
        if ax.get_visible():
            assert list(ax.get_xticks()) == [1]


def test_timings_chart_draws_every_entry_with_the_legend_off_the_bars(monkeypatch):
    from graphkit import report

    seen = []
    monkeypatch.setattr(report, "_png", lambda fig: seen.append(fig) or "")
    versions = _versions(2)
    versions[-1]["timings"].update(server_start=9.0, startup=1.5, some_new_cost=0.3)
    report._timings_section(versions, [report._numeric_timings(v) for v in versions])
    fig = seen[0]
    fig.draw_without_rendering()  # runs the constrained layout, as saving the PNG does
    (ax,) = fig.axes
    labels = [t.get_text() for t in fig.legends[0].get_texts()]
    assert labels == ["Ingest", "Walks", "Training", "Publish", "Prefect server start (fixed)",
                      "Process start-up (fixed)", "Some new cost (fixed)"]
    legend_box = fig.legends[0].get_window_extent()
    assert not legend_box.overlaps(ax.get_window_extent())  # below the plot, not over the bars


def test_projection_matches_reference_pca():
    from sklearn.decomposition import PCA

    from graphkit.report import _pca_2d

    x = np.random.default_rng(3).normal(size=(300, 8)) * np.arange(1, 9)
    xy, ratio = _pca_2d(x)
    ref = PCA(n_components=2).fit(x)  # reference: scikit-learn's PCA
    np.testing.assert_allclose(ratio, ref.explained_variance_ratio_, rtol=1e-10)
    got = ref.transform(x)
    for k in range(2):  # a component is defined up to its sign
        sign = np.sign(got[:, k] @ xy[:, k])
        np.testing.assert_allclose(xy[:, k] * sign, got[:, k], atol=1e-8)


def test_small_label_classes_are_drawn_on_top(monkeypatch):
    from graphkit import report

    seen = []
    monkeypatch.setattr(report, "_png", lambda fig: seen.append(fig) or "")
    rng = np.random.default_rng(4)
    labels = np.array(["big"] * 980 + ["tiny"] * 20, dtype=object)
    report._projection_section(rng.normal(size=(1000, 4)), labels)
    ax = seen[0].axes[0]
    last = ax.collections[-1]  # drawn last, so on top
    assert last.get_label().startswith("tiny") and last.get_sizes()[0] > ax.collections[0].get_sizes()[0]
    assert [t.get_text() for t in seen[0].legends[0].get_texts()] == ["big (980)", "tiny (20)"]


def test_title_names_the_store_once(tmp_path):
    from graphkit.report import report_title

    assert report_title(tmp_path / "demo_store", 3) == "Embedding report: demo_store, version 3"
    assert report_title("demo_store").count("store") == 1


# In the page Chromium loads: once everything has loaded, the layout figures go into the DOM as JSON.
_PROBE_SCRIPT = """<script>
window.addEventListener("load", function () {
  var root = document.documentElement, out = {innerWidth: window.innerWidth, scrollWidth: root.scrollWidth,
    clientWidth: root.clientWidth, sections: [], decoded: 0, images: document.images.length, wide: [], past: []};
  document.querySelectorAll("section").forEach(function (s) { out.sections.push(s.id); });
  for (var i = 0; i < document.images.length; i++) {
    var im = document.images[i]; if (im.complete && im.naturalWidth > 0) { out.decoded++; } }
  document.querySelectorAll(".wide").forEach(function (w) {
    if (w.scrollWidth > w.clientWidth) { out.wide.push(w.parentNode.id); } });
  document.querySelectorAll("body *").forEach(function (e) {
    var r = e.getBoundingClientRect(); if (r.width > 0 && r.right > root.clientWidth + 1) {
      out.past.push(e.tagName + (e.id ? "#" + e.id : "")); } });
  var pre = document.createElement("pre"); pre.id = "layout-probe";
  pre.textContent = JSON.stringify(out); document.body.appendChild(pre);
});
</script>"""


def _chromium_layout(page: Path, width: int, tmp_path: Path, shot: Path | None = None) -> dict:
    import json

    cmd = ["chromium", "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync", "--hide-scrollbars",
           f"--user-data-dir={tmp_path / 'profile'}", f"--window-size={width},2000", "--dump-dom", page.as_uri()]
    if shot is not None:
        cmd.insert(-2, f"--screenshot={shot}")
    run = subprocess.run(cmd, capture_output=True, text=True, timeout=120,
                         env={"HOME": str(tmp_path), "PATH": "/usr/bin:/bin"})
    found = re.search(r'<pre id="layout-probe">([^<]*)</pre>', run.stdout)
    assert found is not None, run.stderr[-2000:]
    return json.loads(found.group(1).replace("&quot;", '"').replace("&amp;", "&"))


@pytest.fixture(scope="module")
def two_version_store(tmp_path_factory):
    """A store built by two demo refreshes (no Prefect): version 1 published, version 2 failed on a link-AUC
    gate it cannot pass; then ``graphkit report`` on it."""
    import graphkit.cli as cli
    from conftest import FAST_DEMO
    from graphkit.config import load_config
    from graphkit.errors import GateFailure
    from graphkit.pipeline import refresh

    root = tmp_path_factory.mktemp("report-store")
    demo = Path(__file__).resolve().parent.parent / "sample_parquet" / "demo.toml"
    fast = [o for o in FAST_DEMO if o.split("=")[0] not in ("evaluate.link_holdout", "evaluate.labels",
                                                            "gates.min_link_auc", "gates.min_micro_f1")]
    base = [f'store.path="{root / "store"}"', *fast, "evaluate.repeats=1", "gates.min_micro_f1=none",
            "gates.min_link_auc=0.3"]
    assert refresh(load_config(demo, base)) == 1
    with pytest.raises(GateFailure):
        refresh(load_config(demo, [*base, "gates.min_link_auc=0.999", "walks.seed=8"]))
    assert cli.main(["report", str(root / "store"), "--out", str(root / "report.html")]) == 0
    return root


@pytest.mark.slow
@pytest.mark.skipif(shutil.which("chromium") is None,
                    reason="needs headless Chromium (Debian's chromium package: apt-get install -y chromium)")
@pytest.mark.parametrize("width", [1280, 800])
def test_report_fits_the_window_in_chromium(two_version_store, tmp_path, width):
    import matplotlib.image

    page = (two_version_store / "report.html").read_text(encoding="utf-8")
    assert "Version 2 FAILED: not published" in page and "Version 1 stays current." in page
    probe = tmp_path / "probe.html"
    probe.write_text(page.replace("</body>", _PROBE_SCRIPT + "</body>"), encoding="utf-8")
    shot = tmp_path / f"report-{width}.png"
    layout = _chromium_layout(probe, width, tmp_path, shot)
    assert layout["innerWidth"] == width  # the page was laid out at the width under test
    assert layout["sections"] == ["status", "gates", "changes", "history", "timings", "degrees", "visits",
                                  "projection", "versions", "metrics"]
    assert layout["images"] == 5 and layout["decoded"] == 5  # history, timings, degrees, visits, projection
    assert layout["scrollWidth"] <= layout["clientWidth"], layout  # no horizontal overflow
    assert layout["wide"] == [] and layout["past"] == [], layout  # no table scrolls, nothing sticks out
    pixels = matplotlib.image.imread(shot)
    assert pixels.shape[1] == width and pixels.std() > 0.05  # the page drew something


@pytest.mark.slow
@pytest.mark.skipif(shutil.which("chromium") is None,
                    reason="needs headless Chromium (Debian's chromium package: apt-get install -y chromium)")
def test_layout_probe_sees_an_overflow(two_version_store, tmp_path):
    page = (two_version_store / "report.html").read_text(encoding="utf-8")
    wide = page.replace("</body>", '<div style="width:1500px">x</div>' + _PROBE_SCRIPT + "</body>")
    probe = tmp_path / "probe.html"
    probe.write_text(wide, encoding="utf-8")
    layout = _chromium_layout(probe, 800, tmp_path)
    assert layout["scrollWidth"] > layout["clientWidth"] and "DIV" in layout["past"]
