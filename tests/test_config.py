"""Config: every key is documented in docs/config.md; unknown keys and wrong types are refused."""

from __future__ import annotations

import dataclasses
import re
import tomllib
import typing
from pathlib import Path

import pytest

from wearcast.config import Config, config_from_dict, load_config
from wearcast.exceptions import ConfigError, InputMissingError

DOC = Path(__file__).resolve().parents[1] / "docs" / "config.md"
_SKIP = {"base_dir", "source"}


def _sections(cls=Config, prefix=""):
    """Yield (section path, dataclass) for every nested config section."""
    hints = typing.get_type_hints(cls)
    for f in dataclasses.fields(cls):
        if f.name in _SKIP:
            continue
        if dataclasses.is_dataclass(hints[f.name]):
            path = f"{prefix}{f.name}"
            yield path, hints[f.name]
            yield from _sections(hints[f.name], path + ".")


def _documented():
    """{section: set of keys} from the ``## [section]`` tables of docs/config.md."""
    out, current = {}, None
    for line in DOC.read_text(encoding="utf-8").splitlines():
        heading = re.match(r"^## \[([a-z_.]+)\]\s*$", line)
        if heading:
            current = heading.group(1)
            out[current] = set()
            continue
        if line.startswith("## "):
            current = None
        row = re.match(r"^\| `([a-z_0-9]+)` \|", line)
        if current and row:
            out[current].add(row.group(1))
    return out


def test_every_config_key_is_documented_and_nothing_else():
    documented = _documented()
    sections = dict(_sections())
    assert set(documented) == set(sections)
    for name, cls in sections.items():
        fields = {f.name for f in dataclasses.fields(cls)}
        assert documented[name] == fields, f"[{name}] in docs/config.md"


def test_doc_examples_are_valid_configs():
    blocks = re.findall(r"```toml\n(.*?)```", DOC.read_text(encoding="utf-8"), flags=re.S)
    assert len(blocks) == 2
    shapes = [config_from_dict(tomllib.loads(b), source="docs").input.shape for b in blocks]
    assert shapes == ["register_log", "life_table"]


@pytest.mark.parametrize("data, message", [
    ({"fleet": {"max_bad": 0.1}}, "unknown key 'max_bad' in [fleet]"),
    ({"inputs": {}}, "unknown key 'inputs' in the top level"),
    ({"model": {"boosted": {"depth": 3}}}, "unknown key 'depth' in [model.boosted]"),
    ({"fleet": {"max_bad_share": "5%"}}, "fleet.max_bad_share must be a number, got '5%'"),
    ({"fleet": {"as_of": "30/11/2026"}}, "fleet.as_of must be a date written YYYY-MM-DD, got '30/11/2026'"),
    ({"fleet": {"covariates": "age"}}, "fleet.covariates must be a list"),
    ({"ranking": {"top_k": 2.5}}, "ranking.top_k must be a whole number, got 2.5"),
    ({"input": {"register": 3}}, "input.register must be text in quotes, got 3"),
])
def test_unknown_keys_and_wrong_types_name_the_key(data, message):
    with pytest.raises(ConfigError) as info:
        config_from_dict(data, source="fleet.toml")
    assert message in str(info.value)
    assert str(info.value).startswith("fleet.toml: ")


def test_load_config_resolves_paths_and_reports_missing_files(tmp_path):
    path = tmp_path / "fleet.toml"
    path.write_text('[input]\nregister = "exports/assets.csv"\n[fleet]\nas_of = 2026-11-30\n', encoding="utf-8")
    cfg = load_config(path)
    assert cfg.path(cfg.input.register) == tmp_path / "exports" / "assets.csv"
    assert str(cfg.fleet.as_of) == "2026-11-30"
    with pytest.raises(InputMissingError):
        load_config(tmp_path / "missing.toml")
    path.write_text("[input\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(path)



@pytest.mark.parametrize("section,key,value", [
    ("fleet", "renewal", "swap"),
    ("validation", "bootstrap_metrics", "some"),
    ("model", "choose", "neural"),
])
def test_words_outside_their_choices_are_refused(section, key, value):
    from wearcast.config import config_from_dict
    from wearcast.exceptions import ConfigError

    with pytest.raises(ConfigError, match=rf"{section}\.{key} = '{value}' is not known; use one of"):
        config_from_dict({section: {key: value}})
