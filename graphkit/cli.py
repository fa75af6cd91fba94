"""The ``graphkit`` command line.

Exit codes: 0 done; 2 bad input or config (one line on stderr naming the file, column or key); 3 the run failed a
quality gate (recorded as a failed version, the current version stays current); 130 and 143 ``refresh`` or
``schedule`` stopped by SIGINT (Ctrl-C) or SIGTERM (see :mod:`graphkit.interrupt`); 1 anything else.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import signal
import sys
from pathlib import Path

from .errors import GateFailure, InputError

__all__ = ["main"]


def _prefect_env() -> None:
    # Quiet, offline-friendly defaults for the local temporary Prefect server; users' own settings win.
    os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    os.environ.setdefault("DO_NOT_TRACK", "1")
    os.environ.setdefault("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "120")


#: Set when refresh or schedule was stopped by a signal (see :func:`run`).
_STOPPED: list[int] = []


def _stopped_refresh(signum: int) -> str:
    return (f"graphkit: refresh stopped by {signal.Signals(signum).name}; nothing was published, "
            "run it again to resume from the finished stages")


def _stopped_schedule(signum: int) -> str:
    return (f"graphkit: schedule stopped by {signal.Signals(signum).name}; its runs are paused until "
            "`graphkit schedule` runs again")


def _latest_version(store) -> int | None:
    """The newest version in the catalog (complete or failed), or None; never raises."""
    try:
        from .store import list_versions

        return max((r["version"] for r in list_versions(store)), default=None)
    except Exception:  # noqa: BLE001 - only used to word the line of an interrupted run
        return None


def cmd_refresh(args) -> int:
    from .config import load_config
    from .interrupt import stop_on_signals
    from .pipeline import RUN_CLOCK, preflight

    RUN_CLOCK.begin_command()  # the version's timings start at this process's own start

    cfg, unread = None, object()
    before = unread  # the newest version before the flow started, once read
    with stop_on_signals(_stopped_refresh) as guard:
        try:
            cfg = load_config(args.config, args.set)
            with RUN_CLOCK.span("preflight"):
                preflight(cfg)  # bad input fails here, within seconds, before Prefect starts
            _prefect_env()
            from graphkit.flows.tempserver import start_temporary_server

            with RUN_CLOCK.span("server_start"):
                # a killed run must not leave Prefect's temporary server running (see tempserver); it boots in
                # its own process while this one loads the flow and the stages' libraries
                server_ready = start_temporary_server()
            from graphkit.flows.artifacts import console_progress
            from graphkit.flows.refresh import refresh_flow

            _load_stage_libraries()
            with RUN_CLOCK.span("server_start"):
                server_ready()
            _quiet_flow_sigterm(guard)
            _no_tracebacks_for_expected_outcomes()
            before = _latest_version(cfg.store_path)
            with console_progress():  # bars on a terminal only
                version = refresh_flow(str(Path(args.config).resolve()), list(args.set))
        except BaseException:
            if guard.signum is None:
                raise
            # whatever the signal surfaced as (KeyboardInterrupt, a crashed flow run); say so if it came after
            # the publish step, when the version was already out
            latest = _latest_version(cfg.store_path) if before is not unread else None
            if latest is not None and latest != before:
                _STOPPED.append(guard.signum)
                return guard.announce(f"graphkit: refresh stopped by {signal.Signals(guard.signum).name}; "
                                      f"version {latest} had already been published")
            _STOPPED.append(guard.signum)
            return guard.announce()
        print(f"published version {version} to {cfg.store_path}")
        if guard.signum is not None:  # the signal came after the run could no longer be stopped
            guard.announce(f"graphkit: {signal.Signals(guard.signum).name} came too late to stop the run: "
                           f"version {version} was published")
            return 0
    return 0


#: Libraries the stages import on first use, loaded while the temporary server boots (else each one's import
#: would be on the run's path: about 2 s together, scikit-learn the most).
_STAGE_LIBRARIES = ("numba", "distributed", "scipy.sparse.csgraph", "scipy.stats", "sklearn.linear_model",
                    "sklearn.metrics", "sklearn.model_selection", "sklearn.multiclass", "sklearn.pipeline",
                    "sklearn.preprocessing", "graphkit.corpus", "graphkit.walks", "graphkit.train",
                    "graphkit.evaluate", "graphkit.quality", "graphkit.store", "graphkit.report", "jinja2",
                    "matplotlib.figure", "matplotlib.backends.backend_agg")


def _load_stage_libraries() -> None:
    from importlib import import_module

    for name in _STAGE_LIBRARIES:
        try:
            import_module(name)
        except ImportError:  # a stage that needs it says so itself
            pass


def _quiet_flow_sigterm(guard) -> None:
    """During a flow run Prefect's own SIGTERM handler raises in the main thread, and its crash report is logged
    at once; have it silence stderr first (as :func:`_quiet_runner_sigterm` does for serving)."""
    from prefect.utilities import engine

    handle = getattr(engine, "_prefect_sigterm_handler", None)
    if handle is None or getattr(handle, "_graphkit_quiet", False):
        return

    def handler(signum, frame):
        guard.note(signum)
        return handle(signum, frame)

    handler._graphkit_quiet = True
    engine._prefect_sigterm_handler = handler  # looked up by name each time Prefect installs it


def _quiet_runner_sigterm(guard) -> None:
    """Prefect's Runner replaces the SIGTERM handler while serving and logs from it at once; have it silence
    stderr first, so that the command's own line stays the only one after the signal."""
    from prefect.runner import Runner

    handle = Runner.handle_sigterm

    def handle_sigterm(self, *args, **kwargs):
        guard.note(signal.SIGTERM)
        return handle(self, *args, **kwargs)

    Runner.handle_sigterm = handle_sigterm  # this process only serves; it ends with the command


def _no_tracebacks_for_expected_outcomes() -> None:
    """Once Prefect is loaded: its console follows the command's log level and says nothing about the outcomes
    the command reports in its own line (see :mod:`graphkit.logs`)."""
    from .logs import adopt_prefect_console

    adopt_prefect_console()


def cmd_schedule(args) -> int:
    from .config import load_config
    from .interrupt import stop_on_signals
    from .pipeline import preflight

    with stop_on_signals(_stopped_schedule) as guard:
        try:
            cfg = load_config(args.config, args.set)
            preflight(cfg)
            _prefect_env()
            from graphkit.flows.nightly import check_schedule, serve_nightly
            from graphkit.flows.tempserver import guard_temporary_server

            check_schedule(args.cron, args.timezone, args.name)  # a bad schedule fails before any server starts
            guard_temporary_server()  # stopped after serving has wound down, never by the terminal's Ctrl-C
            _quiet_runner_sigterm(guard)
            _no_tracebacks_for_expected_outcomes()
            serve_nightly(str(Path(args.config).resolve()), cron=args.cron, timezone=args.timezone,
                          name=args.name, overrides=list(args.set))
        except BaseException:
            if guard.signum is None:
                raise
            _STOPPED.append(guard.signum)
            return guard.announce()
        if guard.signum is not None:  # Prefect's serve ends quietly on SIGINT and SIGTERM
            _STOPPED.append(guard.signum)
            return guard.announce()
    return 0


def _jsonable(row: dict) -> dict:
    out = {}
    for k, v in row.items():
        out[k] = v.isoformat() if hasattr(v, "isoformat") else v
    return out


def cmd_versions(args) -> int:
    from .store import list_versions

    rows = list_versions(args.store)
    if args.json:
        print(json.dumps([_jsonable(r) for r in rows], indent=2, default=str))
        return 0
    if not args.wide:
        print(compact_versions(rows, args.store))
        return 0
    from rich.console import Console
    from rich.table import Table

    def fmt(v):
        return f"{v:.3f}" if isinstance(v, float) else str(v)

    from .report import STAGE_TIMINGS

    table = Table(title=f"versions in {args.store}")
    for col in ("version", "status", "current", "pinned", "created (UTC)", "nodes", "dim", "total s",
                "stages + fixed s", "metrics", "message"):
        table.add_column(col, overflow="fold")
    for r in rows:
        metrics = r.get("metrics") or {}
        # the whole command: the stages plus its fixed costs (start-up, server, report, ...; see --json)
        timings = {k: v for k, v in (r.get("timings") or {}).items()
                   if isinstance(v, (int, float)) and not isinstance(v, bool)}
        total = sum(timings.values())
        stages = sum(v for k, v in timings.items() if k in STAGE_TIMINGS)
        table.add_row(str(r["version"]), r["status"], "*" if r["is_current"] else "", "*" if r["pinned"] else "",
                      str(r["created_at"])[:19], fmt(r["n_nodes"] or ""), fmt(r["dim"] or ""), f"{total:.1f}",
                      f"{stages:.1f} + {total - stages:.1f}",
                      " ".join(f"{k}={fmt(v)}" for k, v in metrics.items() if not isinstance(v, (dict, list))),
                      r.get("message") or "")
    Console(width=max(160, Console().width)).print(table)
    return 0


#: The headline metrics of the compact ``versions`` table: (column, metric key).
HEADLINE_METRICS = (("AUC", "link_auc_cosine"), ("F1@10", "micro_f1_at_10"))


def compact_versions(rows, store) -> str:
    """The versions as a plain table that fits 80 columns: no cell is ever cut or wrapped, the message of a failed
    version follows the table, wrapped at spaces. ``--wide`` and ``--json`` show everything."""
    import textwrap

    heads = ["ver", "status", "", "created (UTC)", "nodes", "dim", "total s"]
    metric_cols = [(h, k) for h, k in HEADLINE_METRICS if any(k in (r.get("metrics") or {}) for r in rows)]
    heads += [h for h, _ in metric_cols]
    body = []
    for r in rows:
        metrics = r.get("metrics") or {}
        total = sum(v for v in (r.get("timings") or {}).values()
                    if isinstance(v, (int, float)) and not isinstance(v, bool))
        marks = ("C" if r["is_current"] else "") + ("P" if r["pinned"] else "")
        cells = [str(r["version"]), r["status"], marks, str(r["created_at"])[:16],
                 "" if r["n_nodes"] is None else str(r["n_nodes"]), "" if r["dim"] is None else str(r["dim"]),
                 f"{total:.1f}"]
        for _, k in metric_cols:
            v = metrics.get(k)
            cells.append(f"{v:.3f}" if isinstance(v, (int, float)) and not isinstance(v, bool) else "")
        body.append(cells)
    right = {0, 4, 5, 6, *range(7, len(heads))}
    widths = [max(len(c) for c in col) for col in zip(heads, *body)]

    def line(cells):
        return "  ".join(c.rjust(w) if i in right else c.ljust(w)
                         for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    title = f"versions in {store}"
    out = [title if len(title) <= 80 else f"versions in .../{Path(store).name}", line(heads), line(["-" * w for w in widths]), *map(line, body)]
    if not rows:
        out.append("(no versions yet)")
    out.append("C current, P pinned; total s: the whole command; --wide, --json: all")
    for r in rows:
        if r["status"] != "complete" and r.get("message"):
            out += textwrap.wrap(f"version {r['version']} {r['status']}: {r['message']}", width=80,
                                 subsequent_indent="  ", break_long_words=False, break_on_hyphens=False)
    return "\n".join(out)


#: Folders of a store that only the store writes (an export may not land there).
STORE_FOLDERS = ("versions", "work", "reports")
#: Output formats of ``export`` and ``features`` by the file's extension.
OUT_FORMATS = {".parquet": "parquet", ".csv": "csv"}


def output_file(out, *, formats=OUT_FORMATS, store=None, option: str = "--out") -> tuple[Path, str]:
    """Check an output file before any work: a known extension (its format is returned), not a folder, not inside
    the store, and a parent folder that exists or can be created (missing folders are created when the file is
    written, see :func:`make_parent`). Raises ``InputError``."""
    out = Path(out)
    fmt = formats.get(out.suffix.lower())
    if fmt is None:
        known = ", ".join(formats)
        raise InputError(f"{option} {out}: unknown file extension {out.suffix or '(none)'!r}; use one of {known}")
    if out.is_dir():
        raise InputError(f"{option} {out}: is a folder; give a file name")
    if store is not None:  # never into the folders the store manages (the catalog and lock are neither format)
        root, target = Path(store).resolve(), out.resolve()
        if root in target.parents and target.relative_to(root).parts[0] in STORE_FOLDERS:
            raise InputError(f"{option} {out}: would write among the store's own files in {store}; write the "
                             "export elsewhere")
    probe = out.absolute().parent
    while not probe.exists() and not probe.is_symlink():
        probe = probe.parent
    if not probe.is_dir():
        raise InputError(f"{option} {out}: cannot create the folder {out.parent}: {probe} is a file")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise InputError(f"{option} {out}: the folder {probe} is not writable")
    return out, fmt


def make_parent(out: Path, option: str = "--out") -> None:
    """Create the missing folders above an output file checked by :func:`output_file`."""
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"{option} {out}: cannot create the folder {out.parent} ({exc.strerror or exc})") from None


def cmd_export(args) -> int:
    from .store import connect, export_version

    connect(args.store, version=args.version).close()  # a missing store or version first, then the output's checks
    out, fmt = output_file(args.out, store=args.store)
    make_parent(out)
    n = export_version(args.store, out, version=args.version, fmt=fmt)
    print(f"wrote {n} rows to {out}")
    return 0


def cmd_similar(args) -> int:
    from .store import similar_nodes

    rows = similar_nodes(args.store, args.node_id, args.top, args.version, kind=args.kind, id_kind=args.id_kind,
                         salt_env=args.salt_env)
    if args.json:
        print(json.dumps([{"node_id": n, "node_kind": k, "similarity": round(float(s), 6)} for n, k, s in rows],
                         default=str))
    else:
        for n, k, s in rows:
            print(f"{n}\t{k}\t{s:.4f}")
    return 0


def cmd_neighbours(args) -> int:
    from .neighbours import NeighbourIndex, check_top, scope_size, version_neighbours
    from .store import connect, version_files, version_row

    connect(args.store, version=args.version).close()  # a missing store or version first
    row = version_row(Path(args.store), args.version)
    parquet = version_files(Path(args.store), row["path"])[0]
    n_nodes, scope = scope_size(parquet, args.kind)
    check_top(args.top, n_nodes, scope=scope)  # a bad --top or --kind before the output's checks
    out, _ = output_file(args.out, formats={".parquet": "parquet"}, store=args.store)
    make_parent(out)
    # the index published with the version holds every node: used as it is, unless --kind asks for one kind
    index = NeighbourIndex(parquet.parent).index if args.kind is None and NeighbourIndex.exists(parquet.parent) \
        else None
    r = version_neighbours(parquet, out, args.top, kind=args.kind, index=index)
    source = "its published index" if index is not None else "an index built for this run"
    print(f"wrote {r['rows']} rows to {out}: {r['nodes']} nodes, top {r['top']}, version {row['version']}, "
          f"from {source} ({r['seconds']:.1f} s)")
    return 0


def cmd_report(args) -> int:
    from .report import report_title, write_report
    from .store import list_versions, report_inputs

    if args.out:  # checked before the vectors are read
        list_versions(args.store)  # a missing store first
        out, _ = output_file(args.out, formats={".html": "html", ".htm": "html"})
    else:
        out = Path(args.store) / "reports" / "report.html"
    data = report_inputs(args.store)
    data.pop("current")
    write_report(out, **data, title=report_title(args.store))
    print(f"wrote {out}")
    return 0


def cmd_promote(args) -> int:
    from .store import promote_version

    promote_version(args.store, args.version, wait=args.wait)
    print(f"version {args.version} is current")
    return 0


def cmd_pin(args) -> int:
    from .store import pin_version

    pin_version(args.store, args.version, not args.unpin, wait=args.wait)
    print(f"version {args.version} {'unpinned' if args.unpin else 'pinned'}")
    return 0


def cmd_foldin(args) -> int:
    from .config import load_config
    from .foldin import fold_in

    cfg = load_config(args.config, args.set)
    result = fold_in(cfg)
    if result["version"] is None:
        n = result["foldin_candidates"]
        what = "no new nodes" if n == 0 else f"{n} new node{'s' if n > 1 else ''}, none with a known neighbour,"
        print(f"{what} since version {result['base_version']}: nothing published")
        return 0
    print(f"published version {result['version']}: version {result['base_version']} plus "
          f"{result['foldin_nodes']} provisional vectors ({result['foldin_without_known_neighbours']} new nodes "
          f"had no known neighbour)")
    return 0


def cmd_features(args) -> int:
    from .features import export_features
    from .store import version_row

    version_row(Path(args.store), args.version)  # a missing store or version first, before the output's checks
    out, fmt = output_file(args.out, store=args.store)
    if args.csv and fmt != "csv":
        raise InputError(f"--csv writes CSV, but --out {args.out} names a {fmt} file; name it .csv")
    r = export_features(args.store, args.entities, args.on, args.out, version=args.version, kind=args.kind,
                        fmt=fmt)
    print(f"wrote {r['rows']} rows to {args.out} (version {r['version']}, {r['dim']} columns); "
          f"{r['without_vector']} entities have no vector (null columns)")
    return 0


def cmd_sql(args) -> int:
    import duckdb

    from .io import atomic_output
    from .store import connect

    if (args.query is None) == (args.file is None):
        raise InputError("sql: give either a query or --file FILE, not both")
    if args.file is not None:
        try:
            query = Path(args.file).read_text()
        except OSError as exc:
            raise InputError(f"{args.file}: cannot read the query file ({exc.strerror or exc})") from None
    else:
        query = args.query
    params = {}
    for item in args.param:
        name, eq, value = item.partition("=")
        if not eq or not name.strip().isidentifier():
            raise InputError(f"--param {item!r}: expected NAME=VALUE")
        params[name.strip()] = value
    out = output_file(args.out, formats={Path(args.out).suffix.lower(): args.format}, store=args.store)[0] \
        if args.out is not None else None
    if _SHOW_TABLES.fullmatch(query):
        # the connection's temporary views shadow the catalog's views of the same names: list each name once;
        # the files `connect` registers through Arrow (named `_...`) are its plumbing, read through the views
        query = "select distinct name from (show tables) where not starts_with(name, '_') order by name"
    con = connect(args.store)
    try:
        try:
            rel = con.execute(query, params) if params else con.execute(query)
            if rel.description is None:  # a statement without a result
                return 0
            if out is None:
                _write_result(rel, sys.stdout, args.format, args.max_rows)
                return 0
            make_parent(out)
            with atomic_output(out) as tmp, open(tmp, "w", newline="", encoding="utf-8") as fh:
                n = _write_result(rel, fh, args.format, args.max_rows)
        except duckdb.Error as exc:
            raise InputError(_sql_error(exc)) from None
    finally:
        con.close()
    print(f"wrote {n} rows to {out}")
    return 0


_SHOW_TABLES = re.compile(r"\s*show\s+tables\s*;?\s*", re.IGNORECASE)
#: Rows fetched at a time for CSV and JSON (the result is never held whole).
_FETCH = 10_000
#: Widest cell of the table format (longer text, e.g. a vector, ends in "...").
_CELL = 40


def _json_value(v):
    """A query value as JSON: dates ISO, lists as arrays, non-finite floats as null."""
    import datetime as dt
    import decimal
    import math

    if v is None or isinstance(v, (bool, int, str)):
        return v
    if isinstance(v, float):
        return v if math.isfinite(v) else None
    if isinstance(v, decimal.Decimal):
        return _json_value(float(v))
    if isinstance(v, (dt.date, dt.time, dt.datetime)):
        return v.isoformat()
    if isinstance(v, (list, tuple)):
        return [_json_value(x) for x in v]
    if isinstance(v, dict):
        return {str(k): _json_value(x) for k, x in v.items()}
    if isinstance(v, (bytes, bytearray)):
        return bytes(v).hex()
    return str(v)  # UUID, interval, ...


def _text_value(v) -> str:
    if v is None:
        return ""
    if isinstance(v, float):  # the shortest exact text, or six significant digits when that is long
        return r if len(r := repr(v)) <= 10 else f"{v:.6g}"
    if isinstance(v, (list, tuple, dict)):
        return json.dumps(_json_value(v), separators=(",", ":"))
    j = _json_value(v)
    return j if isinstance(j, str) else json.dumps(j)


def _write_result(rel, fh, fmt: str, max_rows: int) -> int:
    """Write a query's result to ``fh`` as a plain table (at most ``max_rows`` rows), CSV or JSON (every row);
    returns the rows written."""
    names = [d[0] for d in rel.description]
    if fmt == "csv":
        import csv

        w, n = csv.writer(fh), 0
        w.writerow(names)
        while batch := rel.fetchmany(_FETCH):
            w.writerows([repr(v) if isinstance(v, float) else _text_value(v) for v in row] for row in batch)
            n += len(batch)
        return n
    if fmt == "json":
        fh.write("[")
        n = 0
        while batch := rel.fetchmany(_FETCH):
            for row in batch:
                fh.write(("," if n else "") + "\n" + json.dumps(dict(zip(names, map(_json_value, row))),
                                                               allow_nan=False))
                n += 1
        fh.write("\n]\n" if n else "]\n")
        return n
    rows = rel.fetchmany(max_rows + 1)
    more = len(rows) > max_rows
    rows = rows[:max_rows]

    def cell(v):
        t = "NULL" if v is None else _text_value(v).replace("\n", " ")
        return t if len(t) <= _CELL else t[:_CELL - 3] + "..."

    body = [[cell(v) for v in row] for row in rows]
    numeric = [all(isinstance(row[i], (int, float)) and not isinstance(row[i], bool) for row in rows
                   if row[i] is not None) and rows != [] for i in range(len(names))]
    widths = [max([len(n)] + [len(r[i]) for r in body]) for i, n in enumerate(names)]

    def line(cells):
        return "  ".join(c.rjust(w) if numeric[i] else c.ljust(w)
                         for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    fh.write(line(names) + "\n" + line(["-" * w for w in widths]) + "\n")
    for r in body:
        fh.write(line(r) + "\n")
    note = f"({len(body)} row{'s' if len(body) != 1 else ''}"
    fh.write(note + (" shown; more not shown, see --max-rows)" if more else ")") + "\n")
    return len(body)


#: DuckDB's words for a statement the read-only, file-less connection (``store.connect``) refuses.
_REFUSED = ("attached in read-only mode", "configuration has been locked", "disabled by configuration",
            "in read-only mode", "external access")


def _sql_error(exc) -> str:
    import duckdb

    first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
    if isinstance(exc, duckdb.PermissionException) or any(w in first.lower() for w in _REFUSED):
        return ("query refused: SQL on a store is read-only and cannot read or write files, attach databases, "
                f"install extensions or change settings ({first})")
    return f"query failed: {first}"


def _seconds(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number of seconds") from None
    if not 0 <= value < float("inf"):
        raise argparse.ArgumentTypeError(f"{text} is not a number of seconds >= 0")
    return value


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"{text} is not a positive number")
    return value


def _installed_version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("graphkit")
    except PackageNotFoundError:  # a source tree that was never installed
        return "0+unknown"


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="graphkit", description="Nightly node embeddings for relationship graphs.")
    p.add_argument("--version", action="version", version=f"graphkit {_installed_version()}")
    sub = p.add_subparsers(dest="command", required=True)

    r = sub.add_parser("refresh", help="run the refresh flow for a config and publish a new version")
    r.add_argument("config", help="TOML config file")
    r.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                   help="override a config key (repeatable)")
    _log_options(r)
    r.set_defaults(func=cmd_refresh)

    n = sub.add_parser("schedule", help="serve the refresh as a Prefect deployment on a cron schedule")
    n.add_argument("config", help="TOML config file")
    n.add_argument("--cron", default="0 2 * * *", help='cron expression (default "0 2 * * *": 02:00 every day)')
    n.add_argument("--timezone", default="UTC", help="IANA time zone of the cron expression (default UTC)")
    n.add_argument("--name", default="nightly-refresh", help="deployment name")
    n.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                   help="override a config key (repeatable)")
    _log_options(n)
    n.set_defaults(func=cmd_schedule)

    v = sub.add_parser("versions", help="list the versions in a store")
    v.add_argument("store")
    v.add_argument("--json", action="store_true", help="print a JSON array, one object per version")
    v.add_argument("--wide", action="store_true",
                   help="every column (stage and fixed seconds, all metrics, messages) in a wide table")
    v.set_defaults(func=cmd_versions)

    e = sub.add_parser("export", help="write a version's vectors to a Parquet or CSV file")
    e.add_argument("store")
    e.add_argument("--out", required=True, help="output file: .parquet (a vector column) or .csv (one column per "
                                                 "dimension)")
    e.add_argument("--version", type=int, default=None, help="version number (default: current)")
    e.set_defaults(func=cmd_export)

    s = sub.add_parser("similar", help="nodes most similar (cosine) to a node")
    s.add_argument("store")
    s.add_argument("node_id")
    s.add_argument("--top", type=int, default=10)
    s.add_argument("--version", type=int, default=None)
    s.add_argument("--kind", default=None, help="show only results of this node kind")
    s.add_argument("--id-kind", default=None, metavar="KIND",
                   help="the kind of the query node, when its id exists under several kinds")
    s.add_argument("--salt-env", default=None, metavar="NAME",
                   help="in a store with hashed ids: the environment variable holding the key that hashes the "
                        "given raw id (default: the run's [input] hash_salt_env, else GRAPHKIT_ID_SALT)")
    s.add_argument("--json", action="store_true")
    s.set_defaults(func=cmd_similar)

    nb = sub.add_parser("neighbours", help="every node's most similar nodes (cosine) as a Parquet table, from an "
                                            "approximate index")
    nb.add_argument("store")
    nb.add_argument("--top", type=int, required=True, metavar="K", help="neighbours per node (at least 1)")
    nb.add_argument("--out", required=True, metavar="FILE.parquet",
                    help="output table: node_id, node_kind, neighbour_id, neighbour_kind, rank, similarity")
    nb.add_argument("--version", type=int, default=None, help="version number (default: current)")
    nb.add_argument("--kind", default=None, metavar="KIND",
                    help="only nodes of this kind, as query nodes and as neighbours")
    nb.set_defaults(func=cmd_neighbours)

    rp = sub.add_parser("report", help="write an HTML report of a store (plots, metric history, timings)")
    rp.add_argument("store")
    rp.add_argument("--out", default=None, help="output HTML file (default STORE/reports/report.html)")
    rp.set_defaults(func=cmd_report)

    pr = sub.add_parser("promote", help="make an older complete version current again")
    pr.add_argument("store")
    pr.add_argument("version", type=int)
    pr.add_argument("--wait", type=_seconds, default=0.0, metavar="SECONDS",
                    help="wait this long for a running refresh to release the store (default 0: refuse at once)")
    pr.set_defaults(func=cmd_promote)

    pn = sub.add_parser("pin", help="pin a version so that retention never deletes it")
    pn.add_argument("store")
    pn.add_argument("version", type=int)
    pn.add_argument("--unpin", action="store_true", help="remove the pin")
    pn.add_argument("--wait", type=_seconds, default=0.0, metavar="SECONDS",
                    help="wait this long for a running refresh to release the store (default 0: refuse at once)")
    pn.set_defaults(func=cmd_pin)

    fi = sub.add_parser("foldin", help="provisional vectors for new nodes from their known neighbours")
    fi.add_argument("config", help="TOML config file")
    fi.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE")
    _log_options(fi)
    fi.set_defaults(func=cmd_foldin)

    fe = sub.add_parser("features", help="join vectors onto an entity table as numbered float columns")
    fe.add_argument("store")
    fe.add_argument("--entities", required=True, help="entity table (Parquet file, folder or glob, or a CSV file)")
    fe.add_argument("--on", required=True, help="entity column holding the node id")
    fe.add_argument("--out", required=True, help="output file (.parquet or .csv)")
    fe.add_argument("--version", type=int, default=None)
    fe.add_argument("--kind", default=None, help="node kind to match (required when there are several)")
    fe.add_argument("--csv", action="store_true", help="write CSV (--out must then end in .csv)")
    fe.set_defaults(func=cmd_features)

    q = sub.add_parser("sql", help="run a DuckDB query over the store (views embeddings, versions)")
    q.add_argument("store")
    q.add_argument("query", nargs="?", help="the query (or use --file)")
    q.add_argument("--file", help="read the query from this .sql file (e.g. one of sql/examples/)")
    q.add_argument("--param", action="append", default=[], metavar="NAME=VALUE",
                   help="bind $NAME in the query to VALUE, as text (repeatable)")
    q.add_argument("--format", choices=("table", "csv", "json"), default="table",
                   help="table (plain text, default), csv (a header row; lists as JSON text) or json (an array of "
                        "objects)")
    q.add_argument("--out", default=None, metavar="FILE",
                   help="write the result to FILE (replaced whole, never half-written) instead of the screen")
    q.add_argument("--max-rows", type=_positive_int, default=40,
                   help="rows shown at most by --format table (default 40); csv and json write every row")
    q.set_defaults(func=cmd_sql)
    return p




def _log_options(parser) -> None:
    """``--log-level`` and ``--quiet`` of the commands that run stages (see :mod:`graphkit.logs`)."""
    from .logs import LEVELS

    group = parser.add_mutually_exclusive_group()
    group.add_argument("--log-level", choices=LEVELS, default="info", type=str.lower, metavar="LEVEL",
                       help="what the run's log shows: debug (also each stage's start and Prefect's own lines), "
                            "info (one line per stage, warnings and errors: the default), warning, error")
    group.add_argument("--quiet", action="store_const", const="warning", dest="log_level",
                       help="only warnings and errors (the same as --log-level warning)")


def main(argv=None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse already printed its one-line usage error
        return 2 if exc.code not in (0, None) else 0
    undo_logging = None
    if getattr(args, "log_level", None):  # a command that runs stages: one line per stage, no chatter
        from .logs import configure

        undo_logging = configure(args.log_level)
    else:
        # Dask's scheduler and worker chatter stays out of the output; read when distributed is first imported
        os.environ.setdefault("DASK_LOGGING__DISTRIBUTED", "warning")
    try:
        return _dispatch(args)
    finally:
        if undo_logging is not None:
            undo_logging()


def _redacted(exc) -> str:
    """An error's text without the value of any secret-looking environment variable (credentials of an object
    store, the pseudonym key), whichever library wrote it."""
    from .storage import redact

    return redact(str(exc))


def _dispatch(args) -> int:
    try:
        return args.func(args)
    except InputError as exc:
        print(f"graphkit: error: {_redacted(exc)}", file=sys.stderr)
        return 2
    except GateFailure as exc:
        print(f"graphkit: quality gate: {exc}", file=sys.stderr)
        return 3
    except KeyboardInterrupt:
        print("graphkit: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - the last line of defence: one line, exit 1
        if os.environ.get("GRAPHKIT_DEBUG"):
            raise
        first = _redacted(exc).splitlines()[0] if str(exc) else ""
        print(f"graphkit: failed: {type(exc).__name__}: {first} (set GRAPHKIT_DEBUG=1 for a traceback)",
              file=sys.stderr)
        return 1


def run(argv=None) -> None:
    """The ``graphkit`` program: :func:`main`, then exit with its code.

    The process ends right away once its threads are joined and the exit handlers have run (Prefect's flush the
    run's logs and stop the temporary server; after a stop by SIGINT or SIGTERM the threads are not waited for):
    left to the interpreter's own shutdown, a refresh interrupted while Dask was starting was seen to end by
    SIGINT (exit -2) after its line, instead of 130, and a finished refresh spent seconds unloading modules.
    """
    code = main(argv)
    import atexit
    import threading

    # Every command ends the same way: its threads are joined and the exit handlers run (Prefect's flush the
    # run's logs and stop the temporary server), then the process ends without the interpreter's teardown of
    # every loaded module, which took 1 to 4 s after a refresh (numba, Prefect, Dask, scikit-learn).
    if not _STOPPED:
        for thread in threading.enumerate():
            if thread is not threading.current_thread() and not thread.daemon:
                thread.join()
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):
            pass
    atexit._run_exitfuncs()
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):
            pass
    os._exit(code)


if __name__ == "__main__":
    run()
