"""A one-page HTML report on an embedding store: graph shape, walk coverage, a 2-D view of the vectors, metric history
and stage timings.

The page is self-contained: every plot is a PNG embedded as base64, the styling is inline, and nothing is fetched
from elsewhere, so it can be mailed or archived as a single file.
"""

from __future__ import annotations

import base64
import io
import math
import numbers
import os
import sys
from pathlib import Path

import numpy as np

__all__ = ["write_report", "MAX_PROJECTED_POINTS", "STAGE_TIMINGS"]

#: Largest number of vectors drawn in the 2-D projection (a random subset beyond that).
MAX_PROJECTED_POINTS = 20_000
#: Largest number of metrics drawn in the history plot (the table lists them all).
_MAX_HISTORY_PANELS = 24
#: Up to this many distinct labels get their own colour and a legend entry.
_MAX_LEGEND = 20

_TEMPLATE = """<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<title>{{ title }}</title>
<style>
body { font-family: sans-serif; margin: 2em auto; max-width: 1100px; color: #222; }
h1 { font-size: 1.6em; } h2 { font-size: 1.2em; margin-top: 2em; border-bottom: 1px solid #ccc; }
img { max-width: 100%; height: auto; display: block; }
p.note { color: #666; font-size: 0.9em; }
table { border-collapse: collapse; font-size: 0.85em; margin-top: 0.5em; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.6em; text-align: right; }
th { background: #f2f2f2; } td.text { text-align: left; }
</style>
</head>
<body>
<h1>{{ title }}</h1>
<p class="note">{{ summary }}</p>
{% for section in sections %}
<h2>{{ section.heading }}</h2>
{% if section.image %}<img src="data:image/png;base64,{{ section.image }}" alt="{{ section.heading }}">{% endif %}
{% for line in section.notes %}<p class="note">{{ line }}</p>{% endfor %}
{% endfor %}
<h2>Versions</h2>
{% if versions %}
<table>
<tr><th>version</th><th>status</th><th>created at</th><th>nodes</th><th>dim</th></tr>
{% for v in versions %}<tr><td>{{ v.version }}</td><td class="text">{{ v.status }}</td>
<td class="text">{{ v.created_at }}</td><td>{{ v.nodes }}</td><td>{{ v.dim }}</td></tr>
{% endfor %}</table>
{% else %}<p class="note">No versions.</p>{% endif %}
<h2>Metrics</h2>
{% if metric_names %}
<table>
<tr><th>version</th>{% for name in metric_names %}<th>{{ name }}</th>{% endfor %}</tr>
{% for v in versions %}<tr><td>{{ v.version }}</td>
{%- for name in metric_names %}<td>{{ v.metrics.get(name, "") }}</td>{% endfor %}</tr>
{% endfor %}</table>
{% else %}<p class="note">No numeric metrics recorded.</p>{% endif %}
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


def _png(fig) -> str:
    """The figure as base64 PNG text (no metadata chunk, so the page holds no tool banner or address)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, metadata={"Software": None})
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _new_figure(width, height):
    from matplotlib.figure import Figure

    # A bare Figure is not registered with pyplot: nothing leaks between reports or into a caller's session.
    return Figure(figsize=(width, height), layout="constrained")


# ---------------------------------------------------------------------------------------------------- plots
def _distribution_section(values, heading, what, per, absent) -> dict:
    section = {"heading": heading, "image": None, "notes": []}
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
    fig = _new_figure(7.5, 4.2)
    ax = fig.add_subplot()
    ax.scatter(level, count, s=9, alpha=0.7, color="#2b6ca3", edgecolors="none")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel(what)
    ax.set_ylabel(f"number of {per}")
    ax.grid(True, which="major", alpha=0.3)
    section["image"] = _png(fig)
    section["notes"].append(f"{values.size} {per}; median {_format(float(np.median(values)))}, "
                            f"max {_format(float(positive.max()))}; {n_zero} at zero (not shown on log axes).")
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


def _projection_section(vectors, labels, seed=0, vectors_total=None) -> dict:
    section = {"heading": "Vectors in two dimensions (PCA)", "image": None, "notes": []}
    if vectors is None:
        section["notes"].append("No vectors given.")
        return section
    x = np.asarray(vectors)
    if x.ndim != 2 or x.shape[0] < 3 or x.shape[1] < 2:
        section["notes"].append(f"A projection needs at least 3 vectors of dimension 2 or more, got shape {x.shape}.")
        return section
    if labels is not None and len(labels) != x.shape[0]:
        raise ValueError(f"labels must have one entry per vector row ({x.shape[0]}), got {len(labels)}")
    from sklearn.decomposition import PCA

    rows = projected_rows(x.shape[0], seed)
    sub = np.asarray(x[rows], dtype=np.float64)
    keep = np.all(np.isfinite(sub), axis=1)
    rows, sub = rows[keep], sub[keep]
    if rows.size < 3:
        section["notes"].append("Fewer than 3 vectors with finite values: nothing to project.")
        return section
    pca = PCA(n_components=2, random_state=0)
    xy = pca.fit_transform(sub)
    fig = _new_figure(7.5, 6.5)
    ax = fig.add_subplot()
    if labels is None:
        ax.scatter(xy[:, 0], xy[:, 1], s=3, alpha=0.5, color="#2b6ca3", edgecolors="none")
    else:
        codes, names = _label_codes(np.asarray(labels, dtype=object)[rows])
        none = codes < 0
        if none.any():
            ax.scatter(xy[none, 0], xy[none, 1], s=3, alpha=0.3, color="#bbbbbb", edgecolors="none",
                       label="no label")
        cmap = _colour_map(len(names))
        if len(names) <= _MAX_LEGEND:
            for i, name in enumerate(names):
                m = codes == i
                ax.scatter(xy[m, 0], xy[m, 1], s=3, alpha=0.6, color=cmap(i), edgecolors="none", label=name)
            ax.legend(markerscale=4, fontsize="small", loc="best")
        else:
            m = ~none
            ax.scatter(xy[m, 0], xy[m, 1], s=3, alpha=0.6, c=codes[m], cmap=cmap, edgecolors="none")
        section["notes"].append(f"Coloured by label ({len(names)} distinct"
                                + (", no legend beyond 20" if len(names) > _MAX_LEGEND else "") + ").")
    ratio = pca.explained_variance_ratio_
    ax.set_xlabel(f"component 1 ({ratio[0]:.1%} of variance)")
    ax.set_ylabel(f"component 2 ({ratio[1]:.1%} of variance)")
    section["image"] = _png(fig)
    total = max(int(vectors_total or 0), x.shape[0])
    shown = f"{rows.size} of {total} vectors" if rows.size < total else f"all {total} vectors"
    section["notes"].insert(0, f"Showing {shown}.")
    return section


def _colour_map(n):
    from matplotlib import colormaps

    return colormaps["tab10" if n <= 10 else "tab20" if n <= 20 else "viridis"].resampled(max(n, 1))


def _history_section(versions, metrics) -> dict:
    section = {"heading": "Metrics across versions", "image": None, "notes": []}
    names = _first_seen(metrics)
    if not names:
        section["notes"].append("No numeric metrics recorded yet.")
        return section
    if len(names) > _MAX_HISTORY_PANELS:
        section["notes"].append(f"Showing the first {_MAX_HISTORY_PANELS} of {len(names)} metrics; "
                                "the table below has them all.")
        names = names[:_MAX_HISTORY_PANELS]
    ncols = min(3, len(names))
    nrows = math.ceil(len(names) / ncols)
    fig = _new_figure(3.6 * ncols, 2.6 * nrows)
    axes = fig.subplots(nrows, ncols, squeeze=False)
    numbers_ = [v.get("version") for v in versions]
    for ax, name in zip(axes.ravel(), names):
        xs = [n for n, m in zip(numbers_, metrics) if name in m]
        ys = [m[name] for m in metrics if name in m]
        ax.plot(xs, ys, marker="o", markersize=4, color="#2b6ca3")
        ax.set_title(name, fontsize="small")
        ax.set_xlabel("version", fontsize="small")
        ax.tick_params(labelsize="small")
        ax.xaxis.get_major_locator().set_params(integer=True)
        ax.grid(True, alpha=0.3)
    for ax in axes.ravel()[len(names):]:
        ax.set_visible(False)
    section["image"] = _png(fig)
    if len(versions) == 1:
        section["notes"].append("Only one version so far: each panel holds a single point.")
    return section


#: Timing entries that are stages of the pipeline; every other entry is a fixed cost of the run (start-up, the
#: Prefect server, planning, the lock, the report, orchestration, the after-publish estimate).
STAGE_TIMINGS = ("ingest", "graph", "holdout", "eval_walks", "eval_train", "walks", "train", "evaluate", "publish")


def _timings_section(versions, timings) -> dict:
    section = {"heading": "Run time by stage and fixed cost", "image": None, "notes": []}
    names = _first_seen(timings)
    if not names:
        section["notes"].append("No stage timings recorded.")
        return section
    # the stages in pipeline order, then the fixed costs, so that the bars read bottom-up like the run
    names = [n for n in STAGE_TIMINGS if n in names] + [n for n in names if n not in STAGE_TIMINGS]
    fig = _new_figure(max(7.5, min(0.35 * len(versions) + 5, 18.0)), 4.6)
    ax = fig.add_subplot()
    xs = np.arange(len(versions))
    bottom = np.zeros(len(versions))
    cmap = _colour_map(len(names))
    for i, name in enumerate(names):
        h = np.array([t.get(name, 0.0) for t in timings])
        label = name if name in STAGE_TIMINGS else f"{name} (fixed)"
        ax.bar(xs, h, bottom=bottom, color=cmap(i), label=label, width=0.8,
               hatch=None if name in STAGE_TIMINGS else "//", edgecolor="white", linewidth=0.3)
        bottom += h
    ax.set_xticks(xs, [str(v.get("version", "?")) for v in versions], fontsize="small",
                  rotation=90 if len(versions) > 20 else 0)
    ax.set_xlabel("version")
    ax.set_ylabel("seconds")
    ax.legend(fontsize="x-small", loc="upper left", bbox_to_anchor=(1.01, 1.0))
    ax.grid(True, axis="y", alpha=0.3)
    section["image"] = _png(fig)
    last = timings[-1]
    total = sum(last.values())
    stages = sum(v for k, v in last.items() if k in STAGE_TIMINGS)
    note = (f"Version {versions[-1].get('version', '?')}: {_format(total)} s recorded, {_format(stages)} s in the "
            f"stages and {_format(total - stages)} s of fixed costs")
    if "after_publish_estimate" in last:
        note += f" (of which {_format(last['after_publish_estimate'])} s after the publish, estimated from the " \
                "store's previous run)"
    section["notes"].append(note + ". A bar covers the whole command, from the process start to its exit.")
    return section


# ---------------------------------------------------------------------------------------------------- entry point
def write_report(out_html, *, versions, degrees=None, visit_counts=None, vectors=None, labels=None,
                 title="Embedding store report", vectors_total=None) -> Path:
    """Write the store report as one self-contained HTML page.

    Parameters
    ----------
    out_html : path
        The page to write (its folder is created; an existing file is replaced in one rename).
    versions : list of dict
        Catalog rows, oldest first (as from :func:`graphkit.store.list_versions`). Read keys: ``version``,
        ``status``, ``created_at``, ``n_nodes``, ``dim``, ``metrics`` (dict; its finite numbers are drawn and listed,
        anything else is ignored) and ``timings`` (dict of stage to seconds). Missing keys are left blank.
    degrees : ndarray of int, shape (n_nodes,), optional
        Degree of every node, drawn as a log-log distribution.
    visit_counts : ndarray of int, shape (n_nodes,), optional
        Walk visits of every node, drawn the same way.
    vectors : ndarray of float, shape (n_nodes, dim), optional
        Drawn as a PCA projection to two dimensions (a random subset of ``MAX_PROJECTED_POINTS`` rows when larger).
    labels : ndarray, shape (n_nodes,), optional
        One label per row of ``vectors`` (``None`` for none) to colour the projection.
    title : str
        Page title and heading.
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

    sections = [
        _distribution_section(degrees, "Degree distribution", "degree", "nodes", "No degrees given."),
        _distribution_section(visit_counts, "Walk visits per node", "visits", "nodes", "No visit counts given."),
        _projection_section(vectors, labels, vectors_total=vectors_total),
        _history_section(versions, metrics),
        _timings_section(versions, timings),
    ]
    rows = []
    for v, m in zip(reversed(versions), reversed(metrics)):  # newest first in the tables
        created = v.get("created_at")
        rows.append({"version": v.get("version", ""), "status": v.get("status", ""),
                     "created_at": "" if created is None else str(created)[:19],
                     "nodes": v.get("n_nodes", v.get("nodes", "")), "dim": v.get("dim", ""),
                     "metrics": {k: _format(x) for k, x in m.items()}})
    current = [v for v in versions if v.get("is_current")]
    summary = f"{len(versions)} version{'s' if len(versions) != 1 else ''}"
    if current:
        summary += f"; current: {current[-1].get('version')}"
    env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined)
    page = env.from_string(_TEMPLATE).render(title=str(title), summary=summary, sections=sections, versions=rows,
                                             metric_names=_first_seen(metrics))
    out = Path(out_html)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.tmp-{os.getpid()}")
    tmp.write_text(page, encoding="utf-8")
    os.replace(tmp, out)
    return out
