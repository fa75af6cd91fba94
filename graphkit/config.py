"""The refresh configuration: a TOML file, validated strictly, with ``--set section.key=value`` overrides.

Paths in the file are relative to the file itself. Unknown keys, wrong types and impossible values are
``ConfigError``\\ s whose message names the file and the key.
"""

from __future__ import annotations

import difflib
import tomllib
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from .errors import ConfigError

__all__ = ["RefreshConfig", "load_config", "apply_overrides"]


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True, frozen=True)


class InputSection(_Section):
    edges: str = Field(description="Parquet file, folder or glob holding the edge table (relative to the config file).")
    source: str = Field(description="Column holding the source node id.")
    target: str = Field(description="Column holding the target node id.")
    weight: str | None = Field(default=None, description="Optional column holding a positive edge weight.")
    directed: bool = Field(default=False, description="Treat edges as directed (walks follow edge direction).")


class WalksSection(_Section):
    per_node: int = Field(default=10, ge=1, description="Walks started from every node (one pass each).")
    length: int = Field(default=40, ge=2, description="Nodes per walk, the start node included.")
    seed: int = Field(default=0, ge=0, description="Seed of the walk and training random streams.")


class TrainSection(_Section):
    dim: int = Field(default=128, ge=1, le=4096, description="Dimension of the node vectors.")
    window: int = Field(default=5, ge=1, description="Largest distance between a node and its context in a walk.")
    objective: Literal["negative_sampling", "hierarchical_softmax"] = "negative_sampling"
    negatives: int = Field(default=5, ge=1, description="Negative samples per positive pair (negative_sampling).")
    epochs: int = Field(default=1, ge=1, description="Passes over the walk corpus.")
    learning_rate: float = Field(default=0.025, gt=0, le=1.0, description="Starting learning rate, decayed linearly.")
    threads: int | None = Field(default=None, ge=1, description="Training threads (default: all cores).")


class StoreSection(_Section):
    path: str = Field(description="Folder of the versioned embedding store (relative to the config file).")


class DaskSection(_Section):
    address: str | None = Field(default=None, description="Scheduler address of an existing Dask cluster.")
    workers: int | None = Field(default=None, ge=1, description="Threads of the local cluster (default: cores).")


class RefreshConfig(_Section):
    """The whole resolved configuration; ``base_dir`` is the folder relative paths are resolved against."""

    input: InputSection
    walks: WalksSection = WalksSection()
    train: TrainSection = TrainSection()
    store: StoreSection
    dask: DaskSection = DaskSection()
    base_dir: str = "."
    source_file: str = "<config>"

    @property
    def edges_path(self) -> str:
        """The edge path resolved against the config file's folder (globs kept)."""
        return _resolve(self.base_dir, self.input.edges)

    @property
    def store_path(self) -> Path:
        return Path(_resolve(self.base_dir, self.store.path))

    def to_public_dict(self) -> dict[str, Any]:
        """The resolved parameters as recorded with each version (absolute paths)."""
        d = self.model_dump(exclude={"base_dir", "source_file"})
        d["input"]["edges"] = self.edges_path
        d["store"]["path"] = str(self.store_path)
        return d


def _resolve(base: str, p: str) -> str:
    path = Path(p).expanduser()
    return str(path if path.is_absolute() else (Path(base) / path).resolve())


_SECTIONS = {name: f.annotation for name, f in RefreshConfig.model_fields.items()
             if name not in ("base_dir", "source_file")}


def _suggest(word: str, options) -> str:
    close = difflib.get_close_matches(word, list(options), n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _parse_value(text: str) -> Any:
    """A ``--set`` value as a TOML value (``32``, ``true``, ``"x"``); bare words stay strings."""
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
        section, key = dotted.strip().split(".", 1)
        if section not in _SECTIONS:
            raise ConfigError(f"{where}: unknown section [{section}]{_suggest(section, _SECTIONS)}")
        data.setdefault(section, {})[key.strip()] = _parse_value(value.strip())
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


def _format_error(exc: ValidationError, where: str) -> str:
    err = exc.errors()[0]
    loc = [str(p) for p in err["loc"]]
    if len(loc) >= 2:
        name = f"[{loc[0]}] {'.'.join(loc[1:])}"
    elif loc:
        name = f"[{loc[0]}]"
    else:
        name = "config"
    msg = err["msg"]
    if err["type"] == "missing":
        return f"{where}: missing required key {name}"
    return f"{where}: {name}: {msg[0].lower() + msg[1:]}, got {err.get('input')!r}"


def config_from_dict(data: dict, *, base_dir: str = ".", where: str = "<config>") -> RefreshConfig:
    """Validate a raw mapping (as read from TOML) into a :class:`RefreshConfig`."""
    _check_keys(data, where)
    try:
        return RefreshConfig.model_validate({**data, "base_dir": str(base_dir), "source_file": where})
    except ValidationError as exc:
        raise ConfigError(_format_error(exc, where)) from None


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
    data = apply_overrides(data, overrides)
    return config_from_dict(data, base_dir=str(path.resolve().parent), where=where)
