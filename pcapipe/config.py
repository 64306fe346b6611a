"""Configuration: a TOML file or a mapping, validated into frozen dataclasses.

The schema is declared once, as data: the dataclasses carry the keys, types and
defaults; ``CHOICES``, ``_LIMITS`` and ``_RULES`` add what a type cannot say.
Unknown keys, type checks, ``--set`` overrides and the dict round trip are all
derived from these.  Errors start with the file name (or ``--set``) and the key
path, quote the bad value and say what to write instead.
"""

import dataclasses
import datetime
import difflib
import json
import logging
import math
import numbers
import os
import pathlib
import re
import tomllib
from collections.abc import Iterable, Mapping
from decimal import Decimal
from typing import Any, Callable, NoReturn

from pcapipe.errors import ConfigError

__all__ = [
    "InputConfig", "ModelConfig", "ComputeConfig", "OutputConfig", "MonitorConfig", "Config",
    "SECTIONS", "CHOICES", "SCHEDULERS", "MEMORY_UNITS",
    "load_config", "parse_memory", "format_size", "config_to_dict", "resolve_path",
]

_log = logging.getLogger("pcapipe")


@dataclasses.dataclass(frozen=True)
class InputConfig:
    """``[input]``: which Parquet files and columns to read."""

    paths: tuple[str, ...]            # required; a single string becomes a 1-tuple
    features: tuple[str, ...] = ()    # glob patterns; () = every numeric column not in keep
    exclude: tuple[str, ...] = ()     # glob patterns removed from features
    vector_column: str = ""           # instead of features: one list column of floats
    keep: tuple[str, ...] = ()        # identifier columns copied into the scores
    missing: str = "fail"             # see CHOICES
    row_weight: str = ""              # optional numeric column of frequency weights (>= 0)


@dataclasses.dataclass(frozen=True)
class ModelConfig:
    """``[model]``: what to compute and how precisely."""

    components: int | float = 5       # int k >= 1, or a share of variance in (0, 1)
    center: bool = True
    scale: bool = False
    method: str = "auto"              # see CHOICES
    feature_weights: str = ""         # optional table (Parquet or CSV) of feature, weight
    tolerance: float = 1e-9           # relative residual, in (0, 1)
    max_iterations: int = 300
    oversample: int = 8
    seed: int = 0


@dataclasses.dataclass(frozen=True)
class ComputeConfig:
    """``[compute]``: where the blocks run and with how much memory."""

    scheduler: str = "threads"        # one of SCHEDULERS, or tcp://HOST:PORT
    workers: int = 0                  # 0 = one per core
    memory_limit: str = "auto"        # per worker, see parse_memory
    progress: bool = True
    connect_timeout: float = 10.0     # seconds to wait for a tcp:// scheduler


@dataclasses.dataclass(frozen=True)
class OutputConfig:
    """``[output]``: the run directory and what goes into it."""

    directory: str = "runs/example"
    scores: bool = True
    overwrite: bool = False
    report: bool = True


@dataclasses.dataclass(frozen=True)
class MonitorConfig:
    """``[monitor]``: control limits for T^2 and SPE (see :mod:`pcapipe.limits`)."""

    confidence: float = 0.99          # in (0, 1)
    time: str = ""                    # a keep column: the x-axis of the control chart


@dataclasses.dataclass(frozen=True)
class Config:
    """A validated configuration; see :func:`resolve_path` for ``base_dir``."""

    input: InputConfig
    model: ModelConfig
    compute: ComputeConfig
    output: OutputConfig
    monitor: MonitorConfig
    base_dir: str   # absolute: the config file's directory, or the cwd for a mapping
    source: str     # the config file's absolute path, or "<dict>"


SECTIONS: dict[str, type] = {
    "input": InputConfig, "model": ModelConfig,
    "compute": ComputeConfig, "output": OutputConfig, "monitor": MonitorConfig,
}
CHOICES: dict[str, tuple[str, ...]] = {
    "input.missing": ("fail", "drop-rows", "impute-mean"),
    "model.method": ("auto", "covariance", "direct", "matrix-free"),
}
SCHEDULERS: tuple[str, ...] = ("threads", "processes", "synchronous", "local-cluster")
# Decimal units are powers of 1000, binary ones powers of 1024 (IEC 80000-13).
MEMORY_UNITS: dict[str, int] = {
    "b": 1, "kb": 10**3, "mb": 10**6, "gb": 10**9, "tb": 10**12,
    "kib": 2**10, "mib": 2**20, "gib": 2**30, "tib": 2**40,
}
# Workers of one local scheduler: more than any workstation has cores (a typo guard).
MAX_WORKERS = 1024
# Per worker: one decoded batch is at least 1 MiB (layout.batch_rows_for).
MIN_MEMORY = 1 << 20
# key -> (test, requirement); message "<value> <requirement>; e.g. <example>".
# NaN fails every comparison, so it is rejected by each float test.
_LIMITS: dict[str, tuple[Callable[[Any], bool], str]] = {
    "model.tolerance": (lambda v: 0.0 < v < 1.0, "is not strictly between 0 and 1"),
    "model.max_iterations": (lambda v: v >= 1, "is below 1"),
    "model.oversample": (lambda v: v >= 0, "is negative"),
    "model.seed": (lambda v: v >= 0, "is negative"),
    "compute.workers": (lambda v: 0 <= v <= MAX_WORKERS,
                        f"is not between 0 and {MAX_WORKERS}; 0 means one per core"),
    "compute.connect_timeout": (lambda v: 0.0 < v < math.inf,
                                "is not a positive, finite number of seconds"),
    "monitor.confidence": (lambda v: 0.0 < v < 1.0, "is not strictly between 0 and 1"),
    # An empty directory would resolve to the config's own directory.
    "output.directory": (bool, "is empty"),
}
# Shown in messages where the default is no help (required, or empty).
_EXAMPLES: dict[str, Any] = {
    "input.paths": ["data/*.parquet"], "input.features": ["ch_*"],
    "input.exclude": ["ch_bad"], "input.keep": ["id"],
    "input.vector_column": "embedding", "compute.memory_limit": "4GiB",
    "input.row_weight": "weight", "model.feature_weights": "feature_weights.csv",
    "monitor.time": "timestamp",
}
# Notebook users pass pathlib objects for these; anywhere else it is a mistake.
_PATH_KEYS = frozenset({"input.paths", "output.directory", "model.feature_weights"})
_TOML_TYPES = {bool: "boolean", int: "integer", float: "float", str: "string",
               list: "array", tuple: "array", dict: "table", datetime.datetime: "datetime",
               datetime.date: "date", datetime.time: "time"}
_TCP_RE = re.compile(r"tcp://([^\s/:\[\]]+|\[[0-9A-Fa-f:.]+\]):([0-9]{1,5})")
_MEMORY_RE = re.compile(r"\s*([0-9]+(?:\.[0-9]+)?|\.[0-9]+)\s*([A-Za-z]*)\s*")
_MEMORY_HINT = ('use "auto" or a number with an optional unit (B, KB, MB, GB, TB, '
                'KiB, MiB, GiB, TiB), e.g. memory_limit = "4GiB"')


def _is_int(value: Any) -> bool:
    return isinstance(value, numbers.Integral) and not isinstance(value, bool)


def _is_real(value: Any) -> bool:
    return isinstance(value, numbers.Real) and not isinstance(value, bool)


# field type -> (what to say, accepts, convert); tuple[str, ...] is handled apart.
_TYPES: dict[Any, tuple[str, Callable[[Any], bool], Callable[[Any], Any]]] = {
    bool: ("true or false", lambda v: isinstance(v, bool), bool),
    int: ("an integer", _is_int, int),
    float: ("a number", _is_real, float),
    str: ("a string", lambda v: isinstance(v, str), str),
    int | float: ("an integer >= 1 or a fraction in (0, 1)", _is_real,
                  lambda v: int(v) if _is_int(v) else float(v)),
}


def _show(value: Any) -> str:
    """Render a value as the user would write it in TOML."""
    if isinstance(value, float) and not math.isfinite(value):
        return "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, (datetime.date, datetime.time)):
        return value.isoformat()
    try:
        text = json.dumps(value, ensure_ascii=False, default=str)
    except (TypeError, ValueError):
        text = repr(value)
    return text if len(text) <= 120 else text[:117] + "..."


def _type_name(value: Any) -> str:
    return _TOML_TYPES.get(type(value), type(value).__name__)


def _fields(section: str) -> dict[str, dataclasses.Field]:
    return {f.name: f for f in dataclasses.fields(SECTIONS[section])}


def _example(path: str) -> str:
    """A ``key = value`` line a user can copy, for the end of a message."""
    section, key = path.split(".")
    value = _EXAMPLES.get(path, _fields(section)[key].default)
    return f"{key} = {_show(list(value) if isinstance(value, tuple) else value)}"


def _choice_problem(value: str, choices: Iterable[str], extra: str = "") -> str:
    choices = tuple(choices)
    close = difflib.get_close_matches(value, choices, n=1)
    hint = f"; did you mean {_show(close[0])}?" if close else ""
    return f"{_show(value)} is not one of {', '.join(choices)}{extra}{hint}"


def _paths_rule(value: tuple[str, ...]) -> str | None:
    if not value:
        return ("[] is empty, but at least one file, directory or glob is required; "
                f"e.g. {_example('input.paths')}")
    if "" in value:
        return f"{_show(list(value))} contains an empty string; e.g. {_example('input.paths')}"
    return None


def _components_rule(value: int | float) -> str | None:
    if isinstance(value, int):
        return None if value >= 1 else (
            f"{value} is below 1; use an integer >= 1, or a fraction in (0, 1)")
    if 0.0 < value < 1.0:
        return None
    if math.isfinite(value) and value.is_integer() and value >= 1:
        return (f"{_show(value)} is a float; use an integer (components = {int(value)}), "
                "or a fraction in (0, 1) for a share of the variance")
    return (f"{_show(value)} is neither an integer >= 1 nor a fraction in (0, 1); "
            "e.g. components = 5, or components = 0.9 for 90% of the variance")


def _scheduler_rule(value: str) -> str | None:
    if value in SCHEDULERS:
        return None
    example = 'e.g. scheduler = "tcp://10.0.0.5:8786"'
    if not value.startswith("tcp://"):
        return _choice_problem(value, SCHEDULERS, extra=f", or tcp://HOST:PORT; {example}")
    match = _TCP_RE.fullmatch(value)
    if match is None:
        return f"{_show(value)} is not an address tcp://HOST:PORT with an integer port; {example}"
    if not 1 <= int(match.group(2)) <= 65535:
        return f"{_show(value)}: port {match.group(2)} is outside 1-65535; {example}"
    return None


def _memory_rule(value: str) -> str | None:
    try:
        n_bytes = parse_memory(value)
    except ConfigError as e:
        return str(e).partition(": ")[2]  # the caller adds its own key prefix
    if n_bytes is not None and n_bytes < MIN_MEMORY:
        return (f"{_show(value)} is below the minimum of {format_size(MIN_MEMORY)} per worker (one decoded "
                f"batch); e.g. {_example('compute.memory_limit')}")
    return None


_RULES: dict[str, Callable[[Any], "str | None"]] = {
    "input.paths": _paths_rule,
    "model.components": _components_rule,
    "compute.scheduler": _scheduler_rule,
    "compute.memory_limit": _memory_rule,
}


class _Context:
    """Where the values came from, so that an error can say so."""

    def __init__(self, label: str) -> None:
        self.label = label
        self.overridden: set[str] = set()

    def fail(self, path: str, message: str) -> NoReturn:
        origin = "--set" if path.split("[")[0] in self.overridden else self.label
        raise ConfigError(f"{origin + ': ' if origin else ''}{path}: {message}")


def _unknown(name: str, section: str | None) -> str:
    """Message for an unknown key of ``section``, or unknown section if None."""
    if section is not None:
        valid = list(_fields(section))
        close = difflib.get_close_matches(name, valid, n=1)
        if close:
            return f"unknown key; did you mean {section}.{close[0]}?"
        return f"unknown key; valid keys in [{section}]: {', '.join(valid)}"
    close = difflib.get_close_matches(name, list(SECTIONS), n=1)
    if close:
        return f"unknown section; did you mean [{close[0]}]?"
    for owner in SECTIONS:
        if name in _fields(owner):
            return f"unknown section; did you mean {owner}.{name} (under [{owner}])?"
    return f"unknown section; valid sections: {', '.join(SECTIONS)}"


def _coerce(ctx: _Context, path: str, value: Any, kind: Any) -> Any:
    """Type-check one value against its dataclass field type; return it normalised."""
    def as_text(v: Any) -> Any:
        return str(v) if path in _PATH_KEYS and isinstance(v, pathlib.PurePath) else v

    def wrong(expected: str, got: Any, at: str = path) -> NoReturn:
        ctx.fail(at, f"expected {expected}, got {_show(got)} ({_type_name(got)}); "
                     f"e.g. {_example(path)}")

    value = as_text(value)
    if kind in _TYPES:
        expected, accepts, convert = _TYPES[kind]
        return convert(value) if accepts(value) else wrong(expected, value)
    if kind != tuple[str, ...]:
        raise TypeError(f"{path}: no type check for field type {kind!r}")  # schema bug
    if isinstance(value, str) and path == "input.paths":
        return (value,)
    if not isinstance(value, (list, tuple)):
        wrong("an array of strings", value)
    items = tuple(as_text(v) for v in value)
    for i, item in enumerate(items):
        if not isinstance(item, str):
            wrong("a string", item, at=f"{path}[{i}]")
    return items


def _problem(path: str, value: Any) -> str | None:
    if path in CHOICES and value not in CHOICES[path]:
        return _choice_problem(value, CHOICES[path])
    if path in _LIMITS and not _LIMITS[path][0](value):
        return f"{_show(value)} {_LIMITS[path][1]}; e.g. {_example(path)}"
    return _RULES[path](value) if path in _RULES else None


def _build_section(ctx: _Context, section: str, table: Mapping[str, Any]) -> Any:
    fields = _fields(section)
    for key in table:
        if key not in fields:
            ctx.fail(f"{section}.{key}", _unknown(str(key), section))
    values = {}
    for name, field in fields.items():
        path = f"{section}.{name}"
        if name not in table:
            if field.default is dataclasses.MISSING:
                ctx.fail(path, f"required, but missing; add e.g. {_example(path)} "
                               f"under [{section}]")
            continue
        values[name] = _coerce(ctx, path, table[name], field.type)
        problem = _problem(path, values[name])
        if problem:
            ctx.fail(path, problem)
    return SECTIONS[section](**values)


def _validate(ctx: _Context, raw: Mapping[str, Any]) -> dict[str, Any]:
    for name, table in raw.items():
        if name not in SECTIONS:
            ctx.fail(str(name), _unknown(str(name), None))
        if not isinstance(table, Mapping):
            ctx.fail(name, f"expected a table [{name}], got {_show(table)} "
                           f"({_type_name(table)})")
    built = {name: _build_section(ctx, name, raw.get(name, {})) for name in SECTIONS}
    inp = built["input"]
    if inp.vector_column and inp.features:
        ctx.fail("input.vector_column",
                 f"{_show(inp.vector_column)} is set together with input.features "
                 f"{_show(list(inp.features))}; choose one: features for numeric "
                 "columns, or vector_column for one list column")
    if inp.row_weight and inp.row_weight == inp.vector_column:
        ctx.fail("input.row_weight",
                 f"{_show(inp.row_weight)} is also input.vector_column; the row weights "
                 "need a numeric column of their own")
    mon = built["monitor"]
    if mon.time and mon.time not in inp.keep:
        ctx.fail("monitor.time", f"{_show(mon.time)} is not a keep column; add it to input.keep "
                                 f"(now {_show(list(inp.keep))}) or leave monitor.time empty")
    return built


def _read_toml(path: str, label: str) -> dict[str, Any]:
    try:
        with open(path, "rb") as fh:
            # Windows editors save UTF-8 with a byte-order mark, which TOML does not allow
            return tomllib.loads(fh.read().decode("utf-8").removeprefix("\ufeff"))
    except FileNotFoundError as e:
        raise ConfigError(f"config file not found: {label}") from e
    except tomllib.TOMLDecodeError as e:
        # Python 3.11's TOMLDecodeError carries the position only in its text.
        message = str(e)
        where = re.search(r"\s*\(at line (\d+), column (\d+)\)\s*$", message)
        if where is None:
            raise ConfigError(f"{label}: TOML syntax error: {message}") from e
        raise ConfigError(f"{label}:{where.group(1)}:{where.group(2)}: TOML syntax "
                          f"error: {message[:where.start()]}") from e
    except UnicodeDecodeError as e:
        raise ConfigError(f"{label}: not UTF-8 text (byte {e.start}); save it as UTF-8") from e
    except OSError as e:
        raise ConfigError(f"cannot read config file {label}: {e.strerror or e}") from e


def _override_value(section: str, key: str, text: str) -> Any:
    """``text`` parsed as a TOML value, or the text itself."""
    try:
        parsed = tomllib.loads("v = " + text)
    except tomllib.TOMLDecodeError:
        return text
    if list(parsed) != ["v"]:
        return text
    # `output.directory=2024` must stay a name, not become an integer or a date.
    if _fields(section)[key].type is str and not isinstance(parsed["v"], str):
        return text.strip()
    return parsed["v"]


def _apply_overrides(ctx: _Context, raw: dict[str, Any], overrides: Iterable[str]) -> None:
    for item in (overrides,) if isinstance(overrides, str) else overrides:
        key, eq, text = str(item).partition("=")
        section, dot, name = key.strip().partition(".")
        if not (eq and dot and section and name):
            raise ConfigError(f"--set {_show(item)}: expected SECTION.KEY=VALUE, "
                              "e.g. --set model.components=10")
        if section not in SECTIONS:
            raise ConfigError(f"--set: {section}.{name}: {_unknown(section, None)}")
        if name not in _fields(section):
            raise ConfigError(f"--set: {section}.{name}: {_unknown(name, section)}")
        table = raw.setdefault(section, {})
        if isinstance(table, dict):  # otherwise _validate reports the section
            table[name] = _override_value(section, name, text)
            ctx.overridden.add(f"{section}.{name}")


def load_config(source: "str | os.PathLike[str] | Mapping[str, Any]",
                overrides: Iterable[str] = ()) -> Config:
    """Read, override and validate a configuration.

    Parameters
    ----------
    source
        Path of a TOML file, or a mapping of the same shape.
    overrides
        ``"section.key=value"`` strings (``--set``).  The value is parsed as TOML;
        text that is not TOML, or any value for a string key, is kept as a bare
        string, so ``output.directory=runs/x`` needs no quotes.

    Returns
    -------
    Config

    Raises
    ------
    ConfigError
        Missing or unreadable file, TOML syntax, unknown key, wrong type or value.
    """
    if isinstance(source, Mapping):
        # Copy two levels, so overrides never write into the caller's mapping.
        raw = {k: dict(v) if isinstance(v, Mapping) else v for k, v in source.items()}
        label, base_dir, origin = "", os.getcwd(), "<dict>"
    elif isinstance(source, (str, os.PathLike)):
        label = os.fspath(source)
        origin = os.path.abspath(os.path.expanduser(label))
        raw = _read_toml(origin, label)
        base_dir = os.path.dirname(origin)
    else:
        raise ConfigError("config source must be a file path or a mapping, "
                          f"got {type(source).__name__}")
    ctx = _Context(label)
    _apply_overrides(ctx, raw, overrides)
    sections = _validate(ctx, raw)
    _log.debug("config loaded from %s, overridden: %s", origin, sorted(ctx.overridden))
    return Config(**sections, base_dir=base_dir, source=origin)


def format_size(n: float) -> str:
    """Bytes as text with binary units (the inverse direction of :func:`parse_memory`)."""
    for unit in ("B", "KiB", "MiB", "GiB"):
        if n < 1024:
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    return f"{n:.1f} TiB"


def parse_memory(text: str) -> int | None:
    """Bytes in a size such as ``"4GiB"``, ``"1.5 GB"`` or ``"1000000"``; None for "auto".

    B, KB, MB, GB, TB are powers of 1000 and KiB, MiB, GiB, TiB powers of 1024,
    case-insensitive, with an optional space; no unit means bytes.  Fractions of
    a byte are rounded down.

    Raises
    ------
    ConfigError
        The text is not a size of at least one byte.
    """
    def bad(problem: str) -> NoReturn:
        raise ConfigError(f"compute.memory_limit: {problem}; {_MEMORY_HINT}")

    if not isinstance(text, str):
        bad(f"expected a string, got {_show(text)} ({_type_name(text)})")
    if text.strip().lower() == "auto":
        return None
    match = _MEMORY_RE.fullmatch(text)
    unit = match.group(2).lower() if match else ""
    if match is None or (unit and unit not in MEMORY_UNITS):
        bad(f"{_show(text)} is not a memory size")
    n_bytes = int(Decimal(match.group(1)) * MEMORY_UNITS.get(unit, 1))
    if n_bytes < 1:
        bad(f"{_show(text)} is less than one byte")
    return n_bytes


def config_to_dict(cfg: Config) -> dict[str, dict[str, Any]]:
    """The sections as a JSON-able dict that :func:`load_config` accepts back."""
    return {
        name: {key: list(v) if isinstance(v, tuple) else v
               for key in _fields(name) for v in [getattr(getattr(cfg, name), key)]}
        for name in SECTIONS
    }


def resolve_path(cfg: Config, p: "str | os.PathLike[str]") -> str:
    """Absolute path of ``p`` (``~`` expanded) against ``cfg.base_dir``."""
    return os.path.abspath(os.path.join(cfg.base_dir, os.path.expanduser(os.fspath(p))))
