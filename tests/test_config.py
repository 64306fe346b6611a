"""Tests of pcapipe.config: defaults, schema drift, errors, overrides, round trip."""

import copy
import dataclasses
import datetime
import json
import math
import os
import re
import textwrap
import types
from pathlib import Path

import pytest

import pcapipe.config as config_module
from pcapipe.config import (
    CHOICES,
    SECTIONS,
    Config,
    config_to_dict,
    load_config,
    parse_memory,
    resolve_path,
)
from pcapipe.errors import ConfigError

MINIMAL = {"input": {"paths": ["data/*.parquet"]}}


def _with(**sections):
    """MINIMAL with some sections' keys replaced: _with(model={"seed": 1})."""
    raw = copy.deepcopy(MINIMAL)
    for name, table in sections.items():
        raw.setdefault(name, {}).update(table)
    return raw


def _schema_keys():
    return {f"{s}.{f.name}" for s, cls in SECTIONS.items() for f in dataclasses.fields(cls)}


def _write(path, text):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return path


def _error(raw, overrides=()):
    with pytest.raises(ConfigError) as info:
        load_config(raw, overrides)
    return str(info.value)


# ------------------------------------------------------------------ defaults

DEFAULTS = [
    ("input.features", ()),              # README: default every numeric column = no patterns
    ("input.exclude", ()),               # README: exclude = []
    ("input.vector_column", ""),         # README: vector_column = ""
    ("input.keep", ()),                  # README: keep = []
    ("input.missing", "fail"),           # README: missing = "fail"
    ("input.row_weight", ""),            # README: row_weight = ""
    ("model.components", 5),             # README: components = 5
    ("model.center", True),              # README: center = true
    ("model.scale", False),              # README: scale = false
    ("model.method", "auto"),            # README: method = "auto"
    ("model.feature_weights", ""),       # README: feature_weights = ""
    ("model.tolerance", 1e-9),           # README: tolerance = 1e-9
    ("model.max_iterations", 300),       # README: max_iterations = 300
    ("model.oversample", 8),             # README: oversample = 8
    ("model.seed", 0),                   # README: seed = 0
    ("compute.scheduler", "threads"),    # README: scheduler = "threads"
    ("compute.workers", 0),              # README: workers = 0
    ("compute.memory_limit", "auto"),    # README: memory_limit = "auto"
    ("compute.progress", True),          # README: progress = true
    ("compute.connect_timeout", 10.0),   # cluster issue (lead's brief): 10 s
    ("output.directory", "runs/example"),  # README: directory = "runs/example"
    ("output.scores", True),             # README: scores = true
    ("output.overwrite", False),         # README: overwrite = false
    ("output.report", True),             # README: report = true
    ("monitor.confidence", 0.99),        # README: confidence = 0.99
    ("monitor.time", ""),                # README: time = ""
]


@pytest.mark.parametrize("key, expected", DEFAULTS)
def test_default(key, expected):
    section, name = key.split(".")
    value = getattr(getattr(load_config(MINIMAL), section), name)
    assert value == expected and type(value) is type(expected)


def test_defaults_table_covers_every_key_with_a_default():
    assert {k for k, _ in DEFAULTS} == _schema_keys() - {"input.paths"}


def test_constraint_tables_name_only_schema_keys():
    tables = [CHOICES, config_module._LIMITS, config_module._RULES,
              config_module._EXAMPLES]
    for table in tables:
        assert set(table) <= _schema_keys()
    for key, allowed in CHOICES.items():
        assert DEFAULTS[[k for k, _ in DEFAULTS].index(key)][1] in allowed


def test_config_is_frozen():
    cfg = load_config(MINIMAL)
    with pytest.raises(dataclasses.FrozenInstanceError):
        cfg.model.seed = 1


# ------------------------------------------------------- accepted spellings

ACCEPTED = [
    (_with(input={"paths": "a.parquet"}), "input.paths", ("a.parquet",)),  # one string -> 1-tuple
    (_with(input={"paths": ("a", "b")}), "input.paths", ("a", "b")),      # tuple from Python
    (_with(input={"paths": [Path("d")]}), "input.paths", ("d",)),         # pathlib in a notebook
    (_with(output={"directory": Path("r")}), "output.directory", "r"),    # pathlib directory
    (_with(model={"components": 12}), "model.components", 12),           # int k stays int
    (_with(model={"components": 0.9}), "model.components", 0.9),         # share of variance
    (_with(model={"tolerance": 1e-6}), "model.tolerance", 1e-6),         # float as given
    (_with(compute={"connect_timeout": 5}), "compute.connect_timeout", 5.0),  # int -> float
    (_with(compute={"scheduler": "tcp://10.0.0.5:8786"}), "compute.scheduler",
     "tcp://10.0.0.5:8786"),                                             # remote cluster
    (_with(input={"vector_column": "emb"}), "input.vector_column", "emb"),  # no features set
]


@pytest.mark.parametrize("raw, key, expected", ACCEPTED)
def test_accepted(raw, key, expected):
    section, name = key.split(".")
    value = getattr(getattr(load_config(raw), section), name)
    assert value == expected and type(value) is type(expected)


def test_mapping_types_are_accepted():
    raw = types.MappingProxyType({"input": types.MappingProxyType({"paths": ["x"]})})
    assert load_config(raw).input.paths == ("x",)


# --------------------------------------------------------------- bad values

DATE = datetime.date(1979, 5, 27)
BAD = [
    # structure: required, unknown sections and keys
    ({}, 'input.paths: required, but missing; add e.g. paths = ["data/*.parquet"] '
         "under [input]"),                                         # no [input] at all
    ({"input": {}}, "input.paths: required, but missing"),         # [input] without paths
    (_with(input={"paths": []}), "input.paths: [] is empty, but at least one file, "
     'directory or glob is required; e.g. paths = ["data/*.parquet"]'),  # empty list
    (_with(input={"paths": ["a", ""]}), 'input.paths: ["a", ""] contains an empty string'),
    (_with(input={"featurs": ["x"]}),
     "input.featurs: unknown key; did you mean input.features?"),  # typo
    (_with(model={"componets": 3}),
     "model.componets: unknown key; did you mean model.components?"),  # typo
    (_with(compute={"zzz": 1}), "compute.zzz: unknown key; valid keys in [compute]: "
     "scheduler, workers, memory_limit, progress, connect_timeout"),  # nothing close
    (_with(input={"extra": {"a": 1}}), "input.extra: unknown key"),  # [input.extra] table
    ({**MINIMAL, "inptu": {}}, "inptu: unknown section; did you mean [input]?"),  # typo
    ({**MINIMAL, "seed": 3},
     "seed: unknown section; did you mean model.seed (under [model])?"),  # key at top level
    ({**MINIMAL, "zzz": {}}, "zzz: unknown section; valid sections: input, model, "
     "compute, output"),                                           # nothing close
    ({**MINIMAL, "model": 3}, "model: expected a table [model], got 3 (integer)"),
    # wrong types
    (_with(model={"center": "yes"}),
     'model.center: expected true or false, got "yes" (string); e.g. center = true'),
    (_with(model={"scale": 1}), "model.scale: expected true or false, got 1 (integer)"),
    (_with(compute={"progress": "true"}),
     'compute.progress: expected true or false, got "true" (string)'),
    (_with(model={"seed": 1.0}), "model.seed: expected an integer, got 1.0 (float)"),
    (_with(model={"seed": DATE}), "model.seed: expected an integer, got 1979-05-27 (date)"),
    (_with(model={"max_iterations": True}),
     "model.max_iterations: expected an integer, got true (boolean)"),  # bool is not int
    (_with(model={"tolerance": "1e-9"}),
     'model.tolerance: expected a number, got "1e-9" (string)'),
    (_with(model={"components": True}), "model.components: expected an integer >= 1 or "
     "a fraction in (0, 1), got true (boolean)"),                  # bool is not int
    (_with(model={"components": "5"}), 'model.components: expected an integer >= 1 or '
     'a fraction in (0, 1), got "5" (string)'),
    (_with(input={"features": "ch_*"}), 'input.features: expected an array of strings, '
     'got "ch_*" (string); e.g. features = ["ch_*"]'),
    (_with(input={"keep": ["id", 2]}), "input.keep[1]: expected a string, got 2 (integer)"),
    (_with(input={"paths": [["a"]]}), 'input.paths[0]: expected a string, got ["a"] (array)'),
    (_with(compute={"memory_limit": 4}), 'compute.memory_limit: expected a string, got 4 '
     '(integer); e.g. memory_limit = "4GiB"'),
    (_with(output={"directory": 3}), "output.directory: expected a string, got 3 (integer)"),
    # values out of range or not allowed
    (_with(model={"components": 3.0}), "model.components: 3.0 is a float; use an integer "
     "(components = 3), or a fraction in (0, 1)"),                 # whole float
    (_with(model={"components": 1.0}), "model.components: 1.0 is a float; use an integer "
     "(components = 1)"),                                          # 1.0 is not a share
    (_with(model={"components": 0.0}), "model.components: 0.0 is neither an integer >= 1 "
     "nor a fraction in (0, 1)"),                                  # must not suggest 0
    (_with(model={"components": 1.5}), "model.components: 1.5 is neither an integer >= 1 "
     "nor a fraction in (0, 1)"),
    (_with(model={"components": math.nan}), "model.components: nan is neither"),
    (_with(model={"components": 0}), "model.components: 0 is below 1; use an integer >= 1"),
    (_with(model={"components": -2}), "model.components: -2 is below 1"),
    (_with(model={"method": "fast"}),
     'model.method: "fast" is not one of auto, covariance, direct, matrix-free'),
    (_with(model={"method": "covarience"}), 'model.method: "covarience" is not one of '
     'auto, covariance, direct, matrix-free; did you mean "covariance"?'),  # typo
    (_with(model={"tolerance": 0}), "model.tolerance: 0.0 is not strictly between 0 and 1; "
     "e.g. tolerance = 1e-09"),
    (_with(model={"tolerance": 1.0}), "model.tolerance: 1.0 is not strictly between 0 and 1"),
    (_with(model={"tolerance": math.nan}), "model.tolerance: nan is not strictly between"),
    (_with(model={"max_iterations": 0}),
     "model.max_iterations: 0 is below 1; e.g. max_iterations = 300"),
    (_with(model={"oversample": -1}), "model.oversample: -1 is negative; e.g. oversample = 8"),
    (_with(model={"seed": -1}), "model.seed: -1 is negative; e.g. seed = 0"),
    (_with(compute={"workers": -1}),
     "compute.workers: -1 is not between 0 and 1024; 0 means one per core; e.g. workers = 0"),
    (_with(compute={"workers": 10**18}),  # issue 10: an absurd count ran silently
     "compute.workers: 1000000000000000000 is not between 0 and 1024"),
    (_with(compute={"memory_limit": "1B"}),  # issue 10: ran silently; the minimum is stated
     'compute.memory_limit: "1B" is below the minimum of 1.0 MiB per worker'),
    (_with(compute={"memory_limit": "1048575"}), 'compute.memory_limit: "1048575" is below the minimum'),
    (_with(compute={"connect_timeout": 0}), "compute.connect_timeout: 0.0 is not a "
     "positive, finite number of seconds; e.g. connect_timeout = 10.0"),
    (_with(compute={"connect_timeout": math.inf}), "compute.connect_timeout: inf is not"),
    (_with(compute={"memory_limit": "4 gigs"}), 'compute.memory_limit: "4 gigs" is not a '
     'memory size; use "auto" or a number with an optional unit'),
    (_with(output={"directory": ""}), 'output.directory: "" is empty; '
     'e.g. directory = "runs/example"'),
    (_with(input={"missing": "skip"}),
     'input.missing: "skip" is not one of fail, drop-rows, impute-mean'),
    (_with(input={"features": ["x"], "vector_column": "emb"}),
     'input.vector_column: "emb" is set together with input.features ["x"]; choose one'),
    # scheduler
    (_with(compute={"scheduler": "thread"}), 'compute.scheduler: "thread" is not one of '
     "threads, processes, synchronous, local-cluster, or tcp://HOST:PORT"),  # typo
    (_with(compute={"scheduler": "Threads"}), 'compute.scheduler: "Threads" is not one of '
     'threads, processes, synchronous, local-cluster, or tcp://HOST:PORT; '
     'e.g. scheduler = "tcp://10.0.0.5:8786"; did you mean "threads"?'),  # case matters
    (_with(compute={"scheduler": "http://h:8786"}), 'compute.scheduler: "http://h:8786" '
     "is not one of"),                                             # wrong protocol
    (_with(compute={"scheduler": "tcp://host"}), 'compute.scheduler: "tcp://host" is not '
     'an address tcp://HOST:PORT with an integer port; e.g. scheduler = "tcp://'),  # no port
    # word port
    (_with(compute={"scheduler": "tcp://host:port"}),
     'compute.scheduler: "tcp://host:port" is not an address tcp://HOST:PORT with an integer port'),
    # no host
    (_with(compute={"scheduler": "tcp://:8786"}),
     'compute.scheduler: "tcp://:8786" is not an address tcp://HOST:PORT with an integer port'),
    # space in host
    (_with(compute={"scheduler": "tcp://a b:1"}),
     'compute.scheduler: "tcp://a b:1" is not an address tcp://HOST:PORT with an integer port'),
    (_with(compute={"scheduler": "tcp://host:0"}),
     'compute.scheduler: "tcp://host:0": port 0 is outside 1-65535'),
    (_with(compute={"scheduler": "tcp://host:70000"}),
     'compute.scheduler: "tcp://host:70000": port 70000 is outside 1-65535'),
]


@pytest.mark.parametrize("raw, expected", BAD)
def test_bad_config(raw, expected):
    message = _error(raw)
    assert message.startswith(expected.split(": ")[0] + ": ")  # the key path comes first
    assert expected in message


SCHEDULERS_OK = [
    "threads",              # README default
    "processes",            # README
    "synchronous",          # README
    "local-cluster",        # README
    "tcp://10.0.0.5:8786",  # IPv4 address
    "tcp://node-3.lab:1",   # host name, lowest port
    "tcp://[::1]:65535",    # IPv6 literal, highest port
]


@pytest.mark.parametrize("scheduler", SCHEDULERS_OK)
def test_scheduler_accepted(scheduler):
    assert load_config(_with(compute={"scheduler": scheduler})).compute.scheduler == scheduler


def test_source_of_wrong_type():
    assert "config source must be a file path or a mapping, got int" in _error(42)


# -------------------------------------------------------------------- files


def test_file_errors_name_the_file(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    _write(tmp_path / "configs" / "x.toml", """\
        [input]
        paths = ["a.parquet"]
        [model]
        method = "fast"
        """)
    assert _error("configs/x.toml") == (
        'configs/x.toml: model.method: "fast" is not one of auto, covariance, direct, matrix-free')


def test_toml_date_value_reports_its_type(tmp_path):
    path = _write(tmp_path / "x.toml", """\
        [input]
        paths = ["a"]
        [model]
        seed = 1979-05-27
        """)
    assert f"{path}: model.seed: expected an integer, got 1979-05-27 (date)" in _error(path)


SYNTAX = [
    # (text, line, column, words); positions counted by hand, 1-based as tomllib counts
    ("[input]\npaths = ['a']\n[model]\ncenter = = 1\n", 4, 10, "Invalid value"),  # 2nd '='
    ("[model]\nx 1\n", 2, 3, "Expected '=' after a key"),                         # the '1'
]


@pytest.mark.parametrize("text, line, column, words", SYNTAX)
def test_toml_syntax_error_has_line_and_column(tmp_path, monkeypatch, text, line, column,
                                               words):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "x.toml").write_text(text, encoding="utf-8")
    message = _error("x.toml")
    assert message.startswith(f"x.toml:{line}:{column}: TOML syntax error: {words}")
    assert "(at line" not in message  # the position is moved to the front, not repeated


def test_toml_syntax_error_at_end_of_document(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "x.toml").write_text("a = [1,\n", encoding="utf-8")
    assert _error("x.toml").startswith("x.toml: TOML syntax error: ")


def test_missing_file(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert _error("nope.toml") == "config file not found: nope.toml"
    assert _error(Path("nope.toml")) == "config file not found: nope.toml"


def test_unreadable_and_non_utf8_files(tmp_path):
    assert f"cannot read config file {tmp_path}" in _error(str(tmp_path))  # a directory
    (tmp_path / "latin1.toml").write_bytes(b'[output]\ndirectory = "caf\xe9"\n')
    assert "latin1.toml: not UTF-8 text" in _error(tmp_path / "latin1.toml")


def test_relative_paths_resolve_against_the_config_directory(tmp_path, monkeypatch):
    _write(tmp_path / "project" / "configs" / "run.toml", """\
        [input]
        paths = ["../data/*.parquet", "/abs/file.parquet", "~/more.parquet"]
        [output]
        directory = "runs/a"
        """)
    (tmp_path / "elsewhere").mkdir()
    monkeypatch.chdir(tmp_path / "elsewhere")  # the working directory must not matter
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    cfg = load_config("../project/configs/run.toml")
    configs = tmp_path / "project" / "configs"
    assert cfg.base_dir == str(configs)
    assert cfg.source == str(configs / "run.toml")
    relative, absolute, home = (resolve_path(cfg, p) for p in cfg.input.paths)
    assert relative == str(tmp_path / "project" / "data" / "*.parquet")
    assert absolute == "/abs/file.parquet"
    assert home == str(tmp_path / "home" / "more.parquet")
    assert resolve_path(cfg, cfg.output.directory) == str(configs / "runs" / "a")
    assert cfg.input.paths[0] == "../data/*.parquet"  # the config keeps what was written


def test_dict_source_resolves_against_the_working_directory(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    cfg = load_config(MINIMAL)
    assert cfg.source == "<dict>"
    assert cfg.base_dir == os.getcwd()
    assert resolve_path(cfg, "data/x.parquet") == os.path.join(os.getcwd(), "data", "x.parquet")


# ---------------------------------------------------------------- overrides

OVERRIDES = [
    ("model.components=10", "model.components", 10),              # TOML integer
    ("model.components=0.9", "model.components", 0.9),            # TOML float
    ("model.tolerance=1e-6", "model.tolerance", 1e-6),            # exponent float
    ("model.center=false", "model.center", False),                # TOML boolean
    ('input.keep=["id", "site"]', "input.keep", ("id", "site")),  # TOML array
    ("output.directory=runs/x", "output.directory", "runs/x"),    # bare string, no quotes
    ('output.directory="my runs"', "output.directory", "my runs"),  # quoted string
    ("output.directory=2024-01-01", "output.directory", "2024-01-01"),  # not a date
    ("compute.memory_limit=2000000", "compute.memory_limit", "2000000"),  # not an int
    ("compute.scheduler=tcp://10.0.0.5:8786", "compute.scheduler", "tcp://10.0.0.5:8786"),
    ("input.paths=more/*.parquet", "input.paths", ("more/*.parquet",)),  # one bare path
    (" model.seed = 7", "model.seed", 7),                         # spaces around '='
    ("input.vector_column=emb", "input.vector_column", "emb"),
]


@pytest.mark.parametrize("override, key, expected", OVERRIDES)
def test_override(override, key, expected):
    section, name = key.split(".")
    value = getattr(getattr(load_config(MINIMAL, [override]), section), name)
    assert value == expected and type(value) is type(expected)


BAD_OVERRIDES = [
    ("input.featurs=[]", "--set: input.featurs: unknown key; did you mean input.features?"),
    ("inptu.paths=x", "--set: inptu.paths: unknown section; did you mean [input]?"),
    ("model.center=yes", '--set: model.center: expected true or false, got "yes" (string)'),
    ("model.seed=-1", "--set: model.seed: -1 is negative"),             # value rule applies
    ("model.components=3.0", "--set: model.components: 3.0 is a float"),  # type rule applies
    ("seed=1", '--set "seed=1": expected SECTION.KEY=VALUE, e.g. --set model.components=10'),
    ("model.seed", '--set "model.seed": expected SECTION.KEY=VALUE'),    # no '='
    ("=1", '--set "=1": expected SECTION.KEY=VALUE'),                    # no key
]


@pytest.mark.parametrize("override, expected", BAD_OVERRIDES)
def test_bad_override(override, expected):
    assert _error(MINIMAL, [override]).startswith(expected)


def test_override_wins_over_file_and_file_errors_keep_the_file_name(tmp_path):
    path = _write(tmp_path / "x.toml", """\
        [input]
        paths = ["a"]
        [model]
        seed = 3
        method = "fast"
        """)
    cfg = load_config(path, ["model.seed=4", "model.seed=5", "model.method=covariance"])
    assert (cfg.model.seed, cfg.model.method) == (5, "covariance")  # the last one wins
    assert _error(path, ["model.seed=4"]).startswith(f"{path}: model.method: ")


def test_override_does_not_change_the_callers_mapping():
    raw = _with(model={"seed": 1})
    before = copy.deepcopy(raw)
    assert load_config(raw, ["model.seed=2", "output.scores=false"]).model.seed == 2
    assert raw == before


def test_single_override_string_is_one_override():
    assert load_config(MINIMAL, "model.seed=9").model.seed == 9


# ------------------------------------------------------------------- memory

MEMORY = [
    ("auto", None),                  # budget chosen by the engine
    ("4GiB", 4 * 2**30),             # binary units: powers of 1024 (IEC 80000-13)
    ("4gib", 4 * 2**30),             # case-insensitive
    ("512MiB", 512 * 2**20),
    ("1.5 GiB", 1610612736),         # 1.5 * 2**30, with a space
    ("1TiB", 2**40),
    ("0.5KiB", 512),
    ("2GB", 2 * 10**9),              # decimal units: powers of 1000 (SI)
    ("10 kb", 10_000),
    ("1TB", 10**12),
    ("1000000", 1_000_000),          # no unit: bytes
    ("1000000B", 1_000_000),
    ("1.5B", 1),                     # fractions of a byte are rounded down
    (" 2 GB ", 2 * 10**9),           # surrounding spaces
]


@pytest.mark.parametrize("text, expected", MEMORY)
def test_parse_memory(text, expected):
    assert parse_memory(text) == expected


BAD_MEMORY = [
    ("4 gigs", "is not a memory size"),   # unknown unit
    ("4 G", "is not a memory size"),      # bare prefix is not a unit
    ("GiB", "is not a memory size"),      # no number
    ("", "is not a memory size"),         # empty
    ("-1GiB", "is not a memory size"),    # negative
    ("1e9", "is not a memory size"),      # exponent notation
    ("1,5GiB", "is not a memory size"),   # decimal comma
    ("0", "is less than one byte"),       # zero
    ("0.1B", "is less than one byte"),    # rounds down to zero
    (4, "expected a string, got 4 (integer)"),
]


@pytest.mark.parametrize("text, words", BAD_MEMORY)
def test_parse_memory_rejects(text, words):
    with pytest.raises(ConfigError) as info:
        parse_memory(text)
    message = str(info.value)
    assert message.startswith("compute.memory_limit: ")
    assert words in message and 'e.g. memory_limit = "4GiB"' in message


# --------------------------------------------------------------- round trip


def test_round_trip_of_a_config_with_every_key_changed(tmp_path):
    raw = {
        "input": {"paths": ["a/*.parquet", "b"], "features": [], "exclude": ["x_*"],
                  "vector_column": "emb", "keep": ["id"], "missing": "impute-mean", "row_weight": "w"},
        "model": {"components": 0.95, "center": False, "scale": True,
                  "method": "matrix-free", "feature_weights": "fw.csv", "tolerance": 1e-7, "max_iterations": 50,
                  "oversample": 0, "seed": 42},
        "compute": {"scheduler": "tcp://h:8786", "workers": 3, "memory_limit": "2GB",
                    "progress": False, "connect_timeout": 2.5},
        "output": {"directory": "/out", "scores": False, "overwrite": True,
                   "report": False},
        "monitor": {"confidence": 0.95, "time": "id"},
    }
    assert set(f"{s}.{k}" for s, t in raw.items() for k in t) == _schema_keys()
    cfg = load_config(raw)
    as_dict = config_to_dict(cfg)
    assert as_dict == raw
    again = load_config(json.loads(json.dumps(as_dict)))  # JSON-able, and back
    for name in SECTIONS:
        assert getattr(again, name) == getattr(cfg, name)


def test_round_trip_of_defaults_has_no_bookkeeping_keys():
    cfg = load_config(MINIMAL)
    as_dict = config_to_dict(cfg)
    assert list(as_dict) == list(SECTIONS)  # no base_dir, no source
    assert isinstance(as_dict["input"]["paths"], list)
    again = load_config(as_dict)
    assert isinstance(again, Config)
    assert all(getattr(again, n) == getattr(cfg, n) for n in SECTIONS)


@pytest.mark.parametrize("section, expect", [
    ({"confidence": 1.0}, "monitor.confidence: 1.0 is not strictly between 0 and 1"),  # a certainty
    ({"confidence": 0}, "monitor.confidence: 0.0 is not strictly between 0 and 1"),
    ({"time": "timestamp"}, "monitor.time: \"timestamp\" is not a keep column"),  # keep is empty here
])
def test_monitor_section_is_checked(section, expect):
    with pytest.raises(ConfigError, match=re.escape(expect)):
        load_config({"input": {"paths": ["x.parquet"]}, "monitor": section})
