"""Where input tables are read from: local paths and object stores, behind one set of calls.

An ``[input]`` or ``[evaluate] labels`` path is a local path or a URL whose scheme names an fsspec protocol
(``s3://bucket/prefix/``, ``gs://bucket/...``, ``az://container/...``; ``file://`` is local). :func:`location`
turns it into a path object: a :class:`pathlib.Path` for local files, an :class:`ObjectPath` for objects (a pure
POSIX path over ``bucket/key`` whose ``str`` is the URL, so that every message built with it names the URL).
:func:`files_for` gives the file system a path lives on, with the calls discovery needs: the kind of a path
(:meth:`LocalFiles.kind`), every file below a folder or prefix (``walk``), glob matches (``glob``), each file's
size, modification time and, for objects, entity tag (``stat``), and the :mod:`pyarrow.fs` file system that Arrow
reads the files through (``arrow``; objects go through fsspec as ``PyFileSystem(FSSpecHandler)``).

Credentials and endpoints come only from each store's own environment and configuration files, read by its fsspec
package (s3fs: ``AWS_ACCESS_KEY_ID``/``AWS_SECRET_ACCESS_KEY``/``AWS_SESSION_TOKEN``, ``AWS_PROFILE``,
``~/.aws/credentials`` and ``~/.aws/config``, and ``AWS_ENDPOINT_URL`` or ``AWS_ENDPOINT_URL_S3`` for an
S3-compatible server; gcsfs: ``GOOGLE_APPLICATION_CREDENTIALS`` or the application-default credentials; adlfs:
``AZURE_STORAGE_*``), never from graphkit's configuration; a URL carrying ``user:password@`` is refused. Errors
name the URL and never the secret: :func:`redact` replaces the value of every secret-looking environment variable
in a message.
"""

from __future__ import annotations

import glob as _glob
import hashlib
import os
import re
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path, PurePath, PurePosixPath

import pyarrow as pa
import pyarrow.fs as pfs

from .errors import EdgeTableError

__all__ = ["ObjectPath", "Entry", "LocalFiles", "ObjectFiles", "location", "files_for", "is_url", "is_remote",
           "arrow_name", "stat_files", "access_error", "redact", "READ_BLOCK_BYTES"]

_URL = re.compile(r"^([A-Za-z][A-Za-z0-9+.\-]*)://(.*)$", re.S)
#: Bytes fetched per read from an object store: a text file's first block and a Parquet footer cost one request,
#: without fetching tens of MB per file (s3fs's own default block is 50 MB).
READ_BLOCK_BYTES = 8 << 20
#: What each store calls its top-level namespace, for messages.
_BUCKET_WORD = {"az": "container", "abfs": "container", "abfss": "container", "adl": "container"}
#: Where each store's credentials come from (the packages read them; graphkit never does).
_CREDENTIALS_HINT = {
    "s3": "AWS_ACCESS_KEY_ID with AWS_SECRET_ACCESS_KEY and AWS_SESSION_TOKEN, AWS_PROFILE, or ~/.aws/credentials",
    "gs": "GOOGLE_APPLICATION_CREDENTIALS or the application-default credentials",
    "az": "AZURE_STORAGE_ACCOUNT_NAME with AZURE_STORAGE_ACCOUNT_KEY, AZURE_STORAGE_SAS_TOKEN or "
          "AZURE_STORAGE_CONNECTION_STRING",
}
_CREDENTIALS_HINT.update(gcs=_CREDENTIALS_HINT["gs"], abfs=_CREDENTIALS_HINT["az"], abfss=_CREDENTIALS_HINT["az"])
#: Environment variables whose values are secrets (by name), blanked out of every message.
_SECRET_NAME = re.compile(r"SECRET|TOKEN|PASSWORD|PASSWD|CREDENTIAL|CONNECTION_STRING|ACCOUNT_KEY|SAS|PRIVATE|"
                          r"ACCESS_KEY|SALT", re.I)
#: Environment variables that decide who an object store sees: a change opens a new connection.
_ACCESS_ENV = re.compile(r"^(AWS_|GOOGLE_|GCS|CLOUDSDK_|AZURE_|HOME$|FSSPEC_)")


def redact(text: str) -> str:
    """``text`` with the value of every secret-looking environment variable (8 characters or more) replaced by
    ``***``."""
    try:
        for name, value in os.environ.items():
            if len(value) >= 8 and _SECRET_NAME.search(name) and value in text:
                text = text.replace(value, "***")
    except Exception:  # noqa: BLE001 - building an error message must not fail
        pass
    return text


class ObjectPath(PurePosixPath):
    """An object's path ``bucket/key`` (a pure POSIX path: ``name``, ``parts``, ``parent``, ``relative_to`` work
    on it) whose ``str`` is its URL ``PROTOCOL://bucket/key``. Made by :func:`location`; one subclass per
    protocol carries it, so derived paths (``parent``, ``/``) keep it."""

    protocol = ""

    @property
    def key(self) -> str:
        """``bucket/key``: the name the fsspec and Arrow file systems use."""
        return PurePosixPath.__str__(self)

    def __str__(self) -> str:
        return f"{self.protocol}://{self.key}"

    def __repr__(self) -> str:
        return f"ObjectPath({str(self)!r})"

    def __fspath__(self):  # an object is no local file: never let open() or os.stat() take it
        raise TypeError(f"{self} is an object-store URL, not a local path")

    def __reduce__(self):
        return _object_path, (self.protocol, self.key)

    def __eq__(self, other):
        if isinstance(other, ObjectPath):
            return self.protocol == other.protocol and self.key == other.key
        return NotImplemented

    def __hash__(self):
        return hash((self.protocol, self.key))


_PATH_CLASSES: dict[str, type] = {}


def _object_path(protocol: str, key: str) -> ObjectPath:
    cls = _PATH_CLASSES.get(protocol)
    if cls is None:
        cls = _PATH_CLASSES[protocol] = type(f"ObjectPath_{protocol}", (ObjectPath,), {"protocol": protocol})
    return cls(key.strip("/"))


def is_url(text: str) -> bool:
    """True for ``scheme://...`` other than ``file://`` (a path on an object store or another remote system)."""
    m = _URL.match(str(text))
    return bool(m) and m.group(1).lower() != "file"


def is_remote(path) -> bool:
    return isinstance(path, ObjectPath)


def location(text: str) -> PurePath:
    """The path object for a path as written: :class:`pathlib.Path` for local ones (``file://`` stripped),
    :class:`ObjectPath` for URLs.

    Raises
    ------
    EdgeTableError
        For a URL carrying credentials (``user:password@``) or naming no bucket.
    """
    text = str(text)
    m = _URL.match(text)
    if not m:
        return Path(text)
    protocol, rest = m.group(1).lower(), m.group(2)
    if protocol == "file":
        return Path(rest if rest.startswith("/") else "/" + rest)
    netloc = rest.split("/", 1)[0]
    if "@" in netloc and ":" in netloc.split("@", 1)[0]:
        shown = f"{protocol}://***@{rest.split('@', 1)[1]}"
        raise EdgeTableError(f"{shown}: credentials in a URL are refused (the URL is recorded with every "
                             f"version); give them through the store's environment: {_hint(protocol)}")
    if not rest.strip("/"):
        raise EdgeTableError(f"{text}: the URL names no {_bucket_word(protocol)}")
    return _object_path(protocol, rest)


def _bucket_word(protocol: str) -> str:
    return _BUCKET_WORD.get(protocol, "bucket")


def _hint(protocol: str) -> str:
    return _CREDENTIALS_HINT.get(protocol, f"the environment the fsspec package for {protocol}:// reads")


@dataclass(frozen=True)
class Entry:
    """One file as a listing or a stat saw it: its path, size in bytes, modification time (ns since the epoch,
    None when the store gives none) and, for objects, its entity tag (the store's content version)."""

    path: PurePath
    size: int
    mtime_ns: int | None
    etag: str | None = None


# ---------------------------------------------------------------------------------------------------- local files

class LocalFiles:
    """The local file system (the behaviour graphkit always had)."""

    protocol = "file"

    @property
    def arrow(self) -> pfs.FileSystem:
        return pfs.LocalFileSystem()

    def kind(self, path: Path) -> str | None:
        """``"file"``, ``"directory"`` or None (missing)."""
        if path.is_dir():
            return "directory"
        return "file" if path.exists() else None

    def walk(self, folder: Path) -> list[Entry]:
        """Every file below ``folder``, recursively (unsorted)."""
        selector = pfs.FileSelector(str(folder), recursive=True)
        return [Entry(Path(i.path), i.size, i.mtime_ns) for i in self.arrow.get_file_info(selector)
                if i.type == pfs.FileType.File]

    def glob(self, pattern: Path) -> list[tuple[Path, Entry | None]]:
        """The paths matching ``pattern`` (``**`` spans folders): ``(folder, None)`` or ``(file, its entry)``."""
        out = []
        for m in _glob.glob(str(pattern), recursive=True):
            m = Path(m)
            if m.is_dir():
                out.append((m, None))
            elif m.is_file():
                out.append((m, Entry(m, 0, None)))  # a local file's stat is taken when it is needed
        return out

    def stat(self, paths) -> list[Entry]:
        out = []
        for p in paths:
            st = Path(p).stat()
            out.append(Entry(Path(p), st.st_size, st.st_mtime_ns))
        return out


# ---------------------------------------------------------------------------------------------------- object stores

class _ObjectHandler(pfs.FSSpecHandler):
    """fsspec behind Arrow, read-only: files open without a second metadata request and in blocks of
    :data:`READ_BLOCK_BYTES`."""

    def get_type_name(self):
        return "graphkit+" + super().get_type_name()

    def open_input_file(self, path):
        return pa.PythonFile(self.fs.open(path, mode="rb", block_size=READ_BLOCK_BYTES), mode="r")

    def open_input_stream(self, path):
        return self.open_input_file(path)

    def _read_only(self, *_a, **_k):  # pragma: no cover - input tables are never written
        raise OSError("graphkit does not write to the input store")

    create_dir = delete_dir = delete_dir_contents = delete_root_dir_contents = delete_file = move = copy_file = \
        open_output_stream = open_append_stream = _read_only


def _fsspec(protocol: str):
    """A fresh fsspec file system for ``protocol`` (no instance or listing cache: every listing is the store's
    state now), built from the environment alone."""
    import fsspec
    from fsspec.registry import known_implementations

    try:
        cls = fsspec.get_filesystem_class(protocol)
    except ImportError:
        package = known_implementations.get(protocol, {}).get("class", protocol).split(".")[0]
        extra = {"s3fs": " (it comes with graphkit)", "gcsfs": " or pip install 'graphkit[gcs]'",
                 "adlfs": " or pip install 'graphkit[azure]'"}.get(package, "")
        raise _ProtocolError(f"reading {protocol}:// URLs needs the Python package {package}: pip install "
                             f"{package}{extra}") from None
    except ValueError:
        known = ", ".join(f"{p}://" for p in ("s3", "gs", "az", "abfs", "http", "https"))
        raise _ProtocolError(f"unknown storage protocol {protocol!r} (fsspec's protocols include {known})") from None
    return cls(skip_instance_cache=True, use_listings_cache=False)


class _ProtocolError(Exception):
    pass


def _error_code(exc) -> str | None:
    """The store's own error code (``AccessDenied``, ``InvalidAccessKeyId``...) when the exception carries one."""
    for e in (exc, getattr(exc, "__cause__", None), getattr(exc, "__context__", None)):
        response = getattr(e, "response", None)
        if isinstance(response, dict):
            code = (response.get("Error") or {}).get("Code")
            if code:
                return str(code)
    return None


#: Error codes that refuse the caller's identity whatever it asks (S3's; others give a PermissionError alone).
_IDENTITY_REFUSED = {"InvalidAccessKeyId", "SignatureDoesNotMatch", "ExpiredToken", "InvalidToken",
                     "TokenRefreshRequired", "InvalidClientTokenId", "AuthorizationHeaderMalformed"}


def _reason(exc) -> str:
    try:
        text = str(exc).strip()
        text = text.splitlines()[0] if text else type(exc).__name__
    except Exception:  # noqa: BLE001 - building an error message must not fail
        text = type(exc).__name__
    code = _error_code(exc)
    if code and code not in text:
        text = f"{code}: {text}"
    return redact(text)[:300]


def _is_credentials_error(exc) -> bool:
    names = {type(e).__name__ for e in (exc, getattr(exc, "__cause__", None), getattr(exc, "__context__", None))}
    return bool(names & {"NoCredentialsError", "PartialCredentialsError", "CredentialRetrievalError",
                         "DefaultCredentialsError", "ClientAuthenticationError", "RefreshError"})


def access_error(path, exc) -> str | None:
    """The one-line message for an object store refusing or failing a request about ``path`` (credentials
    refused or missing, permission denied, the store unreachable), or None when ``exc`` is none of these or
    ``path`` is local."""
    if not is_remote(path):
        return None
    protocol = path.protocol
    if isinstance(exc, PermissionError) or _is_credentials_error(exc):
        what = "no credentials found" if _is_credentials_error(exc) else "access refused by the store"
        return (f"{path}: {what} ({_reason(exc)}); graphkit uses the credentials of the environment: "
                f"{_hint(protocol)}")
    if isinstance(exc, (OSError, TimeoutError)) or type(exc).__module__.split(".")[0] in (
            "botocore", "aiobotocore", "aiohttp", "google", "azure", "requests", "urllib3"):
        endpoint = ("; an S3-compatible server is named by AWS_ENDPOINT_URL (or AWS_ENDPOINT_URL_S3, or the "
                    "profile's endpoint_url)" if protocol == "s3" else "")
        return f"{path}: cannot read from the object store ({_reason(exc)}){endpoint}"
    return None


class ObjectFiles:
    """One object store protocol through fsspec; every call raises :class:`EdgeTableError` naming the URL when
    the store refuses or fails it."""

    def __init__(self, protocol: str):
        self.protocol = protocol
        self._fs = None

    @property
    def fs(self):
        if self._fs is None:
            self._fs = _fsspec(self.protocol)
        return self._fs

    @property
    def arrow(self) -> pfs.FileSystem:
        return pfs.PyFileSystem(_ObjectHandler(self.fs))

    def _call(self, path: ObjectPath, call):
        try:
            return call()
        except _ProtocolError as exc:
            raise EdgeTableError(f"{path}: {exc}") from None
        except (FileNotFoundError, EdgeTableError):
            raise
        except Exception as exc:  # noqa: BLE001 - every store failure becomes a message naming the URL
            message = access_error(path, self._explained(path, exc))
            if message is None:
                raise
            raise EdgeTableError(message) from None

    def _explained(self, path: ObjectPath, exc):
        """A refused metadata request (a HEAD: status 403 and no reason) asked again as a listing, whose answer
        says why when the identity itself is refused (unknown key, wrong secret, expired token); else ``exc``."""
        if not isinstance(exc, PermissionError) or _error_code(exc) not in (None, "403"):
            return exc
        try:
            self.fs.ls(path.parts[0] if path.parts else path.key, detail=False)
        except PermissionError as again:
            if _error_code(again) in _IDENTITY_REFUSED:
                return again
        except Exception:  # noqa: BLE001 - only for the message; the first refusal stands
            pass
        return exc

    def missing(self, path: ObjectPath) -> str:
        """Why nothing was found at ``path``: a missing bucket, or no object or prefix of that name."""
        bucket = _object_path(self.protocol, path.parts[0]) if path.parts else path
        try:
            self.fs.info(bucket.key)
        except FileNotFoundError:
            return f"{path}: {_bucket_word(self.protocol)} {bucket.key!r} not found"
        except Exception:  # noqa: BLE001 - the bucket check is a courtesy; the path is missing all the same
            pass
        return f"{path}: not found (no object of this name and no objects under it as a prefix)"

    def kind(self, path: ObjectPath) -> str | None:
        def call():
            try:
                info = self.fs.info(path.key)
            except FileNotFoundError:
                return None
            return "directory" if info.get("type") == "directory" else "file"
        return self._call(path, call)

    def walk(self, folder: ObjectPath) -> list[Entry]:
        def call():
            try:
                found = self.fs.find(folder.key, detail=True)
            except FileNotFoundError:
                raise EdgeTableError(self.missing(folder)) from None
            return [self._entry(name, info) for name, info in found.items() if info.get("type") != "directory"]
        return self._call(folder, call)

    def glob(self, pattern: ObjectPath) -> list[tuple[ObjectPath, Entry | None]]:
        def call():
            try:
                found = self.fs.glob(pattern.key, detail=True)
            except FileNotFoundError:
                raise EdgeTableError(self.missing(pattern)) from None
            return [(_object_path(self.protocol, name), None) if info.get("type") == "directory" else
                    (_object_path(self.protocol, name), self._entry(name, info)) for name, info in found.items()]
        return self._call(pattern, call)

    def stat(self, paths) -> list[Entry]:
        """Each object's metadata from the store (never its content): one listing per prefix holding several of
        them, one metadata request for an object alone in its prefix."""
        paths = list(paths)
        by_parent: dict[str, list[ObjectPath]] = {}
        for p in paths:
            by_parent.setdefault(p.parent.key, []).append(p)
        found: dict[str, Entry] = {}
        for parent, members in by_parent.items():
            def call(parent=parent, members=members):
                if len(members) == 1:
                    try:
                        return {members[0].key: self.fs.info(members[0].key)}
                    except FileNotFoundError:
                        return {}
                try:
                    return {i["name"].strip("/"): i for i in self.fs.ls(parent, detail=True)}
                except FileNotFoundError:
                    return {}
            for name, info in self._call(members[0], call).items():
                found[name] = self._entry(name, info)
        out = []
        for p in paths:
            if p.key not in found:
                raise EdgeTableError(f"{p}: object not found (removed while the run read the table?)")
            out.append(found[p.key])
        return out

    def _entry(self, name: str, info: dict) -> Entry:
        return Entry(_object_path(self.protocol, name), int(info.get("size") or 0), _mtime_ns(info), _etag(info))


def _etag(info: dict) -> str | None:
    """The store's version of an object's content: S3's and Azure's ETag, Google's generation or ETag."""
    for key in ("ETag", "etag", "generation", "md5Hash", "crc32c", "VersionId", "version_id"):
        value = info.get(key)
        if value not in (None, ""):
            return str(value).strip('"')
    return None


def _mtime_ns(info: dict) -> int | None:
    for key in ("LastModified", "last_modified", "mtime", "updated", "modified", "time_modified", "timeCreated"):
        value = info.get(key)
        if value in (None, ""):
            continue
        try:
            if isinstance(value, datetime):
                moment = value
            elif isinstance(value, (int, float)):
                return int(round(float(value) * 1e9))
            else:
                moment = datetime.fromisoformat(str(value).replace("Z", "+00:00"))
            if moment.tzinfo is None:
                moment = moment.replace(tzinfo=timezone.utc)
            return int(moment.timestamp()) * 10**9 + moment.microsecond * 1000
        except (ValueError, OverflowError, OSError, TypeError):
            continue
    return None


_STORES: dict[tuple, ObjectFiles] = {}
_LOCAL = LocalFiles()


def _access_key() -> str:
    """A digest of the environment that decides who a store sees (credentials, profile, endpoint, home folder):
    when it changes, the next call opens a new connection with the new identity."""
    items = sorted((k, v) for k, v in os.environ.items() if _ACCESS_ENV.match(k))
    return hashlib.sha256(repr(items).encode()).hexdigest()


def files_for(path) -> LocalFiles | ObjectFiles:
    """The file system ``path`` (from :func:`location`) lives on; one connection per protocol and environment."""
    if not is_remote(path):
        return _LOCAL
    key = (path.protocol, _access_key())
    store = _STORES.get(key)
    if store is None:
        if len(_STORES) > 16:  # the environment changed many times (tests): drop the old connections
            _STORES.clear()
        store = _STORES[key] = ObjectFiles(path.protocol)
    return store


def arrow_name(path) -> str:
    """The name Arrow opens ``path`` by on :attr:`files_for(path).arrow <ObjectFiles.arrow>`: an absolute local
    path, or ``bucket/key``."""
    return path.key if is_remote(path) else str(Path(path).resolve())


def stat_files(paths) -> list[Entry]:
    """The metadata of each file (local: ``stat``; objects: listings, see :meth:`ObjectFiles.stat`), in order."""
    paths = list(paths)
    groups: dict[object, list[int]] = {}
    for i, p in enumerate(paths):
        groups.setdefault(files_for(p), []).append(i)
    out: list[Entry | None] = [None] * len(paths)
    for store, idx in groups.items():
        for i, entry in zip(idx, store.stat([paths[i] for i in idx])):
            out[i] = entry
    return out
