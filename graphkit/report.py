"""A one-page HTML report on an embedding store that answers "is tonight OK?" first.

The page opens with the newest version's outcome (published or failed, which version, when), each configured
quality gate with its measured value and threshold, and what changed since the previous published version (nodes,
edges, drift). The plots follow: the headline metrics across versions with the gate lines drawn and failed versions
marked apart, the run time of every recorded stage and fixed cost, then the graph's shape (degrees, walk visits, a
2-D view of the vectors) and the tables.

The page is self-contained: every plot is a PNG embedded as base64, the styling is inline, and nothing is fetched
from elsewhere, so it can be mailed or archived as a single file. It keeps to the width of the window down to
800 px (tables wrap their cells, images shrink).
"""

from __future__ import annotations

import base64
import io
import math
import numbers
import sys
from pathlib import Path

import numpy as np

from .io import atomic_output

__all__ = ["write_report", "report_title", "visible_range", "metric_label", "gate_results", "MAX_PROJECTED_POINTS",
           "STAGE_TIMINGS", "GATES"]

#: Largest number of vectors drawn in the 2-D projection (a random subset beyond that).
MAX_PROJECTED_POINTS = 20_000
#: Up to this many distinct labels get their own colour and a legend entry.
_MAX_LEGEND = 20
#: Versions shown in the metric and timing plots and the versions table (the newest ones).
_MAX_PLOTTED_VERSIONS = 30

#: Quality gates: config key under ``[gates]`` -> (metric key, "min" or "max"). The same table as the gate check in
#: :mod:`graphkit.quality` (a test keeps the two equal).
GATES = {
    "min_link_auc": ("link_auc_cosine", "min"),
    "min_micro_f1": ("micro_f1_at_10", "min"),
    "min_macro_f1": ("macro_f1_at_10", "min"),
    "max_neighbour_drift": ("neighbour_drift", "max"),
    "max_align_residual": ("align_residual", "max"),
}

#: metric key -> (label, unit, scale). ``scale`` is "unit" for measures on 0 … 1 (the visible range of a plot then
#: spans at least ``_UNIT_SPAN``), "ratio" for other measures and "count" for counts and rates.
_METRICS = {
    "link_auc_cosine": ("Link ROC-AUC (cosine)", "AUC, 0 to 1", "unit"),
    "link_auc_cosine_se": ("Standard error of the link ROC-AUC (cosine)", "AUC", "ratio"),
    "link_ap_cosine": ("Link average precision (cosine)", "0 to 1", "unit"),
    "link_auc_hadamard": ("Link ROC-AUC (Hadamard, logistic)", "AUC, 0 to 1", "unit"),
    "link_auc_hadamard_se": ("Standard error of the link ROC-AUC (Hadamard)", "AUC", "ratio"),
    "link_ap_hadamard": ("Link average precision (Hadamard)", "0 to 1", "unit"),
    "link_pairs": ("Node pairs scored for link prediction", "pairs", "count"),
    "micro_f1_at_10": ("Micro-F1 with 10% of the labels", "F1, 0 to 1", "unit"),
    "macro_f1_at_10": ("Macro-F1 with 10% of the labels", "F1, 0 to 1", "unit"),
    "neighbour_overlap": ("Nearest-neighbour overlap with the previous version", "share of 10 neighbours", "unit"),
    "neighbour_drift": ("Neighbour drift (1 - overlap of 10 neighbours)", "share of 10 neighbours", "unit"),
    "drift_shared_nodes": ("Nodes compared for drift", "nodes", "count"),
    "drift_against": ("Drift measured against version", "version", "count"),
    "align_residual": ("Alignment residual (Procrustes, relative)", "relative to the previous vectors", "unit"),
    "train_tokens_per_second": ("Training speed", "tokens/s", "count"),
    "evaluate_seconds": ("Evaluation time", "s", "seconds"),
}
#: The metrics drawn as panels when recorded (every numeric metric is in the table).
_PANEL_METRICS = ("link_auc_cosine", "micro_f1_at_10", "macro_f1_at_10", "neighbour_drift", "align_residual",
                  "train_tokens_per_second")
#: metric -> the metric holding its standard error (widens the visible range, see :func:`visible_range`).
_STANDARD_ERRORS = {"link_auc_cosine": "link_auc_cosine_se", "link_auc_hadamard": "link_auc_hadamard_se"}
#: Least visible span of a 0 … 1 measure: 0.05, so that the third decimal place of run-to-run noise stays small.
_UNIT_SPAN = 0.05
#: Least visible span of any other measure, relative to its largest magnitude.
_RELATIVE_SPAN = 0.2
#: Standard errors on each side of the middle that the visible range covers at least.
_SE_MULTIPLE = 3.0

#: Timing entries that are stages of the pipeline; every other entry is a fixed cost of the run (start-up, the
#: Prefect server, planning, the lock, the report, orchestration, the after-publish estimate).
STAGE_TIMINGS = ("ingest", "graph", "holdout", "eval_walks", "eval_train", "walks", "train", "evaluate", "publish")
_TIMING_LABELS = {
    "ingest": "Ingest", "graph": "Graph", "holdout": "Link holdout", "eval_walks": "Walks of the check model",
    "eval_train": "Training of the check model", "walks": "Walks", "train": "Training", "evaluate": "Evaluation",
    "publish": "Publish", "preflight": "Input checks", "server_start": "Prefect server start",
    "startup": "Process start-up", "plan": "Planning", "lock_wait": "Wait for the store lock", "align": "Alignment",
    "report": "Report", "orchestration": "Orchestration", "after_publish_estimate": "After the publish (estimate)",
}

_OK, _BAD, _LINE, _GATE = "#1f6e43", "#b3261e", "#2b5f8a", "#9a5b00"

_TEMPLATE = """<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{{ title }}</title>
<style>
* { box-sizing: border-box; }
body { font-family: sans-serif; margin: 0 auto; padding: 1.2em 1.5em 3em; max-width: 1100px; color: #222;
       line-height: 1.4; overflow-wrap: anywhere; }
h1 { font-size: 1.5em; margin: 0.2em 0 0.6em; } h2 { font-size: 1.15em; margin-top: 1.8em;
     border-bottom: 1px solid #ccc; padding-bottom: 0.15em; }
img { max-width: 100%; height: auto; display: block; }
p.note { color: #555; font-size: 0.9em; }
.verdict { border-left: 6px solid #888; padding: 0.5em 1em; background: #f6f6f6; }
.verdict.ok { border-color: #1f6e43; } .verdict.failed { border-color: #b3261e; }
.verdict .big { font-size: 1.25em; font-weight: bold; margin: 0.1em 0; }
.pass { color: #1f6e43; font-weight: bold; } .fail { color: #b3261e; font-weight: bold; }
.wide { max-width: 100%; overflow-x: auto; }
table { border-collapse: collapse; font-size: 0.85em; margin-top: 0.5em; max-width: 100%; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.5em; text-align: right; vertical-align: top; }
th { background: #f0f0f0; } td.text, th.text { text-align: left; }
tr.failed td { color: #8a1c16; background: #fcf1f0; }
code { font-size: 0.85em; color: #666; }
</style>
</head>
<body>
<h1>{{ title }}</h1>
<section id="status">
<h2>Tonight</h2>
<div class="verdict {{ status.css }}">
<p class="big">{{ status.headline }}</p>
{% for line in status.lines %}<p>{{ line }}</p>{% endfor %}
</div>
</section>
<section id="gates">
<h2>Quality gates</h2>
{% if gates %}
<div class="wide"><table>
<tr><th class="text">gate</th><th class="text">metric</th><th>measured</th><th>threshold</th><th class="text">result</th></tr>
{% for g in gates %}<tr><td class="text"><code>{{ g.key }}</code></td><td class="text">{{ g.label }}</td>
<td>{{ g.value }}</td><td>{{ g.threshold }}</td><td class="text"><span class="{{ g.css }}">{{ g.result }}</span>
{{ g.why }}</td></tr>
{% endfor %}</table></div>
{% else %}<p class="note">No quality gates configured for this version ([gates] in the config).</p>{% endif %}
</section>
<section id="changes">
<h2>Changes since the previous version</h2>
{% if changes %}
<p class="note">{{ changes_note }}</p>
<div class="wide"><table>
<tr><th class="text">what</th><th>before</th><th>now</th><th>change</th></tr>
{% for c in changes %}<tr><td class="text">{{ c.label }}</td><td>{{ c.before }}</td><td>{{ c.now }}</td>
<td>{{ c.change }}</td></tr>
{% endfor %}</table></div>
{% else %}<p class="note">{{ changes_note }}</p>{% endif %}
</section>
{% for section in sections %}
<section id="{{ section.id }}">
<h2>{{ section.heading }}</h2>
{% if section.image %}<img src="data:image/png;base64,{{ section.image }}" alt="{{ section.heading }}">{% endif %}
{% for line in section.notes %}<p class="note">{{ line }}</p>{% endfor %}
</section>
{% endfor %}
<section id="versions">
<h2>Versions</h2>
{% if versions %}
<div class="wide"><table>
<tr>{% for h in version_heads %}<th{% if loop.index <= 3 %} class="text"{% endif %}>{{ h }}</th>{% endfor %}</tr>
{% for v in versions %}<tr{% if v.failed %} class="failed"{% endif %}>
{%- for cell in v.cells %}<td{% if loop.index <= 3 %} class="text"{% endif %}>{{ cell }}</td>{% endfor %}</tr>
{% endfor %}</table></div>
{% if versions_note %}<p class="note">{{ versions_note }}</p>{% endif %}
{% else %}<p class="note">No versions.</p>{% endif %}
</section>
<section id="metrics">
<h2>All metrics of version {{ metrics_version }}</h2>
{% if metric_rows %}
<div class="wide"><table>
<tr><th class="text">metric</th><th>version {{ metrics_version }}</th><th>{{ metrics_before_head }}</th></tr>
{% for m in metric_rows %}<tr><td class="text">{{ m.label }}<br><code>{{ m.key }}</code></td><td>{{ m.now }}</td>
<td>{{ m.before }}</td></tr>
{% endfor %}</table></div>
{% else %}<p class="note">No numeric metrics recorded.</p>{% endif %}
</section>
</body>
</html>
"""


# ---------------------------------------------------------------------------------------------------- helpers
def _is_number(value) -> bool:
    return (isinstance(value, numbers.Real) and not isinstance(value, (bool, np.bool_))
            and math.isfinite(float(value)))


def _numeric_metrics(version: dict) -> dict:
    metrics = version.get("metrics") or {}
    if not isinstance(metrics, dict):
        return {}
    return {str(k): float(v) for k, v in metrics.items() if _is_number(v)}


def _numeric_timings(version: dict) -> dict:
    timings = version.get("timings") or {}
    if not isinstance(timings, dict):
        return {}
    return {str(k): float(v) for k, v in timings.items() if _is_number(v) and v >= 0}


def _first_seen(dicts) -> list[str]:
    names: dict[str, None] = {}
    for d in dicts:
        for key in d:
            names.setdefault(key, None)
    return list(names)


def _format(value: float) -> str:
    return f"{value:.6g}"


def _value(key: str, value) -> str:
    """A metric value as read on the page: counts with thousands separators, measures to 4 decimals."""
    if value is None:
        return ""
    value = float(value)
    _, unit, scale = _METRICS.get(key, (None, "", "ratio"))
    if scale == "seconds":
        return f"{value:,.1f} s"
    if scale == "count" or (value == int(value) and abs(value) >= 1000):
        return f"{value:,.0f}" + (" tokens/s" if unit == "tokens/s" else "")
    return f"{value:.4f}" if abs(value) < 1000 else f"{value:,.1f}"


def metric_label(key: str) -> str:
    """The human label of a metric key (``link_auc_cosine`` -> ``Link ROC-AUC (cosine)``); an unknown key is
    spelt out in words."""
    if key in _METRICS:
        return _METRICS[key][0]
    words = str(key).replace("_", " ").strip()
    return words[:1].upper() + words[1:]


def _timing_label(key: str) -> str:
    return _TIMING_LABELS.get(key) or metric_label(key)


def _count(version: dict, key: str):
    counts = version.get("counts") or {}
    value = counts.get(key) if isinstance(counts, dict) else None
    if value is None and key == "nodes":
        value = version.get("n_nodes")
    return value if _is_number(value) else None


def _when(version: dict) -> str:
    created = version.get("created_at")
    return "" if created is None else str(created)[:16] + " UTC"


def _is_failed(version: dict) -> bool:
    return version.get("status") not in ("complete", None)


def report_title(store, version: int | None = None) -> str:
    """The page title for a store: ``Embedding report: demo_store, version 3``."""
    name = Path(str(store)).resolve().name or str(store)
    return f"Embedding report: {name}" + ("" if version is None else f", version {version}")


def visible_range(values, *, scale: str = "ratio", se: float | None = None, marks=()) -> tuple[float, float]:
    """The y range of a metric panel: the values and marks (gate lines), widened to a least span so that
    run-to-run noise is not zoomed into cliffs.

    The least span is the largest of: ``_UNIT_SPAN`` (0.05) for a measure on 0 … 1 (``scale="unit"``);
    ``_RELATIVE_SPAN`` (20%) of the largest magnitude for any other measure; ``2 * _SE_MULTIPLE`` standard errors
    (±3 SE) when the metric has one. A span below it is widened about its middle; a 0 … 1 measure is then
    shifted back inside [0, 1], and no range of a non-negative measure goes below 0. An 8% margin is added.

    Returns
    -------
    (low, high) : tuple of float
    """
    points = [float(v) for v in list(values) + list(marks) if _is_number(v)]
    if not points:
        return 0.0, 1.0
    lo, hi = min(points), max(points)
    floor = _UNIT_SPAN if scale == "unit" else _RELATIVE_SPAN * max(abs(lo), abs(hi))
    if se is not None and _is_number(se):
        floor = max(floor, 2 * _SE_MULTIPLE * float(se))
    if floor <= 0:
        floor = 1.0
    if hi - lo < floor:
        mid = (lo + hi) / 2
        lo, hi = mid - floor / 2, mid + floor / 2
    margin = 0.08 * (hi - lo)
    lo, hi = lo - margin, hi + margin
    if scale == "unit":
        if hi > 1 and lo > 0:
            lo, hi = max(0.0, lo - (hi - 1)), 1.0 + margin
        if lo < 0:
            lo, hi = -margin, hi - lo - margin
    elif min(points) >= 0 and lo < 0:
        lo = 0.0
    return lo, hi


def gate_results(version: dict) -> list[dict]:
    """Each gate configured for ``version`` (its ``params["gates"]``) with the measured value, the threshold and
    whether it passed, by the rule of :func:`graphkit.quality.failed_gates` (an unmeasured drift or alignment
    gate passes: a first version has nothing to compare with)."""
    params = version.get("params") or {}
    gates = params.get("gates") if isinstance(params, dict) else None
    metrics = version.get("metrics") or {}
    out = []
    for key, (metric, direction) in GATES.items():
        bound = (gates or {}).get(key)
        if not _is_number(bound):
            continue
        value = metrics.get(metric)
        sign = ">=" if direction == "min" else "<="
        row = {"key": key, "metric": metric, "label": metric_label(metric), "threshold": f"{sign} {float(bound):g}",
               "value": _value(metric, value) if _is_number(value) else "not measured", "why": ""}
        if not _is_number(value):
            passed = metric in ("neighbour_drift", "align_residual")
            row["why"] = "(nothing to compare with)" if passed else "(a gate on an unmeasured metric fails)"
        else:
            passed = float(value) >= bound if direction == "min" else float(value) <= bound
        row.update(passed=passed, result="pass" if passed else "FAIL", css="pass" if passed else "fail")
        out.append(row)
    return out


def _png(fig) -> str:
    """The figure as base64 PNG text (no metadata chunk, so the page holds no tool banner or address)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, metadata={"Software": None})
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _new_figure(width, height):
    from matplotlib.figure import Figure

    # A bare Figure is not registered with pyplot: nothing leaks between reports or into a caller's session.
    return Figure(figsize=(width, height), layout="constrained")


def _short_number(x, _pos=None) -> str:
    """Axis tick text: 310000 -> 310k."""
    for factor, suffix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if abs(x) >= factor:
            return f"{x / factor:.4g}{suffix}"
    return f"{x:.4g}"


def _version_axis(ax, numbers_) -> None:
    """Whole-number version ticks, also for a single version."""
    from matplotlib.ticker import MaxNLocator

    lo, hi = min(numbers_), max(numbers_)
    ax.set_xlim(lo - 0.5, hi + 0.5)
    if len(numbers_) <= 12:
        ax.set_xticks(sorted(numbers_))
    else:
        ax.xaxis.set_major_locator(MaxNLocator(integer=True, nbins=10))


# ---------------------------------------------------------------------------------------------------- the verdict
def _status(versions) -> dict:
    if not versions:
        return {"css": "", "headline": "No version yet", "lines": ["The store has no version: no run has finished."]}
    newest = versions[-1]
    number = newest.get("version", "?")
    current = [v for v in versions if v.get("is_current")]
    lines = []
    if _is_failed(newest):
        headline = f"Version {number} FAILED: not published"
        css = "failed"
        if newest.get("message"):
            lines.append(str(newest["message"]))
        failed = [g for g in gate_results(newest) if not g["passed"]]
        if failed and not newest.get("message"):
            lines.append("Failed gates: " + "; ".join(f"{g['label']} {g['value']} (needs {g['threshold']})"
                                                      for g in failed))
        lines.append(f"Version {current[-1].get('version')} stays current." if current
                     else "The store has no current version.")
    else:
        headline = f"Version {number} published"
        css = "ok"
        if current and current[-1] is not newest:
            lines.append(f"Version {current[-1].get('version')} is current (promoted after this one).")
        elif current:
            lines.append("It is the current version.")
    when = _when(newest)
    facts = [f"Run finished {when}" if when else ""]
    nodes, edges = _count(newest, "nodes"), _count(newest, "edges")
    if nodes is not None:
        facts.append(f"{nodes:,.0f} nodes")
    if edges is not None:
        facts.append(f"{edges:,.0f} edges")
    if newest.get("dim"):
        facts.append(f"{newest['dim']} dimensions")
    timings = _numeric_timings(newest)
    total = sum(timings.values())
    if total and any(k not in STAGE_TIMINGS for k in timings):
        facts.append(f"{total:.1f} s of run time recorded")
    elif total:  # the run's own page, drawn before its fixed costs are known (they are in the catalog)
        facts.append(f"{total:.1f} s in the stages")
    lines.insert(0, ", ".join(f for f in facts if f) + ".")
    return {"css": css, "headline": headline, "lines": lines}


def _changes(versions) -> tuple[list[dict], str]:
    if not versions:
        return [], "No version yet."
    newest = versions[-1]
    before = [v for v in versions[:-1] if not _is_failed(v)]
    metrics = _numeric_metrics(newest)
    rows = []
    if before:
        prev = before[-1]
        note = f"Version {newest.get('version')} against version {prev.get('version')}, the last published " \
               "version before it."
        for key, label in (("nodes", "Nodes"), ("edges", "Edges")):
            a, b = _count(prev, key), _count(newest, key)
            if a is None and b is None:
                continue
            change = ""
            if a is not None and b is not None:
                change = f"{b - a:+,.0f}" + (f" ({(b - a) / a:+.1%})" if a else "")
            rows.append({"label": label, "before": "" if a is None else f"{a:,.0f}",
                         "now": "" if b is None else f"{b:,.0f}", "change": change})
        old = _numeric_metrics(prev)
        for key in ("link_auc_cosine", "micro_f1_at_10"):
            if key in metrics or key in old:
                a, b = old.get(key), metrics.get(key)
                rows.append({"label": metric_label(key), "before": _value(key, a), "now": _value(key, b),
                             "change": f"{b - a:+.4f}" if a is not None and b is not None else ""})
    else:
        note = "The first published version: nothing to compare with."
    for key in ("neighbour_drift", "align_residual"):
        if key in metrics:
            against = metrics.get("drift_against")
            what = f" (against version {against:.0f})" if against is not None and key == "neighbour_drift" else ""
            rows.append({"label": metric_label(key) + what, "before": "", "now": _value(key, metrics[key]),
                         "change": ""})
    return rows, note


# ---------------------------------------------------------------------------------------------------- plots
def _distribution_section(values, heading, what, per, absent, section_id) -> dict:
    section = {"id": section_id, "heading": heading, "image": None, "notes": []}
    if values is None:
        section["notes"].append(absent)
        return section
    values = np.asarray(values).ravel()
    if values.size == 0 or values.dtype.kind not in "iuf":
        section["notes"].append(f"No usable values for the {what} plot (empty or not numeric).")
        return section
    values = values[np.isfinite(values)] if values.dtype.kind == "f" else values
    positive = values[values > 0]
    n_zero = int(values.size - positive.size)
    if positive.size == 0:
        section["notes"].append(f"All {values.size} {per} are zero: nothing to draw on log axes.")
        return section
    level, count = np.unique(positive, return_counts=True)
    fig = _new_figure(10.0, 3.8)
    ax = fig.add_subplot()
    ax.scatter(level, count, s=10, alpha=0.7, color=_LINE, edgecolors="none")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.minorticks_off()  # unlabelled anyway; laying out their ticks took most of the report's time
    ax.set_xlabel(f"{what} (log scale)")
    ax.set_ylabel(f"number of {per} (log scale)")
    ax.grid(True, which="major", alpha=0.3)
    section["image"] = _png(fig)
    section["notes"].append(f"{values.size:,} {per}; median {_format(float(np.median(values)))}, "
                            f"max {_format(float(positive.max()))}; {n_zero:,} at zero (not shown on log axes).")
    return section


def _label_codes(labels):
    """Integer code per row (-1 for a missing label) and the label names."""
    raw = np.asarray(labels, dtype=object)
    missing = np.array([v is None or (isinstance(v, float) and math.isnan(v)) for v in raw], dtype=bool)
    names, code = np.unique(raw[~missing].astype(str), return_inverse=True)
    codes = np.full(raw.size, -1, dtype=np.int64)
    codes[~missing] = code
    return codes, names


def projected_rows(n_rows: int, seed: int = 0) -> np.ndarray:
    """The rows (int64, ascending) the projection draws from ``n_rows`` vectors: all, or a seeded random subset of
    ``MAX_PROJECTED_POINTS``; callers that read a version can fetch only these rows."""
    rows = np.arange(n_rows)
    if rows.size > MAX_PROJECTED_POINTS:
        rows = np.sort(np.random.default_rng(seed).choice(rows.size, size=MAX_PROJECTED_POINTS, replace=False))
    return rows


def _pca_2d(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The rows projected on their first two principal components, and the share of variance of each: the top
    eigenvectors of the dim x dim scatter matrix of the centred rows (cheaper than an SVD of the rows: O(n dim^2)
    for the product, a dim-sized eigenproblem after; the same as scikit-learn's PCA up to the sign of a
    component, checked in the tests)."""
    centred = x - x.mean(axis=0)
    scatter = centred.T @ centred
    var, vec = np.linalg.eigh(scatter)  # ascending
    top = vec[:, ::-1][:, :2]
    total = float(np.trace(scatter))
    ratio = np.clip(var[::-1][:2], 0, None) / total if total > 0 else np.zeros(2)
    return centred @ top, ratio


def _projection_section(vectors, labels, seed=0, vectors_total=None) -> dict:
    section = {"id": "projection", "heading": "Vectors in two dimensions (principal components)", "image": None,
               "notes": []}
    if vectors is None:
        section["notes"].append("No vectors given (a failed version's vectors are not published).")
        return section
    x = np.asarray(vectors)
    if x.ndim != 2 or x.shape[0] < 3 or x.shape[1] < 2:
        section["notes"].append(f"A projection needs at least 3 vectors of dimension 2 or more, got shape {x.shape}.")
        return section
    if labels is not None and len(labels) != x.shape[0]:
        raise ValueError(f"labels must have one entry per vector row ({x.shape[0]}), got {len(labels)}")
    rows = projected_rows(x.shape[0], seed)
    sub = np.asarray(x[rows], dtype=np.float64)
    keep = np.all(np.isfinite(sub), axis=1)
    rows, sub = rows[keep], sub[keep]
    if rows.size < 3:
        section["notes"].append("Fewer than 3 vectors with finite values: nothing to project.")
        return section
    xy, ratio = _pca_2d(sub)
    fig = _new_figure(10.0, 6.5)
    ax = fig.add_subplot()
    if labels is None:
        ax.scatter(xy[:, 0], xy[:, 1], s=4, alpha=0.5, color=_LINE, edgecolors="none")
    else:
        codes, names = _label_codes(np.asarray(labels, dtype=object)[rows])
        none = codes < 0
        if none.any():
            ax.scatter(xy[none, 0], xy[none, 1], s=4, alpha=0.3, color="#bbbbbb", edgecolors="none",
                       label=f"no label ({int(none.sum()):,})")
        sizes = np.bincount(codes[~none], minlength=len(names))
        # the largest classes first, so that small ones are drawn on top, with larger markers, and stay visible
        order = np.argsort(-sizes, kind="stable")
        cmap = _colour_map(len(names))
        small = max(1, int(0.02 * rows.size))
        for rank, i in enumerate(order):
            m = codes == i
            colour = cmap(rank) if len(names) <= _MAX_LEGEND else cmap(i)
            ax.scatter(xy[m, 0], xy[m, 1], s=16 if sizes[i] <= small else 5, alpha=0.75, color=colour,
                       edgecolors="none", label=f"{names[i]} ({sizes[i]:,})" if len(names) <= _MAX_LEGEND else None)
        if len(names) <= _MAX_LEGEND:
            handles, texts = ax.get_legend_handles_labels()
            pairs = sorted(zip(texts, handles), key=lambda p: (p[0].startswith("no label"), p[0]))
            fig.legend([h for _, h in pairs], [t for t, _ in pairs], loc="outside right upper", markerscale=2,
                       fontsize="small", frameon=False)
        section["notes"].append(f"Coloured by label ({len(names)} distinct, nodes per label in brackets; a node with "
                                "several labels takes the one of the smallest class; classes of at most 2% of the points drawn larger and on top"
                                + ("; no legend beyond 20 labels" if len(names) > _MAX_LEGEND else "") + ").")
    ax.set_xlabel(f"component 1 ({ratio[0]:.1%} of the variance)")
    ax.set_ylabel(f"component 2 ({ratio[1]:.1%} of the variance)")
    ax.grid(True, alpha=0.25)
    section["image"] = _png(fig)
    total = max(int(vectors_total or 0), x.shape[0])
    shown = f"{rows.size:,} of {total:,} vectors" if rows.size < total else f"all {total:,} vectors"
    section["notes"].insert(0, f"Showing {shown} of the newest published version.")
    return section


def _colour_map(n):
    from matplotlib import colormaps

    return colormaps["tab10" if n <= 10 else "tab20" if n <= 20 else "viridis"].resampled(max(n, 1))


def _history_section(versions, metrics) -> dict:
    section = {"id": "history", "heading": "Headline metrics across versions", "image": None, "notes": []}
    recorded = set(_first_seen(metrics))
    newest_gates = {g["metric"]: g for g in gate_results(versions[-1])} if versions else {}
    names = [k for k in _PANEL_METRICS if k in recorded]
    names += [g for g in newest_gates if g in recorded and g not in names]
    if not names:
        section["notes"].append("No headline metrics recorded yet.")
        return section
    ncols = min(3, len(names))
    nrows = math.ceil(len(names) / ncols)
    fig = _new_figure(3.7 * ncols, 2.9 * nrows + 0.4)
    axes = fig.subplots(nrows, ncols, squeeze=False)
    numbers_ = [int(v.get("version", i + 1)) for i, v in enumerate(versions)]
    failed = [_is_failed(v) for v in versions]
    for ax, name in zip(axes.ravel(), names):
        label, unit, scale = _METRICS.get(name, (metric_label(name), "", "ratio"))
        good = [(n, m[name]) for n, m, f in zip(numbers_, metrics, failed) if name in m and not f]
        bad = [(n, m[name]) for n, m, f in zip(numbers_, metrics, failed) if name in m and f]
        if good:
            ax.plot(*zip(*good), marker="o", markersize=5, color=_LINE, linewidth=1.5, label="published")
        if bad:
            ax.plot(*zip(*bad), linestyle="none", marker="X", markersize=8, color=_BAD,
                    label="failed (not published)")
        marks = []
        gate = newest_gates.get(name)
        if gate is not None:
            bound = float(gate["threshold"].split()[1])
            marks.append(bound)
            ax.axhline(bound, color=_GATE, linestyle="--", linewidth=1.2, label="gate")
        ses = [m[_STANDARD_ERRORS[name]] for m in metrics if _STANDARD_ERRORS.get(name) in m]
        lo, hi = visible_range([y for _, y in good + bad], scale=scale, se=max(ses) if ses else None, marks=marks)
        ax.set_ylim(lo, hi)
        if scale in ("count", "seconds"):
            ax.yaxis.set_major_formatter(_short_number)
        if gate is not None:
            ax.text(0.02, (marks[0] - lo) / (hi - lo), f" gate {gate['threshold']}", transform=ax.transAxes,
                    color=_GATE, fontsize="x-small", va="bottom")
        ax.set_title(label, fontsize="small")
        ax.set_ylabel(unit, fontsize="small")
        ax.set_xlabel("version", fontsize="small")
        ax.tick_params(labelsize="small")
        _version_axis(ax, numbers_)
        ax.grid(True, alpha=0.3)
    for ax in axes.ravel()[len(names):]:
        ax.set_visible(False)
    handles = {}
    for ax in axes.ravel()[:len(names)]:
        for h, lab in zip(*ax.get_legend_handles_labels()):
            handles.setdefault(lab, h)
    fig.legend(handles.values(), handles.keys(), loc="outside upper center", ncols=len(handles), fontsize="small",
               frameon=False)
    section["image"] = _png(fig)
    section["notes"].append(
        "Blue points joined by a line: published versions; red crosses: failed versions, not joined; dashed: the "
        "newest version's gate. The vertical range spans at least 0.05 on a 0-to-1 measure, at least 20% of the "
        "largest value on other measures, and at least three standard errors either side where the metric has "
        "one (link ROC-AUC), so that run-to-run noise does not look like a cliff. Every metric is in the table "
        "at the end.")
    if len(versions) == 1:
        section["notes"].append("Only one version so far: each panel holds a single point.")
    return section


def _timings_section(versions, timings) -> dict:
    section = {"id": "timings", "heading": "Run time by stage and fixed cost", "image": None, "notes": []}
    names = _first_seen(timings)
    if not names:
        section["notes"].append("No stage timings recorded.")
        return section
    # the stages in pipeline order, then the fixed costs, so that the bars read bottom-up like the run
    names = [n for n in STAGE_TIMINGS if n in names] + [n for n in names if n not in STAGE_TIMINGS]
    n_legend_rows = math.ceil(len(names) / 3)
    fig = _new_figure(max(10.0, min(0.35 * len(versions) + 5, 14.0)), 3.8 + 0.22 * n_legend_rows)
    ax = fig.add_subplot()
    xs = np.arange(len(versions))
    bottom = np.zeros(len(versions))
    cmap = _colour_map(min(len(names), 20)) if len(names) <= 20 else _colour_map(len(names))
    for i, name in enumerate(names):
        h = np.array([t.get(name, 0.0) for t in timings])
        fixed = name not in STAGE_TIMINGS
        ax.bar(xs, h, bottom=bottom, color=cmap(i), label=_timing_label(name) + (" (fixed)" if fixed else ""),
               width=0.7, hatch="//" if fixed else None, edgecolor="white", linewidth=0.3)
        bottom += h
    ticks = [f"{v.get('version', '?')}" + ("\nfailed" if _is_failed(v) else "") for v in versions]
    ax.set_xticks(xs, ticks, fontsize="small", rotation=90 if len(versions) > 20 else 0)
    for tick, v in zip(ax.get_xticklabels(), versions):
        if _is_failed(v):
            tick.set_color(_BAD)
    ax.set_xlim(-0.6, len(versions) - 0.4)
    ax.set_xlabel("version")
    ax.set_ylabel("seconds")
    ax.grid(True, axis="y", alpha=0.3)
    fig.legend(loc="outside lower center", ncols=3, fontsize="small", frameon=False)
    section["image"] = _png(fig)
    last = timings[-1]
    total = sum(last.values())
    stages = sum(v for k, v in last.items() if k in STAGE_TIMINGS)
    note = (f"Version {versions[-1].get('version', '?')}: {total:.1f} s recorded, {stages:.1f} s in the "
            f"stages and {total - stages:.1f} s of fixed costs (hatched)")
    if "after_publish_estimate" in last:
        note += f", of which {last['after_publish_estimate']:.1f} s after the publish, estimated from the " \
                "store's previous run"
    section["notes"].append(note + ". A bar covers the whole command, from the process start to its exit; every "
                            f"recorded entry is drawn ({len(names)} here).")
    return section


# ---------------------------------------------------------------------------------------------------- tables
_VERSION_HEADS = ("version", "status", "finished (UTC)", "nodes", "edges", "link AUC", "Micro-F1", "drift",
                  "run time s")


def _version_rows(versions, metrics, timings) -> list[dict]:
    rows = []
    for v, m, t in zip(reversed(versions), reversed(metrics), reversed(timings)):  # newest first
        status = str(v.get("status", ""))
        if v.get("is_current"):
            status += ", current"
        if v.get("pinned"):
            status += ", pinned"
        nodes, edges = _count(v, "nodes"), _count(v, "edges")
        cells = [v.get("version", ""), status, str(v.get("created_at") or "")[:16],
                 "" if nodes is None else f"{nodes:,.0f}", "" if edges is None else f"{edges:,.0f}",
                 _value("link_auc_cosine", m.get("link_auc_cosine")),
                 _value("micro_f1_at_10", m.get("micro_f1_at_10")),
                 _value("neighbour_drift", m.get("neighbour_drift")),
                 f"{sum(t.values()):.1f}" if t else ""]
        rows.append({"cells": cells, "failed": _is_failed(v)})
    return rows


def _metric_rows(versions, metrics) -> tuple[list[dict], str]:
    if not versions:
        return [], ""
    now = metrics[-1]
    before_rows = [m for v, m in zip(versions[:-1], metrics[:-1]) if not _is_failed(v)]
    before = before_rows[-1] if before_rows else {}
    prev = [v for v in versions[:-1] if not _is_failed(v)]
    head = f"version {prev[-1].get('version')} (previous published)" if prev else "previous published"
    keys = [k for k in now] + [k for k in before if k not in now]
    return [{"key": k, "label": metric_label(k), "now": _value(k, now.get(k)), "before": _value(k, before.get(k))}
            for k in keys], head


# ---------------------------------------------------------------------------------------------------- entry point
def write_report(out_html, *, versions, degrees=None, visit_counts=None, vectors=None, labels=None,
                 title="Embedding report", vectors_total=None) -> Path:
    """Write the store report as one self-contained HTML page.

    Parameters
    ----------
    out_html : path
        The page to write (its folder is created; an existing file is replaced in one rename).
    versions : list of dict
        Catalog rows, oldest first (as from :func:`graphkit.store.list_versions`); the last one is the version the
        page opens with. Read keys: ``version``, ``status``, ``created_at``, ``is_current``, ``pinned``,
        ``n_nodes``, ``dim``, ``message``, ``params`` (its ``gates``), ``counts`` (``nodes``, ``edges``),
        ``metrics`` (dict; its finite numbers are drawn and listed, anything else is ignored) and ``timings``
        (dict of stage or fixed cost to seconds). Missing keys are left blank.
    degrees : ndarray of int, shape (n_nodes,), optional
        Degree of every node, drawn as a log-log distribution.
    visit_counts : ndarray of int, shape (n_nodes,), optional
        Walk visits of every node, drawn the same way.
    vectors : ndarray of float, shape (n_nodes, dim), optional
        Drawn as a projection on the first two principal components (a random subset of ``MAX_PROJECTED_POINTS``
        rows when larger).
    labels : ndarray, shape (n_nodes,), optional
        One label per row of ``vectors`` (``None`` for none) to colour the projection.
    title : str
        Page title and heading (see :func:`report_title`).
    vectors_total : int, optional
        When ``vectors`` holds only the rows :func:`projected_rows` picks from a larger version, that version's
        row count (for the note under the projection).

    Returns
    -------
    pathlib.Path
        ``out_html``.

    Raises
    ------
    ValueError
        ``labels`` does not have one entry per vector row.
    """
    import jinja2
    import matplotlib

    if "matplotlib.pyplot" not in sys.modules:
        # Figures here never touch pyplot; the backend is set only so that a later pyplot import on a headless
        # machine does not look for a display. A caller who already uses pyplot keeps the backend it chose.
        matplotlib.use("Agg")
    versions = [dict(v) for v in versions]
    metrics = [_numeric_metrics(v) for v in versions]
    timings = [_numeric_timings(v) for v in versions]
    plotted = slice(-_MAX_PLOTTED_VERSIONS, None)
    sections = [
        _history_section(versions[plotted], metrics[plotted]),
        _timings_section(versions[plotted], timings[plotted]),
        _distribution_section(degrees, "Degree distribution", "degree", "nodes", "No degrees given.", "degrees"),
        _distribution_section(visit_counts, "Walk visits per node", "visits", "nodes", "No visit counts given.",
                              "visits"),
        _projection_section(vectors, labels, vectors_total=vectors_total),
    ]
    if len(versions) > _MAX_PLOTTED_VERSIONS:
        for s in sections[:2]:
            s["notes"].append(f"The newest {_MAX_PLOTTED_VERSIONS} of {len(versions)} versions are drawn.")
    changes, changes_note = _changes(versions)
    metric_rows, before_head = _metric_rows(versions, metrics)
    env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined)
    page = env.from_string(_TEMPLATE).render(
        title=str(title), status=_status(versions), gates=gate_results(versions[-1]) if versions else [],
        changes=changes, changes_note=changes_note, sections=sections, version_heads=_VERSION_HEADS,
        versions=_version_rows(versions, metrics, timings),
        versions_note="Run time: the whole command, every recorded stage and fixed cost." if versions else "",
        metrics_version=versions[-1].get("version", "") if versions else "", metric_rows=metric_rows,
        metrics_before_head=before_head)
    out = Path(out_html)
    out.parent.mkdir(parents=True, exist_ok=True)
    with atomic_output(out) as tmp:
        tmp.write_text(page, encoding="utf-8")
    return out
