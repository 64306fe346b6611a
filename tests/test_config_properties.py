"""Property-based tests of the config parser (hypothesis)."""

from __future__ import annotations

import dataclasses
import difflib
import json

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pcapipe.config import SECTIONS, config_to_dict, load_config
from pcapipe.errors import ConfigError

KEYS = {s: [f.name for f in dataclasses.fields(cls)] for s, cls in SECTIONS.items()}
ALL_KEYS = {f"{s}.{k}" for s, ks in KEYS.items() for k in ks}
_settings = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])

names = st.text(alphabet="abcdefghijklmnopqrstuvwxyz_", min_size=1, max_size=12)
patterns = st.lists(st.text(alphabet="abcxyz_*?0123", min_size=1, max_size=8), max_size=4)

valid_config = st.fixed_dictionaries({
    "input": st.fixed_dictionaries({
        "paths": st.lists(st.text(alphabet="abc/_*.", min_size=1, max_size=10), min_size=1, max_size=3),
        "features": patterns,
        "exclude": patterns,
        "keep": st.lists(names, max_size=3),
        "missing": st.sampled_from(["fail", "drop-rows", "impute-mean"]),
    }),
    "model": st.fixed_dictionaries({
        "components": st.one_of(st.integers(1, 10_000),
                                st.floats(min_value=1e-6, max_value=1 - 1e-6, allow_nan=False)),
        "center": st.booleans(),
        "scale": st.booleans(),
        "method": st.sampled_from(["auto", "covariance", "direct", "matrix-free"]),
        "tolerance": st.floats(min_value=1e-15, max_value=0.5),
        "max_iterations": st.integers(1, 10_000),
        "oversample": st.integers(0, 100),
        "seed": st.integers(0, 2**32),
    }),
    "compute": st.fixed_dictionaries({
        "scheduler": st.one_of(st.sampled_from(["threads", "processes", "synchronous", "local-cluster"]),
                               st.integers(1, 65535).map(lambda p: f"tcp://127.0.0.1:{p}")),
        "workers": st.integers(0, 64),
        "memory_limit": st.one_of(st.just("auto"), st.integers(1, 4096).map(lambda m: f"{m}MiB")),
        "progress": st.booleans(),
    }),
    "output": st.fixed_dictionaries({
        "directory": st.text(alphabet="abc/_-", min_size=1, max_size=10),
        "scores": st.booleans(),
        "overwrite": st.booleans(),
        "report": st.booleans(),
    }),
    "monitor": st.fixed_dictionaries({
        "confidence": st.floats(min_value=1e-6, max_value=1 - 1e-6),
    }),
})


@_settings
@given(valid_config)
def test_valid_configs_load_and_round_trip_through_json(raw):
    cfg = load_config(raw)
    again = load_config(json.loads(json.dumps(config_to_dict(cfg))))
    assert config_to_dict(again) == config_to_dict(cfg)
    for section, keys in raw.items():
        for key, value in keys.items():
            got = getattr(getattr(cfg, section), key)
            assert (list(got) if isinstance(got, tuple) else got) == value


@_settings
@given(valid_config, st.sampled_from(sorted(SECTIONS)), names)
def test_an_unknown_key_is_always_refused_with_its_path(raw, section, key):
    if key in KEYS[section]:
        return
    raw[section][key] = 1
    with pytest.raises(ConfigError) as e:
        load_config(raw)
    message = str(e.value)
    assert message.startswith(f"{section}.{key}: unknown key")
    close = difflib.get_close_matches(key, KEYS[section], n=1)
    if close:  # the nearest valid key is suggested whenever one is close
        assert f"{section}.{close[0]}" in message


@_settings
@given(valid_config, st.sampled_from(sorted(ALL_KEYS - {"input.paths"})))
def test_a_wrong_type_is_refused_naming_the_key(raw, path):
    section, key = path.split(".")
    default = next(f for f in dataclasses.fields(SECTIONS[section]) if f.name == key).default
    # a value of a type no key of this kind accepts
    raw[section][key] = {"nested": 1} if not isinstance(default, dict) else 1
    with pytest.raises(ConfigError) as e:
        load_config(raw)
    assert str(e.value).startswith(f"{path}:")


@_settings
@given(valid_config, st.integers(1, 500), st.booleans())
def test_overrides_win_over_the_source(raw, k, scores):
    cfg = load_config(raw, [f"model.components={k}", f"output.scores={'true' if scores else 'false'}"])
    assert cfg.model.components == k and cfg.output.scores is scores
