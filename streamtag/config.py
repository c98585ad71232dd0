"""Configuration of ``streamtag watch``: a TOML file with sections, built-in defaults, one-line errors.

Schema (every key optional; ``config/streamtag.toml`` documents each one with its default)::

    [inputs]  paths, start_at, format, text_field, max_line_bytes, poll_interval_seconds,
              idle_flush_seconds
    [model]   path, max_tokens, window_overlap
    [output]  path, review_path, review_threshold, file_mode
    [batch]   max_lines, max_wait_ms
    [state]   directory, stats_interval_seconds

Relative paths are taken from the daemon's working directory (set ``WorkingDirectory=`` in a
service unit), so a config file means the same wherever it is kept.

Any problem (missing or unreadable file, TOML syntax, unknown section or key, wrong type, value out
of range) raises ``ConfigError`` with one line that names the file and the key.
"""

from __future__ import annotations

import dataclasses
import math
import os
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from streamtag.errors import ConfigError

START_AT_CHOICES = ("beginning", "end")
INPUT_FORMATS = ("lines", "json")
DEFAULTS_FILE = Path(__file__).parent / "defaults" / "streamtag.toml"


@dataclass
class WatchConfig:
    """Everything ``streamtag watch`` needs. Every field has a working default."""

    inputs: list[str] = field(default_factory=list)  # globs, directories or files
    start_at: str = "beginning"  # where to start in a file seen for the first time
    input_format: str = "lines"  # "lines" or "json"
    text_field: str = "message"  # dotted path to the text in a JSON line
    max_line_bytes: int = 65536  # longer lines are cut and flagged "truncated"
    poll_interval_seconds: float = 1.0  # fallback wake-up when no change hint arrives
    idle_flush_seconds: float | None = 5.0  # a last line without newline is taken after this idle time
    model_path: str | None = None  # None: the model bundled with the package
    max_tokens: int = 256  # longer lines are tagged in overlapping windows, flagged "split"
    window_overlap: int = 32
    output_path: str = "streamtag-output.jsonl"
    review_path: str = "streamtag-review.jsonl"
    review_threshold: float = 0.5  # lines with confidence below this also go to review
    file_mode: int = 0o600  # mode of files the daemon creates
    batch_max_lines: int = 1000
    batch_max_wait_ms: int = 0  # how long a partial batch waits for more lines (0: group commit)
    state_dir: str = "streamtag-state"
    stats_interval_seconds: float = 60.0
    config_path: str | None = None  # the file these values came from (None: built-in defaults)


# -- value checkers: each returns the converted value or raises ValueError("what is wrong") -------


def _describe(value: Any) -> str:
    return f"{type(value).__name__} {value!r}"[:80]


def _integer(low: int, high: int) -> Callable[[Any], int]:
    def check(value: Any) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ValueError(f"must be an integer, got {_describe(value)}")
        if not low <= value <= high:
            raise ValueError(f"{value} is out of range ({low}..{high})")
        return value

    return check


def _number(low: float, high: float, low_open: bool = False) -> Callable[[Any], float]:
    def check(value: Any) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ValueError(f"must be a number, got {_describe(value)}")
        value = float(value)
        too_low = value <= low if low_open else value < low
        if math.isnan(value) or too_low or value > high:
            bracket = "(" if low_open else "["
            raise ValueError(f"{value:g} is out of range {bracket}{low:g}..{high:g}]")
        return value

    return check


def _optional_seconds(high: float) -> Callable[[Any], float | None]:
    """Seconds, where 0 means "off" (stored as None)."""
    number = _number(0.0, high)

    def check(value: Any) -> float | None:
        value = number(value)
        return None if value == 0 else value

    return check


def _string(value: Any) -> str:
    if not isinstance(value, str):
        raise ValueError(f"must be a string, got {_describe(value)}")
    if not value.strip():
        raise ValueError("must not be empty")
    if "\0" in value:
        raise ValueError("must not contain a NUL character")
    return value


def _path(value: Any) -> str:
    return os.path.expanduser(_string(value))


def _optional_path(value: Any) -> str | None:
    """A path, where "" means "not set" (e.g. the bundled model)."""
    if value == "":
        return None
    return _path(value)


def _choice(choices: tuple[str, ...]) -> Callable[[Any], str]:
    def check(value: Any) -> str:
        if value not in choices:
            raise ValueError(f"must be one of {', '.join(repr(c) for c in choices)}, got {_describe(value)}")
        return value

    return check


def _path_list(value: Any) -> list[str]:
    if not isinstance(value, list):
        raise ValueError(f"must be a list of strings, got {_describe(value)}")
    result = []
    for index, item in enumerate(value):
        try:
            result.append(_path(item))
        except ValueError as exc:
            raise ValueError(f"item {index}: {exc}") from None
    return result


_DOTTED_PATH = re.compile(r"^[^.\s]+(\.[^.\s]+)*$")


def _dotted_field(value: Any) -> str:
    value = _string(value)
    if not _DOTTED_PATH.match(value):
        raise ValueError(f"must be a dotted field path like 'event.message', got {value!r}")
    return value


_FILE_MODE = re.compile(r"^(0o|0)?[0-7]{3}$")


def _file_mode(value: Any) -> int:
    if not isinstance(value, str) or not _FILE_MODE.match(value):
        raise ValueError(f"must be an octal string like \"0600\", got {_describe(value)}")
    mode = int(value.removeprefix("0o"), 8)
    # The daemon appends to its own files and rewrites its state: the owner must read and write.
    if mode & 0o600 != 0o600:
        raise ValueError(f"{value} must give the owner read and write (0600 at least)")
    return mode


@dataclass(frozen=True)
class _Key:
    section: str
    name: str
    attribute: str  # WatchConfig field
    check: Callable[[Any], Any]

    @property
    def dotted(self) -> str:
        return f"{self.section}.{self.name}"


_KEYS = (
    _Key("inputs", "paths", "inputs", _path_list),
    _Key("inputs", "start_at", "start_at", _choice(START_AT_CHOICES)),
    _Key("inputs", "format", "input_format", _choice(INPUT_FORMATS)),
    _Key("inputs", "text_field", "text_field", _dotted_field),
    _Key("inputs", "max_line_bytes", "max_line_bytes", _integer(64, 64 * 1024 * 1024)),
    _Key("inputs", "poll_interval_seconds", "poll_interval_seconds", _number(0.0, 3600.0, low_open=True)),
    _Key("inputs", "idle_flush_seconds", "idle_flush_seconds", _optional_seconds(86400.0)),
    _Key("model", "path", "model_path", _optional_path),
    _Key("model", "max_tokens", "max_tokens", _integer(2, 100_000)),
    _Key("model", "window_overlap", "window_overlap", _integer(0, 50_000)),
    _Key("output", "path", "output_path", _path),
    _Key("output", "review_path", "review_path", _path),
    _Key("output", "review_threshold", "review_threshold", _number(0.0, 1.0)),
    _Key("output", "file_mode", "file_mode", _file_mode),
    _Key("batch", "max_lines", "batch_max_lines", _integer(1, 1_000_000)),
    _Key("batch", "max_wait_ms", "batch_max_wait_ms", _integer(0, 3_600_000)),
    _Key("state", "directory", "state_dir", _path),
    _Key("state", "stats_interval_seconds", "stats_interval_seconds", _number(0.0, 86400.0, low_open=True)),
)
_BY_DOTTED = {key.dotted: key for key in _KEYS}
_BY_ATTRIBUTE = {key.attribute: key for key in _KEYS}
_SECTIONS = tuple(dict.fromkeys(key.section for key in _KEYS))
# Short names used by the command line options of `streamtag watch`.
_OVERRIDE_ALIASES = {
    "model": "model_path",
    "output": "output_path",
    "review": "review_path",
    "threshold": "review_threshold",
    "state": "state_dir",
}


def known_keys() -> list[str]:
    """All keys as "section.name", in schema order (for docs and tests)."""
    return [key.dotted for key in _KEYS]


def load_watch_config(path: str | os.PathLike | None, overrides: dict | None = None) -> WatchConfig:
    """Built-in defaults, then the TOML file (if any), then ``overrides``.

    ``overrides`` keys are dotted TOML keys (``"output.path"``), ``WatchConfig`` field names
    (``"output_path"``) or the command line's short names (``"output"``, ``"review"``, ``"model"``,
    ``"threshold"``, ``"state"``, ``"inputs"``); a value of None means "not given" and is skipped, so argparse results
    can be passed straight in. Raises ``ConfigError`` (one line, naming file and key) on any problem.
    """
    config = WatchConfig()
    if path is not None:
        source = str(path)
        for key, value in _flatten(_read_toml(source), source):
            _apply(config, key, value, source)
        config.config_path = source
    for name, value in (overrides or {}).items():
        if value is None:
            continue
        key = _BY_DOTTED.get(name) or _BY_ATTRIBUTE.get(_OVERRIDE_ALIASES.get(name, name))
        if key is None:
            raise ConfigError(f"command line: unknown setting {name!r}")
        _apply(config, key, value, "command line")
    _check_together(config, config.config_path or "command line")
    return config


def _read_toml(path: str) -> dict:
    try:
        with open(path, "rb") as handle:
            return tomllib.load(handle)
    except FileNotFoundError:
        raise ConfigError(f"{path}: config file not found") from None
    except IsADirectoryError:
        raise ConfigError(f"{path}: is a directory, not a config file") from None
    except PermissionError:
        raise ConfigError(f"{path}: cannot read config file (permission denied)") from None
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read config file ({exc.strerror or exc})") from None
    except UnicodeDecodeError:
        raise ConfigError(f"{path}: config file is not valid UTF-8") from None
    except tomllib.TOMLDecodeError as exc:
        message = " ".join(str(exc).split())
        raise ConfigError(f"{path}: not valid TOML: {message}") from None


def _flatten(document: dict, source: str) -> list[tuple[_Key, Any]]:
    """Check sections and key names; return (key, raw value) pairs."""
    pairs = []
    for section, table in document.items():
        if section not in _SECTIONS:
            if isinstance(table, dict):
                raise ConfigError(
                    f"{source}: unknown section [{section}] (known: {', '.join(_SECTIONS)})")
            raise ConfigError(
                f"{source}: unknown key {section!r} at top level (settings go in sections: {', '.join(_SECTIONS)})")
        if not isinstance(table, dict):
            raise ConfigError(f"{source}: {section} must be a section [{section}], got {_describe(table)}")
        for name, value in table.items():
            key = _BY_DOTTED.get(f"{section}.{name}")
            if key is None:
                known = ", ".join(k.name for k in _KEYS if k.section == section)
                raise ConfigError(f"{source}: unknown key {section}.{name} (known in [{section}]: {known})")
            pairs.append((key, value))
    return pairs


def _apply(config: WatchConfig, key: _Key, value: Any, source: str) -> None:
    try:
        setattr(config, key.attribute, key.check(value))
    except ValueError as exc:
        raise ConfigError(f"{source}: {key.dotted}: {exc}") from None


def _check_together(config: WatchConfig, source: str) -> None:
    """Rules that involve two keys."""
    if config.window_overlap * 2 > config.max_tokens:
        raise ConfigError(
            f"{source}: model.window_overlap: {config.window_overlap} must be at most half of "
            f"model.max_tokens ({config.max_tokens})")
    outputs = {"output.path": config.output_path, "output.review_path": config.review_path}
    if os.path.abspath(outputs["output.path"]) == os.path.abspath(outputs["output.review_path"]):
        raise ConfigError(f"{source}: output.review_path: must differ from output.path")


def describe(config: WatchConfig) -> dict:
    """The config as a plain dict (for the startup log line and stats)."""
    return dataclasses.asdict(config)
