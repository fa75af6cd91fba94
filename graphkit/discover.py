"""Input discovery: which files an edge table's path names, their format, columns and hive partitions.

A path is one file, a folder (read recursively) or a glob (a matched folder is read like a folder). Inside a
folder, files and folders whose name starts with ``.`` or ``_`` are skipped (``_SUCCESS``, ``_delta_log/``,
``.part-0.crc``, aside files). A file's format follows its name: ``.parquet``; ``.csv`` and ``.tsv``, each also
compressed (``.gz``, ``.bz2``, ``.lz4``, ``.zst``, ``.zstd``); any other name is read as Parquet (Hive writes
Parquet files named ``000000_0``), so a stray file is an error naming it, never silently left out. One table has
one format: a folder that mixes them is an error naming the folder.

Folders named ``key=value`` between the table's folder (or a glob's fixed part) and a file are hive partitions,
and so are those the path itself ends in (``edges/day=2026-11-30/``, ``edges/day=2026-11-30/*.parquet`` and a
file in that folder keep their ``day``): they become columns of every row below them, typed from all their values (integers as int64, ``YYYY-MM-DD`` dates
as date32, else strings; ``__HIVE_DEFAULT_PARTITION__`` is null), and go through the same column and type checks
as the files' own columns.

The same rules hold on object stores: a path may be a URL (``s3://bucket/edges/``, ``gs://...``, ``az://...``)
naming one object, a prefix (read like a folder) or a glob, listed and read through :mod:`graphkit.storage` (fsspec
behind Arrow), and every message names the URL.

DuckDB reads exactly the files listed here. Text files go to it as the :mod:`pyarrow.dataset` of
:meth:`Discovery.dataset`, parsed by Arrow with :class:`CsvOptions` (header row or not, delimiter), so that the
checks and the ingest see the same columns and types; Parquet files go to DuckDB's own reader (faster, and within
its memory limit), with the partition values typed here joined by file (:meth:`Discovery.partition_table`);
objects, whatever their format, go to it as the Arrow dataset (DuckDB's own object-store reader is not used). A discovery is done once per process and input: called again while the listing,
sizes and modification times are unchanged, :func:`discover` returns it without reading a file.
"""

from __future__ import annotations

import re
import urllib.parse
from dataclasses import dataclass, field
from pathlib import PurePath

import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.dataset as ds
import pyarrow.fs as pfs
import pyarrow.parquet as pq

from . import storage
from .errors import EdgeTableError

__all__ = ["CsvOptions", "Discovery", "discover", "edge_file_format", "list_edge_files", "headerless_name",
           "TEXT_SUFFIXES", "COMPRESSED_SUFFIXES"]

#: Endings of text edge files, with the delimiter they have by default.
TEXT_SUFFIXES = {".csv": ",", ".tsv": "\t"}
#: Compression endings a text edge file may carry after ``.csv``/``.tsv`` (decompressed while reading).
COMPRESSED_SUFFIXES = (".gz", ".bz2", ".lz4", ".zst", ".zstd")
#: The partition value Hive writes for a null.
HIVE_NULL = "__HIVE_DEFAULT_PARTITION__"

_GLOB_CHARS = set("*?[")
_HIVE_SEGMENT = re.compile(r"^([A-Za-z_][A-Za-z0-9_]*)=(.*)$")
_INTEGER = re.compile(r"^[+-]?[0-9]{1,18}$")
_DATE = re.compile(r"^[0-9]{4}-[0-9]{2}-[0-9]{2}$")
_ARROW_ROW = re.compile(r"Row #(\d+): Expected (\d+) columns, got (\d+)")
_ARROW_CONVERSION = re.compile(r"In CSV column #(\d+): Row #(\d+): CSV conversion error to ([^:]+): invalid value "
                               r"'(.*)'")


def headerless_name(position: int) -> str:
    """The name of column ``position`` (1-based) of a CSV file without a header row: ``column_1``, ``column_2``..."""
    return f"column_{position}"


@dataclass(frozen=True)
class CsvOptions:
    """How text edge files are parsed.

    header : bool
        The first line names the columns (default). Without it, columns are named by position,
        ``column_1``, ``column_2``, ... (:func:`headerless_name`).
    delimiter : str or None
        One character; None: ``,`` for ``.csv`` files and a tab for ``.tsv`` files.
    """

    header: bool = True
    delimiter: str | None = None


def edge_file_format(path: PurePath) -> str:
    """``"parquet"``, ``"csv"`` or ``"tsv"`` from a file's name (compression endings looked through)."""
    name = path.name.lower()
    for comp in COMPRESSED_SUFFIXES:
        if name.endswith(comp):
            name = name[: -len(comp)]
            break
    for suffix in TEXT_SUFFIXES:
        if name.endswith(suffix):
            return suffix[1:]
    return "parquet"


def _skipped(relative: PurePath) -> bool:
    return any(part.startswith((".", "_")) for part in relative.parts)


def _folder_files(folder: PurePath) -> list[storage.Entry]:
    return [e for e in storage.files_for(folder).walk(folder) if not _skipped(e.path.relative_to(folder))]


def _glob_root(pattern: PurePath) -> PurePath:
    """The folder a glob's fixed leading part names (where its partition folders start)."""
    fixed = []
    for part in pattern.parts:
        if any(c in part for c in _GLOB_CHARS):
            break
        fixed.append(part)
    return type(pattern)(*fixed) if fixed else type(pattern)(".")


def _above_partitions(folder: PurePath) -> PurePath:
    """``folder`` without its trailing ``key=value`` folders: a path inside a partition keeps that column."""
    while _HIVE_SEGMENT.match(folder.name) and folder != folder.parent:
        folder = folder.parent
    return folder


def list_edge_files(path: str) -> tuple[list[PurePath], PurePath]:
    """The files an edge table's ``path`` names, sorted, and the folder their partition folders start from
    (:class:`pathlib.Path` objects, or :class:`graphkit.storage.ObjectPath` ones for a URL).

    Raises
    ------
    EdgeTableError
        Naming the path: not found, no match, or a folder (prefix) without a single edge file; for a URL also a
        missing bucket, refused credentials or a protocol whose package is not installed.
    """
    entries, root = _list(path)
    return [e.path for e in entries], root


def _list(path: str) -> tuple[list[storage.Entry], PurePath]:
    """:func:`list_edge_files` with each file's listing entry (size, modification time, entity tag)."""
    p = storage.location(path)
    files = storage.files_for(p)
    remote = storage.is_remote(p)
    if any(c in str(p) for c in _GLOB_CHARS):
        root = _above_partitions(_glob_root(p))
        found = {}
        for m, entry in files.glob(p):
            if entry is None:  # a matched folder is read like a folder
                found.update((e.path, e) for e in _folder_files(m))
            else:
                found[m] = entry
        entries = sorted((e for f, e in found.items() if not _skipped(f.relative_to(root) if f.is_relative_to(root)
                                                                       else type(f)(f.name))),
                         key=lambda e: e.path)
        if not entries:
            raise EdgeTableError(f"{path}: no {'objects' if remote else 'files'} match this pattern")
        return entries, root
    kind = files.kind(p)
    if kind == "directory":
        entries = sorted(_folder_files(p), key=lambda e: e.path)
        if not entries:
            where = "prefix holds no edge files (objects" if remote else "folder holds no edge files (files"
            raise EdgeTableError(f"{path}: {where} and folders starting with . or _ are skipped)")
        return entries, _above_partitions(p)
    if kind is None:
        raise EdgeTableError(files.missing(p) if remote else f"{path}: file not found")
    return (files.stat([p]) if remote else [storage.Entry(p, 0, None)]), _above_partitions(p.parent)


def _partition_values(files: list[PurePath], root: PurePath) -> list[dict[str, str | None]]:
    out = []
    for f in files:
        rel = f.relative_to(root).parts[:-1] if f.is_relative_to(root) else ()
        values = {}
        for part in rel:
            m = _HIVE_SEGMENT.match(part)
            if m:
                value = urllib.parse.unquote(m.group(2))
                values[m.group(1)] = None if value == HIVE_NULL else value
        out.append(values)
    return out


def _partition_type(values: list[str]) -> pa.DataType:
    """int64 when every value is an integer, date32 when every one is a ``YYYY-MM-DD`` date, else string."""
    if values and all(_INTEGER.match(v) for v in values):
        return pa.int64()
    if values and all(_DATE.match(v) for v in values):
        try:
            pa.array(values).cast(pa.date32())
            return pa.date32()
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            pass
    return pa.string()


class _ZstdReading(pfs.FileSystemHandler):
    """A file system (local, or an object store's), but ``*.zst`` files open decompressed: Arrow's dataset reader
    recognises the ``.zstd`` ending only and would read a ``.zst`` file's compressed bytes as text. (Its CSV reader
    reads a file front to back, so a decompressing stream behind a file handle serves it.)"""

    def __init__(self, fs: pfs.FileSystem):
        self.fs = fs

    def get_type_name(self):
        return self.fs.type_name + "+zst"

    def normalize_path(self, path):
        return self.fs.normalize_path(path)

    def get_file_info(self, paths):
        return self.fs.get_file_info(paths)

    def get_file_info_selector(self, selector):
        return self.fs.get_file_info(selector)

    def open_input_stream(self, path):
        if path.lower().endswith(".zst"):
            return self.fs.open_input_stream(path, compression="zstd")
        return self.fs.open_input_stream(path, compression=None)  # Arrow decompresses the endings it knows

    def open_input_file(self, path):
        if path.lower().endswith(".zst"):
            return pa.PythonFile(self.open_input_stream(path), mode="r")
        return self.fs.open_input_file(path)

    def _read_only(self, *_a, **_k):  # pragma: no cover - discovery never writes
        raise OSError("input discovery does not write")

    create_dir = delete_dir = delete_dir_contents = delete_root_dir_contents = delete_file = move = copy_file = \
        open_output_stream = open_append_stream = _read_only


def _filesystem(files: list[PurePath], text: bool) -> pfs.FileSystem:
    """The file system Arrow opens the files through (the local one or the object store's, see
    :mod:`graphkit.storage`), or its ``.zst``-reading wrapper."""
    fs = storage.files_for(files[0]).arrow
    if text and any(f.name.lower().endswith(".zst") for f in files):
        return pfs.PyFileSystem(_ZstdReading(fs))
    return fs


@dataclass
class Discovery:
    """What :func:`discover` found for one edge table (see the module docstring).

    ``files`` are sorted (:class:`pathlib.Path`, or :class:`graphkit.storage.ObjectPath` for a URL);
    ``columns[i]`` maps each column of ``files[i]`` (its own and its partition columns) to its Arrow type;
    ``partitions`` the partition columns and their inferred types; ``n_rows`` the rows (from the Parquet footers;
    None for text files).
    """

    path: str
    files: list[PurePath]
    root: PurePath
    format: str
    csv: CsvOptions
    columns: list[dict[str, pa.DataType]]
    partitions: dict[str, pa.DataType]
    n_rows: int | None
    width: int | None = None
    stamp: tuple = field(repr=False, default=())

    @property
    def is_text(self) -> bool:
        return self.format != "parquet"

    @property
    def is_remote(self) -> bool:
        """The files are objects on a store (read through Arrow, never by DuckDB's own readers)."""
        return storage.is_remote(self.root)

    def file_format(self) -> ds.FileFormat:
        """The Arrow file format the files are read with (text: the options, names by position without a
        header)."""
        if not self.is_text:
            return ds.ParquetFileFormat()
        return _csv_format(self.format, self.csv, self.width)

    def filesystem(self) -> pfs.FileSystem:
        return _filesystem(self.files, self.is_text)

    def dataset(self, types: dict[str, pa.DataType], files: list[PurePath] | None = None) -> ds.Dataset:
        """The files (or some of them) as one Arrow dataset holding the columns ``types`` names, with those types
        (file columns are cast to them, partition columns parsed from the folder names)."""
        schema = pa.schema(list(types.items()))
        partitioning = None
        if self.partitions:
            partitioning = ds.partitioning(pa.schema([(k, t) for k, t in self.partitions.items()]), flavor="hive")
        return ds.dataset([storage.arrow_name(f) for f in (self.files if files is None else files)], schema=schema,
                          format=self.file_format(), filesystem=self.filesystem(), partitioning=partitioning,
                          partition_base_dir=storage.arrow_name(self.root))

    def partition_table(self, files: list[str]) -> pa.Table:
        """Each file's partition values, typed: column ``__graphkit_file`` (the names in ``files``, in the order of
        :attr:`files`) and one column per partition key (null where a file's folders do not name it)."""
        values = _partition_values(self.files, self.root)
        cols = {"__graphkit_file": pa.array(files, pa.string())}
        for k, t in self.partitions.items():
            cols[k] = pa.array([v.get(k) for v in values], pa.string()).cast(t)
        return pa.table(cols)

    def locate_error(self, types: dict[str, pa.DataType]) -> str | None:
        """After a scan of text files failed: the message naming the first file that fails alone (and its line,
        for a row with the wrong number of fields), or None when every file reads. Reads the files again, so it
        is only for the error path."""
        if not self.is_text and not self.is_remote:
            return None
        for f in self.files:
            try:
                for _ in self.dataset(types, [f]).to_batches():
                    pass
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError, OSError, UnicodeDecodeError) as exc:
                return (storage.access_error(f, exc)
                        or _row_width_error(f, exc, self.csv, self.files[0])
                        or _conversion_error(f, exc, list(self.columns[self.files.index(f)]))
                        or f"{f}: cannot read it ({_first_line(exc)})")
        return None


def _csv_format(fmt: str, options: CsvOptions, width: int | None) -> ds.CsvFileFormat:
    delimiter = options.delimiter or TEXT_SUFFIXES["." + fmt]
    if options.header:
        read = pcsv.ReadOptions()
    elif width is None:
        read = pcsv.ReadOptions(autogenerate_column_names=True)
    else:
        read = pcsv.ReadOptions(column_names=[headerless_name(i + 1) for i in range(width)])
    # only an empty field is null (as in DuckDB's reader): NA, NULL or nan stay a string id or a NaN weight
    convert = pcsv.ConvertOptions(null_values=[""], strings_can_be_null=True, quoted_strings_can_be_null=False)
    # a quoted field may hold a line break (a device name, a note); Arrow then splits blocks at row ends only
    parse = pcsv.ParseOptions(delimiter=delimiter, newlines_in_values=True)
    return ds.CsvFileFormat(parse_options=parse, read_options=read, convert_options=convert)


def _first_line(exc) -> str:
    try:
        text = str(exc).strip()
    except Exception:  # noqa: BLE001 - building an error message must not fail
        text = ""
    return text.splitlines()[0] if text else type(exc).__name__


def _row_width_error(file: PurePath, exc, options: CsvOptions, first_file: PurePath | None = None) -> str | None:
    """The one-line message for a text file whose rows do not have the header's number of fields (without a header:
    line 1 of ``first_file``, the table's first file), or None when ``exc`` is about something else."""
    m = _ARROW_ROW.search(str(exc))
    if not m:
        return None
    line, expected, got = (int(x) for x in m.groups())
    if options.header:
        first = "the header row (line 1)"
        hint = "; fix the header or set [input] csv_header = false if the file has none"
    else:
        first = "line 1" if first_file is None or first_file == file else f"line 1 of {first_file}"
        hint = "; every line of a table without a header row needs the same number of fields"
    return (f"{file}: line {line} has {got} fields but {first} has {expected} (delimiter "
            f"{options.delimiter or 'by the file ending'!r}){hint}")


def _conversion_error(file: PurePath, exc, names: list[str]) -> str | None:
    """The one-line message for a text value that does not parse as its column's type, or None."""
    m = _ARROW_CONVERSION.search(str(exc))
    if not m:
        return None
    index, line, to, value = int(m.group(1)), int(m.group(2)), m.group(3), m.group(4)
    name = repr(names[index]) if index < len(names) else f"#{index + 1}"
    return (f"{file}: line {line}, column {name}: {value[:80]!r} is not {to} like the column's values in the first "
            "MiB of the file, from which its type is taken")


def _file_schema(f: PurePath, fmt: str, csv: CsvOptions, fs, width: int | None,
                 first_file: PurePath | None = None) -> tuple[pa.Schema, int | None]:
    """One file's own columns (a Parquet footer; a text file's first block) and its row count (Parquet only)."""
    if fmt == "parquet":
        try:
            meta = pq.read_metadata(storage.arrow_name(f), filesystem=fs)
            return meta.schema.to_arrow_schema(), meta.num_rows
        except (pa.ArrowInvalid, OSError) as exc:
            raise EdgeTableError(storage.access_error(f, exc) or
                                 f"{f}: not a readable Parquet file ({_first_line(exc)}; files not ending in "
                                 ".csv or .tsv are read as Parquet)") from None
    fragment = _csv_format(fmt, csv, width).make_fragment(storage.arrow_name(f), filesystem=fs)
    try:
        return fragment.physical_schema, None
    except (pa.ArrowInvalid, OSError, UnicodeDecodeError) as exc:
        message = storage.access_error(f, exc) or _row_width_error(f, exc, csv, first_file)
        if message:
            raise EdgeTableError(message) from None
        raise EdgeTableError(f"{f}: not a readable {fmt.upper()} file ({_first_line(exc)})") from None


def _stamp(entries: list[storage.Entry]) -> tuple:
    """What a discovery depends on: each file's path, size and modification time (objects: and entity tag, from
    the listing just made; local files: from a fresh ``stat``)."""
    if entries and storage.is_remote(entries[0].path):
        return tuple((str(e.path), e.size, e.mtime_ns, e.etag) for e in entries)
    return tuple((str(e.path), e.size, e.mtime_ns) for e in storage.stat_files([e.path for e in entries]))


#: Discoveries made in this process, by (path, CSV options); reused while the files' listing and stats hold.
_DISCOVERED: dict[tuple, Discovery] = {}


def discover(path: str, csv: CsvOptions = CsvOptions()) -> Discovery:
    """List an edge table's files, tell their format and read every file's columns (footers, first blocks).

    Parameters
    ----------
    path : str
        A file, folder or glob, or a URL naming an object, a prefix or a glob (see the module docstring).
    csv : CsvOptions
        How text files are parsed.

    Returns
    -------
    Discovery

    Raises
    ------
    EdgeTableError
        Naming the path, folder or file: nothing found, formats mixed in one table, an unreadable file, a text
        line with more or fewer fields than the header row, a column both in a file and a partition folder; for a
        URL also a missing bucket or object, refused credentials, a protocol whose package is missing.
    """
    entries, root = _list(path)
    files = [e.path for e in entries]
    key = (path, csv)
    stamp = _stamp(entries)
    known = _DISCOVERED.get(key)
    if known is not None and known.stamp == stamp:
        return known
    formats = {}
    for f in files:
        formats.setdefault(edge_file_format(f), []).append(f)
    if len(formats) > 1:
        counts = ", ".join(f"{len(fs)} {fmt}" for fmt, fs in sorted(formats.items()))
        examples = " and ".join(str(fs[0]) for _, fs in sorted(formats.items())[:2])
        raise EdgeTableError(f"{path}: mixes edge file formats ({counts} files, e.g. {examples}); one table reads "
                             "one format (a glob such as **/*.parquet picks one)")
    fmt = next(iter(formats))
    text = fmt != "parquet"
    fs = _filesystem(files, text)
    part_values = _partition_values(files, root)
    keys = sorted({k for v in part_values for k in v})
    partitions = {k: _partition_type([v[k] for v in part_values if v.get(k) is not None]) for k in keys}
    width = None
    if text and not csv.header:  # names by position: the first file's first line gives the width
        schema, _ = _file_schema(files[0], fmt, csv, fs, None)
        width = len(schema)
    columns, n_rows = [], 0
    for f in files:
        schema, rows = _file_schema(f, fmt, csv, fs, width, files[0])
        cols = {name: schema.field(name).type for name in schema.names}
        for k, t in partitions.items():
            if k in cols:
                raise EdgeTableError(f"{f}: column {k!r} is both in the file and a partition folder ({k}=...); "
                                     "rename one of them")
            cols[k] = t
        columns.append(cols)
        n_rows = None if rows is None or n_rows is None else n_rows + rows
    found = Discovery(path=path, files=files, root=root, format=fmt, csv=csv, columns=columns,
                      partitions=partitions, n_rows=n_rows, width=width, stamp=stamp)
    _DISCOVERED[key] = found
    return found
