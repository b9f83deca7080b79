"""Config: schema validation with exact messages, defaults, overrides, the README reference."""

from __future__ import annotations

import dataclasses
import json
import re
from pathlib import Path

import pytest

from pipeline.config import SECTIONS, build_config, load_config
from pipeline.errors import ConfigError
from pipeline.schemas_io import load_schema

REPO = Path(__file__).resolve().parent.parent


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "corpus.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_unknown_key_message(tmp_path: Path) -> None:
    path = write(tmp_path, "[audio]\nsmaple_rate = 16000\n")
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert str(err.value).startswith(f"{path}: unknown key 'audio.smaple_rate'; allowed keys in [audio]: ")
    assert "sample_rate" in str(err.value)


def test_unknown_top_level_key_message(tmp_path: Path) -> None:
    path = write(tmp_path, "sead = 3\n")
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert str(err.value).startswith(f"{path}: unknown key 'sead'; allowed keys: audio, ingest,")


def test_wrong_type_message(tmp_path: Path) -> None:
    path = write(tmp_path, '[audio]\nsample_rate = "16k"\n')
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert str(err.value) == (
        f"{path}: key 'audio.sample_rate' has value \"16k\"; allowed: integer >= 8000 <= 96000"
    )


def test_out_of_range_message(tmp_path: Path) -> None:
    path = write(tmp_path, "[audio]\nvad_aggressiveness = 7\n")
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert str(err.value) == f"{path}: key 'audio.vad_aggressiveness' has value 7; allowed: integer >= 0 <= 3"


def test_enum_message(tmp_path: Path) -> None:
    path = write(tmp_path, '[split]\ngroup_by = "voice"\n')
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert str(err.value) == (
        f'{path}: key \'split.group_by\' has value "voice"; allowed: one of "speaker", "recording", "clip"'
    )


def test_bad_toml_names_the_file(tmp_path: Path) -> None:
    path = write(tmp_path, "[audio\n")
    with pytest.raises(ConfigError, match=re.escape(f"{path}: not valid TOML")):
        load_config(path)


def test_cross_field_rule(tmp_path: Path) -> None:
    path = write(tmp_path, "[audio]\nsegment_min_s = 16\n")
    with pytest.raises(ConfigError, match="audio.segment_min_s' has value 16"):
        load_config(path)


def test_defaults_applied_from_schema() -> None:
    """Every default in the schema reaches the dataclass unchanged."""
    cfg = load_config(None)
    schema = load_schema("config")
    assert cfg.seed == schema["properties"]["seed"]["default"]
    for section, cls in SECTIONS.items():
        props = schema["properties"][section]["properties"]
        assert {f.name for f in dataclasses.fields(cls)} == set(props), section
        resolved = cfg.section(section)
        for key, prop in props.items():
            assert resolved[key] == prop["default"], f"{section}.{key}"
    assert cfg.audio.sample_rate == 16000
    assert cfg.audio.target_lufs == -23


def test_overrides_win_over_file(tmp_path: Path) -> None:
    path = write(tmp_path, "[audio]\nsample_rate = 22050\n")
    assert load_config(path).audio.sample_rate == 22050
    assert load_config(path, overrides={"audio.sample_rate": 24000}).audio.sample_rate == 24000
    with pytest.raises(ConfigError, match="allowed: integer >= 8000"):
        load_config(path, overrides={"audio.sample_rate": 10})


def test_config_hash_is_stable_and_sensitive() -> None:
    a = build_config({})
    b = build_config({"audio": {"sample_rate": 16000}})
    c = build_config({"audio": {"sample_rate": 22050}})
    assert a.sha256() == b.sha256() != c.sha256()
    assert len(a.sha256()) == 64


def test_frozen() -> None:
    cfg = load_config(None)
    with pytest.raises(dataclasses.FrozenInstanceError):
        cfg.audio.sample_rate = 8000  # type: ignore[misc]


def test_readme_config_reference_in_sync() -> None:
    """The README's table lists every schema key with its schema default."""
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    schema = load_schema("config")
    for section, node in schema["properties"].items():
        if "properties" not in node:
            line = f"| `{section}` | `{json.dumps(node['default'])}` |"
            assert line in readme, line
            continue
        for key, prop in node["properties"].items():
            line = f"| `{section}.{key}` | `{json.dumps(prop['default'], ensure_ascii=False)}` |"
            assert line in readme, f"README config reference is missing or stale: {line}"


def test_reference_generator_matches_readme() -> None:
    from pipeline.docs import config_reference_markdown

    assert config_reference_markdown() in (REPO / "README.md").read_text(encoding="utf-8")


def test_demo_config_is_valid() -> None:
    load_config(REPO / "demo_corpus" / "corpus.toml")
