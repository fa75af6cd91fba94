"""The refresh configuration: a TOML file, validated strictly, with ``--set section.key=value`` overrides.

Paths in the file are relative to the file itself; an input table's path may instead be an object-store URL
(``s3://``, ``gs://``, ``az://``..., see :mod:`graphkit.storage`), kept as written. The store is a local folder. Unknown keys, wrong types and impossible values are
``ConfigError``\\ s whose message names the file and the key.
"""

from __future__ import annotations

import difflib
import tomllib
from pathlib import Path
from datetime import date, datetime, timedelta, timezone
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from . import checks as _b
from .errors import ConfigError
from .storage import is_url, location

__all__ = ["RefreshConfig", "CrossKeyError", "load_config", "apply_overrides"]


class CrossKeyError(ValueError):
    """A rule between keys that each hold a valid value (a validator's error); ``keys`` are the
    ``(section, key)`` pairs involved, so that the message can blame ``--set`` when one of them came from there."""

    def __init__(self, message: str, *keys: tuple[str, str]):
        super().__init__(message)
        self.keys = keys


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True, frozen=True)


def _check_delimiter(value: str | None) -> str | None:
    """One character that can separate fields: not a line break, not the quote character."""
    if value is None:
        return None
    if len(value) != 1:
        raise ValueError(f"must be one character (a tab is \"\\t\"), got {value!r}")
    if value in ('"', "\n", "\r"):
        raise ValueError(f"{value!r} cannot separate fields (it is the quote or a line break)")
    return value


class TableSection(_Section):
    """One edge table of the graph (an entry of ``[[input.tables]]``)."""

    path: str = Field(description="Parquet, CSV or TSV file (text also .gz, .bz2, .lz4, .zst, .zstd), folder (read "
                                  "recursively, hive partitions typed, . and _ names skipped) or glob, relative to "
                                  "the config; or an object-store URL (s3://, gs://, az://...) naming an object, a "
                                  "prefix or a glob.")
    source: str = Field(description="Column holding the source node id.")
    target: str = Field(description="Column holding the target node id.")
    weight: str | None = Field(default=None, description="Optional column holding a positive edge weight.")
    source_kind: str = Field(default="node", min_length=1, description="Kind of the source nodes (e.g. account).")
    target_kind: str = Field(default="node", min_length=1, description="Kind of the target nodes (e.g. device).")
    timestamp: str | None = Field(default=None, description="Optional column with the time of each edge.")
    csv_header: bool | None = Field(default=None, description="This table's CSV/TSV files start with a header "
                                                                "row (default: [input] csv_header).")
    csv_delimiter: str | None = Field(default=None, description="This table's CSV/TSV field delimiter, one "
                                                                "character (default: [input] csv_delimiter).")

    @field_validator("csv_delimiter")
    @classmethod
    def _one_character(cls, value):
        return _check_delimiter(value)


class InputSection(_Section):
    edges: str | None = Field(default=None, description="Shorthand for a single table: its path (see "
                                                         "TableSection.path).")
    source: str | None = Field(default=None, description="Shorthand for a single table: source column.")
    target: str | None = Field(default=None, description="Shorthand for a single table: target column.")
    weight: str | None = Field(default=None, description="Shorthand for a single table: weight column.")
    source_kind: str = Field(default="node", min_length=1)
    target_kind: str = Field(default="node", min_length=1)
    timestamp: str | None = Field(default=None, description="Shorthand for a single table: timestamp column.")
    tables: list[TableSection] = Field(default_factory=list, description="Several edge tables in one graph.")
    directed: bool = Field(default=False, description="Treat edges as directed (walks follow edge direction).")
    drop_null_ids: bool = Field(default=False, description="Drop rows with a null id (counted) instead of failing.")
    since: date | datetime | None = Field(default=None, description="Keep edges at or after this time.")
    until: date | datetime | None = Field(default=None, description="Keep edges before this time (default: now).")
    last_days: float | None = Field(default=None, gt=0, description="Keep edges of the last N days before until.")
    half_life_days: float | None = Field(default=None, gt=0, description="Halve an edge's weight every N days of age.")
    hash_ids: bool = Field(default=False, description="Publish HMAC-SHA256 pseudonyms instead of raw ids.")
    hash_salt_env: str = Field(default="GRAPHKIT_ID_SALT", min_length=1,
                               description="Environment variable holding the secret key for hash_ids.")
    csv_header: bool = Field(default=True, description="CSV/TSV edge files start with a header row naming the "
                                                       "columns; false: columns are named column_1, column_2, ...")
    csv_delimiter: str | None = Field(default=None, description="CSV/TSV field delimiter, one character "
                                                                "(default: ',' for .csv files, a tab for .tsv).")

    @field_validator("csv_delimiter")
    @classmethod
    def _one_character(cls, value):
        return _check_delimiter(value)

    @model_validator(mode="after")
    def _one_way_to_name_tables(self):
        single = [k for k in ("edges", "source", "target", "weight", "timestamp") if getattr(self, k) is not None]
        if self.tables and single:
            raise ValueError(f"give either [[input.tables]] or the single-table keys, not both (found {single[0]!r})")
        if not self.tables:
            for key in ("edges", "source", "target"):
                if getattr(self, key) is None:
                    raise ValueError(f"missing key {key!r} (or give [[input.tables]])")
        if self.since is not None and self.last_days is not None:
            raise ValueError("give either since or last_days, not both")
        kinds = [k for k in ("source_kind", "target_kind") if k in self.model_fields_set]
        if self.tables and kinds:
            raise CrossKeyError(f"[input] {kinds[0]} is for the single-table keys; with [[input.tables]] give "
                                f"{kinds[0]} in each entry", ("input", kinds[0]), ("input", "tables"))
        if self.since is not None and self.until is not None and _utc(self.since) >= _utc(self.until):
            raise CrossKeyError(f"[input] since ({self.since}) must be before [input] until ({self.until}): the "
                                "window is empty", ("input", "since"), ("input", "until"))
        timed = [k for k in ("since", "until", "last_days", "half_life_days") if getattr(self, k) is not None]
        if timed and not any(t.timestamp for t in self.table_specs()):
            raise CrossKeyError(f"[input] {timed[0]} needs a timestamp column, but no edge table names one (give "
                                "[input] timestamp, or timestamp in an [[input.tables]] entry)",
                                ("input", timed[0]), ("input", "timestamp"))
        return self

    def table_specs(self) -> list[TableSection]:
        """The edge tables, the single-table shorthand included (paths as written)."""
        if self.tables:
            return list(self.tables)
        return [TableSection(path=self.edges, source=self.source, target=self.target, weight=self.weight,
                             source_kind=self.source_kind, target_kind=self.target_kind, timestamp=self.timestamp)]

    def time_window(self, now: datetime | None = None) -> dict[str, Any]:
        """``since``/``until`` as UTC datetimes (None when open) and the reference time of the weight decay."""
        until = _utc(self.until)
        as_of = until or now or datetime.now(timezone.utc)
        since = _utc(self.since)
        if self.last_days is not None:
            since = as_of - timedelta(days=self.last_days)
        return {"since": since, "until": until, "as_of": as_of, "half_life_days": self.half_life_days}


def _utc(value):
    if value is None:
        return None
    if not isinstance(value, datetime):
        value = datetime(value.year, value.month, value.day)
    return value.replace(tzinfo=timezone.utc) if value.tzinfo is None else value.astimezone(timezone.utc)


class WalksSection(_Section):
    per_node: int = Field(default=10, ge=_b.PER_NODE_MIN, description="Walks started from every node (one pass "
                                                                      "each).")
    length: int = Field(default=40, ge=_b.LENGTH_MIN, description="Nodes per walk, the start node included.")
    seed: int = Field(default=0, ge=0, le=_b.SEED_MAX, description="Seed of the walk and training random streams.")
    weighted: bool = Field(default=True, description="Draw the next node proportionally to edge weight when the "
                                                     "graph has weights (false: uniform).")
    p: float = Field(default=1.0, ge=_b.P_Q_RANGE[0], le=_b.P_Q_RANGE[1],
                     description="node2vec return parameter (1 with q = 1: first-order walks).")
    q: float = Field(default=1.0, ge=_b.P_Q_RANGE[0], le=_b.P_Q_RANGE[1], description="node2vec in-out parameter.")
    dead_end: Literal["stop", "restart"] = Field(
        default="stop", description="Directed graphs: at a node with no out-edges stop the walk, or restart it at "
                                    "its first node.")


class TrainSection(_Section):
    dim: int = Field(default=128, ge=_b.DIM_RANGE[0], le=_b.DIM_RANGE[1], description="Dimension of the node "
                                                                                      "vectors.")
    window: int = Field(default=5, ge=_b.WINDOW_MIN, description="Largest distance between a node and its context "
                                                                 "in a walk.")
    objective: Literal["negative_sampling", "hierarchical_softmax"] = "negative_sampling"
    negatives: int = Field(default=5, ge=_b.NEGATIVES_MIN, description="Negative samples per positive pair "
                                                                       "(negative_sampling only).")
    epochs: int = Field(default=1, ge=_b.EPOCHS_MIN, description="Passes over the walk corpus.")
    learning_rate: float = Field(default=0.025, ge=_b.MIN_LEARNING_RATE, le=_b.LEARNING_RATE_MAX,
                                 description="Starting learning rate, decayed linearly to "
                                             f"{_b.MIN_LEARNING_RATE}.")
    threads: int | None = Field(default=None, ge=_b.THREADS_MIN, description="Training threads (default: all "
                                                                             "cores; at most numba's thread pool).")
    subsample: float = Field(default=0.0, ge=_b.SUBSAMPLE_RANGE[0], le=_b.SUBSAMPLE_RANGE[1],
                             description="Subsampling threshold of frequent nodes (Mikolov et al. 2013); 0 keeps "
                                         "every visit.")
    warm_start: bool = Field(default=False, description="Start the vectors of nodes present in the current "
                                                        "version from it (new nodes start random).")
    memmap: bool = Field(default=False, description="Back the weight matrices by np.memmap files in the work "
                                                    "folder, for graphs whose matrices do not fit in memory.")

    @field_validator("threads")
    @classmethod
    def _threads_within_the_pool(cls, threads):
        if threads is not None and threads > _b.max_threads():
            raise ValueError(f"at most {_b.max_threads()} threads here (numba's thread pool, NUMBA_NUM_THREADS), "
                             f"got {threads}")
        return threads

    @model_validator(mode="after")
    def _negatives_only_with_negative_sampling(self):
        if self.objective == "hierarchical_softmax" and "negatives" in self.model_fields_set:
            raise CrossKeyError("[train] negatives applies to objective = \"negative_sampling\" only, but "
                                "[train] objective is \"hierarchical_softmax\"; remove one of them",
                                ("train", "negatives"), ("train", "objective"))
        return self


class StoreSection(_Section):
    path: str = Field(description="Folder of the versioned embedding store (relative to the config file); a local "
                                  "folder, not an object-store URL.")
    keep: int = Field(default=14, ge=1, description="Complete versions kept (plus the current and pinned ones).")
    align: bool = Field(default=True, description="Rotate each new version onto the current one (Procrustes).")
    keep_work_days: float = Field(default=7.0, ge=0, description="Days the stage folders of runs that did not "
                                  "finish are kept for a resume; each finished run removes older ones.")
    neighbours: int | None = Field(default=None, ge=_b.NEIGHBOURS_MIN, description="Publish every node's this "
                                   "many nearest neighbours (neighbours.parquet, the view `neighbours`) and their "
                                   "index, which `graphkit similar` then answers from (none: neither).")

    @field_validator("path")
    @classmethod
    def _a_local_folder(cls, value):
        if is_url(value):
            raise ValueError(f"the store is a local folder (its catalog and versions are renamed into place, "
                             f"which object stores cannot do atomically), got the URL {value!r}; object-store URLs "
                             "are for the input tables")
        return value


class EvaluateSection(_Section):
    link_holdout: float = Field(default=0.1, ge=0, lt=0.9, description="Share of edges held out for link "
                                                                     "prediction before walking (0: no holdout).")
    max_holdout_edges: int | None = Field(default=20_000, ge=1, description="Hold out at most this many edges "
                                          "(none: no cap); the standard error of the link AUC depends on the count, "
                                          "not on the share (docs/evaluation.md).")
    publish_holdout_model: bool = Field(default=True, description="Publish the vectors trained without the "
                                        "held-out edges (one walk and training pass); false trains a second model "
                                        "on the full graph to publish, doubling the walks and training.")
    labels: str | None = Field(default=None, description="Parquet table of node labels (several per node allowed): "
                                                          "file, folder, glob or object-store URL.")
    label_id_column: str = Field(default="node_id", description="Column of the labels table holding the node id.")
    label_column: str = Field(default="label", description="Column of the labels table holding the label.")
    label_kind: str | None = Field(default=None, description="Node kind the labelled ids belong to.")
    ratios: list[float] = Field(default=[0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9],
                                description="Training shares of the labelled nodes.")
    repeats: int = Field(default=3, ge=1, description="Random splits per training share.")
    max_labelled_nodes: int = Field(default=20_000, ge=2, description="Labelled nodes sampled for the evaluation.")
    drift_sample: int = Field(default=2000, ge=10, description="Query nodes for the neighbour-overlap drift.")
    seed: int = Field(default=0, ge=0, le=_b.SEED_MAX, description="Seed of the holdout and of the evaluation "
                                                                   "splits.")

    @field_validator("ratios")
    @classmethod
    def _shares_between_0_and_1(cls, ratios):
        if not ratios:
            raise ValueError("give at least one training share")
        bad = [r for r in ratios if not 0 < r < 1]
        if bad:
            raise ValueError(f"training shares must be between 0 and 1 (exclusive), got {bad[0]}")
        return ratios

    @model_validator(mode="after")
    def _options_need_their_table(self):
        # the default (true) is fine without a holdout; only an explicit setting that cannot take effect is refused
        if self.publish_holdout_model and self.link_holdout == 0 and "publish_holdout_model" in self.model_fields_set:
            raise CrossKeyError("[evaluate] publish_holdout_model = true needs held-out edges, but [evaluate] "
                                "link_holdout = 0", ("evaluate", "publish_holdout_model"),
                                ("evaluate", "link_holdout"))
        if self.labels is None and self.label_kind is not None:
            raise CrossKeyError("[evaluate] label_kind is set but there is no [evaluate] labels table",
                                ("evaluate", "label_kind"), ("evaluate", "labels"))
        return self


class GatesSection(_Section):
    """Quality gates: a run that fails one is recorded as failed and the current version stays current."""

    min_link_auc: float | None = Field(default=None, ge=0, le=1, description="Least link ROC-AUC (cosine).")
    min_micro_f1: float | None = Field(default=None, ge=0, le=1, description="Least Micro-F1 at 10% labels.")
    min_macro_f1: float | None = Field(default=None, ge=0, le=1, description="Least Macro-F1 at 10% labels.")
    max_neighbour_drift: float | None = Field(default=None, ge=0, le=1,
                                              description="Largest 1 - mean 10-NN overlap with the current version.")
    max_align_residual: float | None = Field(default=None, ge=0,
                                             description="Largest Procrustes residual against the current version.")


class DaskSection(_Section):
    address: str | None = Field(default=None, description="Scheduler address of an existing Dask cluster.")
    workers: int | None = Field(default=None, ge=1, description="Threads of the local cluster (default: cores).")

    @model_validator(mode="after")
    def _workers_only_for_the_local_cluster(self):
        if self.address is not None and self.workers is not None:
            raise CrossKeyError("[dask] workers sizes the local cluster and cannot be combined with [dask] address "
                                "(the cluster there is sized by whoever started it); remove one of them",
                                ("dask", "workers"), ("dask", "address"))
        return self


class BudgetSection(_Section):
    minutes: float | None = Field(default=None, gt=0, le=10_080, description="Size the run to finish within this "
                                  "many minutes of wall time from its start: walks.per_node and train.epochs become "
                                  "upper bounds and the run picks what fits (docs/budget.md).")


class RefreshConfig(_Section):
    """The whole resolved configuration; ``base_dir`` is the folder relative paths are resolved against."""

    input: InputSection
    walks: WalksSection = WalksSection()
    train: TrainSection = TrainSection()
    store: StoreSection
    dask: DaskSection = DaskSection()
    evaluate: EvaluateSection = EvaluateSection()
    gates: GatesSection = GatesSection()
    budget: BudgetSection = BudgetSection()
    base_dir: str = "."
    source_file: str = "<config>"

    @model_validator(mode="after")
    def _gates_need_their_measure(self):
        g, ev = self.gates, self.evaluate
        if g.min_link_auc is not None and ev.link_holdout == 0:
            raise CrossKeyError("[gates] min_link_auc needs held-out edges to measure the link AUC, but [evaluate] "
                                "link_holdout = 0", ("gates", "min_link_auc"), ("evaluate", "link_holdout"))
        for key in ("min_micro_f1", "min_macro_f1"):
            if getattr(g, key) is not None and ev.labels is None:
                raise CrossKeyError(f"[gates] {key} needs node labels, but there is no [evaluate] labels table",
                                    ("gates", key), ("evaluate", "labels"))
        if g.max_align_residual is not None and not self.store.align:
            raise CrossKeyError("[gates] max_align_residual needs the alignment, but [store] align = false",
                                ("gates", "max_align_residual"), ("store", "align"))
        return self

    @property
    def edges_path(self) -> str:
        """The first table's path resolved against the config file's folder (globs kept)."""
        return self.tables()[0].path

    def tables(self) -> list[TableSection]:
        """Every edge table with its path resolved against the config file's folder and its text-file options
        filled from ``[input]`` where the entry gives none."""
        inp = self.input
        return [t.model_copy(update={
            "path": _resolve(self.base_dir, t.path),
            "csv_header": inp.csv_header if t.csv_header is None else t.csv_header,
            "csv_delimiter": inp.csv_delimiter if t.csv_delimiter is None else t.csv_delimiter})
            for t in inp.table_specs()]

    @property
    def store_path(self) -> Path:
        return Path(_resolve(self.base_dir, self.store.path))

    @property
    def labels_path(self) -> str | None:
        return None if self.evaluate.labels is None else _resolve(self.base_dir, self.evaluate.labels)

    def to_public_dict(self) -> dict[str, Any]:
        """The resolved parameters as recorded with each version (absolute paths)."""
        d = self.model_dump(exclude={"base_dir", "source_file"})
        d["input"]["tables"] = [t.model_dump() for t in self.tables()]
        for key in ("edges", "source", "target", "weight", "timestamp"):
            d["input"].pop(key, None)
        d["store"]["path"] = str(self.store_path)
        d["evaluate"]["labels"] = self.labels_path
        return d


def _resolve(base: str, p: str) -> str:
    if is_url(p):  # an object-store URL is absolute already
        return p
    if p[:7].lower() == "file://":
        return str(location(p))
    path = Path(p).expanduser()
    return str(path if path.is_absolute() else (Path(base) / path).resolve())


_SECTIONS = {name: f.annotation for name, f in RefreshConfig.model_fields.items()
             if name not in ("base_dir", "source_file")}


def _suggest(word: str, options) -> str:
    close = difflib.get_close_matches(word, list(options), n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _parse_value(text: str) -> Any:
    """A ``--set`` value as a TOML value (``32``, ``true``, ``"x"``); bare words stay strings, and the bare word
    ``none`` clears an optional key (TOML itself has no null)."""
    if text.lower() == "none":
        return None
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def apply_overrides(data: dict, overrides: list[str] | tuple[str, ...], *, where: str = "--set") -> dict:
    """Apply ``section.key=value`` strings to a raw config mapping (in a copy)."""
    data = {k: (dict(v) if isinstance(v, dict) else v) for k, v in data.items()}
    for item in overrides or ():
        if "=" not in item or "." not in item.split("=", 1)[0]:
            raise ConfigError(f"{where}: expected section.key=value, got {item!r}")
        dotted, value = item.split("=", 1)
        section, key = (part.strip() for part in dotted.strip().split(".", 1))
        if section not in _SECTIONS:
            raise ConfigError(f"{where} {dotted.strip()}: unknown section [{section}]{_suggest(section, _SECTIONS)}")
        allowed = _SECTIONS[section].model_fields
        if key not in allowed:
            raise ConfigError(f"{where} {dotted.strip()}: unknown key [{section}] {key}{_suggest(key, allowed)}")
        data.setdefault(section, {})[key] = _parse_value(value.strip())
    return data


def _check_keys(data: dict, where: str) -> None:
    for section, body in data.items():
        if section not in _SECTIONS:
            raise ConfigError(f"{where}: unknown section [{section}]{_suggest(section, _SECTIONS)}")
        if not isinstance(body, dict):
            raise ConfigError(f"{where}: [{section}] must be a table of keys, got {body!r}")
        allowed = _SECTIONS[section].model_fields
        for key in body:
            if key not in allowed:
                raise ConfigError(f"{where}: unknown key [{section}] {key}{_suggest(key, allowed)}")


def _format_error(exc: ValidationError, where: str, overridden=frozenset()) -> str:
    """One line naming the key; it never fails itself (a bad value's repr included)."""
    try:
        return _format_first_error(exc, where, overridden)
    except Exception:  # noqa: BLE001 - an error message must not raise a second error
        try:
            first = str(exc).splitlines()
            return f"{where}: invalid configuration ({first[1].strip() if len(first) > 1 else first[0]})"
        except Exception:  # noqa: BLE001
            return f"{where}: invalid configuration"


def _repr(value, limit: int = 200) -> str:
    try:
        text = repr(value)
    except Exception:  # noqa: BLE001
        text = f"<{type(value).__name__}>"
    text = " ".join(text.split())
    return text if len(text) <= limit else text[:limit] + "..."


def _format_first_error(exc: ValidationError, where: str, overridden) -> str:
    err = exc.errors()[0]
    cross = (err.get("ctx") or {}).get("error")
    if isinstance(cross, CrossKeyError):  # a rule between keys: blame --set when one of them came from there
        from_set = [k for k in cross.keys if k in overridden]
        if from_set:
            where = f"--set {from_set[0][0]}.{from_set[0][1]}"
        return f"{where}: {cross}"
    loc = [str(p) for p in err["loc"]]
    if len(loc) > 2 and loc[1] != "tables":  # a member of a union type (since.date, since.datetime): the key
        loc = loc[:2]
    if tuple(loc[:2]) in overridden:  # the value came from the command line, not the file
        where = f"--set {loc[0]}.{loc[1]}"
    if len(loc) >= 2:
        name = f"[{loc[0]}] {'.'.join(loc[1:])}"
    elif loc:
        name = f"[{loc[0]}]"
    else:
        name = "config"
    msg = err["msg"]
    if len(loc) >= 3 and loc[1] == "tables" and loc[2].isdigit():
        name = f"[[input.tables]] entry {int(loc[2]) + 1}" + (f" key {'.'.join(loc[3:])}" if loc[3:] else "")
    if err["type"] == "missing":
        return f"{where}: missing required key {name}"
    if err["type"] == "extra_forbidden":
        return f"{where}: unknown key {name}"
    if err["type"] == "value_error":
        return f"{where}: {name}: {' '.join(msg.removeprefix('Value error, ').split())}"
    return f"{where}: {name}: {msg[0].lower() + msg[1:]}, got {_repr(err.get('input'))}"


def config_from_dict(data: dict, *, base_dir: str = ".", where: str = "<config>",
                     overridden=frozenset()) -> RefreshConfig:
    """Validate a raw mapping (as read from TOML) into a :class:`RefreshConfig`; errors about the
    ``(section, key)`` pairs in ``overridden`` name ``--set`` instead of ``where``."""
    _check_keys(data, where)
    try:
        return RefreshConfig.model_validate({**data, "base_dir": str(base_dir), "source_file": where})
    except ValidationError as exc:
        raise ConfigError(_format_error(exc, where, overridden)) from None


def load_config(path, overrides=()) -> RefreshConfig:
    """Read, override and validate a TOML refresh configuration.

    Parameters
    ----------
    path : str or Path
        The TOML file; relative paths inside it are resolved against its folder.
    overrides : sequence of str
        ``section.key=value`` items applied after reading (values parsed as TOML, bare words as strings).

    Raises
    ------
    ConfigError
        Missing or unreadable file, TOML syntax error, unknown key, wrong type or impossible value.
    """
    path = Path(path)
    where = str(path)
    try:
        text = path.read_text()
    except FileNotFoundError:
        raise ConfigError(f"{where}: config file not found") from None
    except OSError as exc:
        raise ConfigError(f"{where}: cannot read config file ({exc.strerror})") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{where}: not valid TOML ({exc})") from None
    _check_keys(data, where)  # the file's own keys first, so that a typo is blamed on the right place
    data = apply_overrides(data, overrides)
    overridden = frozenset(tuple(part.strip() for part in item.split("=", 1)[0].split(".", 1))
                           for item in overrides or ())
    return config_from_dict(data, base_dir=str(path.resolve().parent), where=where, overridden=overridden)
