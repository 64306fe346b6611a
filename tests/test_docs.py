"""The README and the code cannot drift: config keys, defaults, quick start, commands."""

from __future__ import annotations

import dataclasses
import os
import re

import pytest

from conftest import ROOT
from pcapipe import config as config_mod
from pcapipe.cli import build_parser


def _readme() -> str:
    with open(os.path.join(ROOT, "README.md")) as f:
        return f.read()


def _section(text: str, title: str) -> str:
    m = re.search(rf"^## {re.escape(title)}\n(.*?)(?=^## )", text, flags=re.S | re.M)
    assert m, f"README has no '## {title}' section"
    return m.group(1)


def _schema():
    out = {}
    for section, cls in config_mod.SECTIONS.items():
        for f in dataclasses.fields(cls):
            out[f"{section}.{f.name}"] = f
    return out


def _documented() -> dict[str, str]:
    rows = re.findall(r"^\| `([a-z_]+\.[a-z_]+)` \| ([^|]+) \|", _section(_readme(), "Config reference"), re.M)
    return {key: default.strip() for key, default in rows}


def test_every_config_key_is_documented_and_nothing_else():
    assert set(_documented()) == set(_schema())


@pytest.mark.parametrize("key", sorted(_schema()))
def test_documented_default_matches_schema(key):
    field = _schema()[key]
    documented = _documented()[key]
    if field.default is dataclasses.MISSING:
        assert documented == "(required)"
        return
    value = field.default
    if documented.startswith("`"):
        literal = documented.strip("`")
        expected = {True: "true", False: "false"}.get(value) if isinstance(value, bool) else None
        if expected is None:
            expected = f'"{value}"' if isinstance(value, str) else "[]" if value == () else None
        if expected is None:  # a number: compare values, 1e-9 and 1e-09 are the same
            assert float(literal) == value, f"{key}: README says {literal}, the schema {value!r}"
            return
        assert literal == expected, f"{key}: README says {literal}, the schema {expected}"
    else:
        # described in words (e.g. "every numeric column not in keep"): the default is empty
        assert value in ((), ""), f"{key}: README describes a default in words but it is {value!r}"


def test_quick_start_is_exactly_two_commands():
    text = _readme()
    first_para = text.split("\n\n")[1]
    assert "principal components" in first_para
    block = re.search(r"## Quick start\n\n```bash\n(.*?)```", text, re.S)
    assert block, "README quick start must be one bash block"
    commands = [line for line in block.group(1).splitlines() if line.strip()]
    assert len(commands) == 2
    assert "pcapipe run configs/demo.toml" in commands[0] and "pip install" in commands[0]
    assert "pytest" in commands[1]


def test_every_cli_command_is_documented():
    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    table = _section(_readme(), "Commands")
    for name in sub.choices:
        assert f"`pcapipe {name} " in table, f"pcapipe {name} is not in the README's Commands table"


def test_ci_runs_the_readme_test_command():
    block = re.search(r"## Quick start\n\n```bash\n(.*?)```", _readme(), re.S).group(1)
    test_command = [line for line in block.splitlines() if line.strip()][1].strip()
    with open(os.path.join(ROOT, ".ci", "run")) as f:
        assert test_command in f.read()


def test_run_directory_table_lists_the_spectrum_columns_written():
    import numpy as np

    from pcapipe.outputs import spectrum_table

    row = re.search(r"^\| `spectrum\.parquet` \| (.*) \|$", _section(_readme(), "Run directory"), re.M)
    assert row, "README's Run directory table has no spectrum.parquet row"
    documented = re.findall(r"`([a-z_]+)`", row.group(1))
    written = spectrum_table(np.array([2.0, 1.0]), np.zeros(2), np.ones(2, bool), np.ones(2), np.array([True, False]),
                             10, 3.0).column_names
    assert documented == written


def test_readme_python_api_names_exist():
    import pcapipe

    block = re.search(r"## In a notebook\n\nAfter.*?```python\n(.*?)```", _readme(), re.S).group(1)
    members = set(re.findall(r"\bres\.([a-z_]+)", block))
    instance = {"manifest", "directory"}  # set in __init__
    missing = {m for m in members if not hasattr(pcapipe.Result, m) and m not in instance}
    assert members and not missing, f"README uses res.{', res.'.join(sorted(missing))}"
