"""Config: schema validation with exact messages, defaults, overrides, the README reference."""

from __future__ import annotations

import dataclasses
import json
import re
from pathlib import Path

import pytest

from pipeline.core.config import SECTIONS, build_config, load_config
from pipeline.core.errors import ConfigError
from pipeline.core.schemas_io import load_schema

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
    assert str(err.value).startswith(f"{path}: unknown key 'sead'; allowed keys: audio, datasheet, ingest,")


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
    from pipeline.commands.docs import config_reference_markdown

    assert config_reference_markdown() in (REPO / "README.md").read_text(encoding="utf-8")


def test_demo_config_is_valid() -> None:
    load_config(REPO / "demo_corpus" / "corpus.toml")


# --- where a bad value came from, and exit codes (README: "2 usage or configuration error")


def test_bad_set_value_is_reported_from_the_command_line_not_the_defaults() -> None:
    with pytest.raises(ConfigError) as err:
        load_config(None, overrides={"audio.sample_rate": "abc"},
                    override_flags={"audio.sample_rate": "--set audio.sample_rate=abc"})
    assert str(err.value) == ('the command line (--set audio.sample_rate=abc): key \'audio.sample_rate\' has value '
                              '"abc"; allowed: integer >= 8000 <= 96000')
    assert err.value.exit_code == 2


def test_bad_value_is_reported_from_where_it_was_given(tmp_path: Path) -> None:
    path = write(tmp_path, "[audio]\nvad_aggressiveness = 7\n")
    # A good override beside a bad file value: the file is at fault.
    with pytest.raises(ConfigError, match=rf"^{re.escape(str(path))}: key 'audio.vad_aggressiveness' has value 7"):
        load_config(path, overrides={"audio.sample_rate": 22050})
    path = write(tmp_path, "[audio]\nsample_rate = 22050\n")
    # Without the option as typed, the message shows it as --set would.
    with pytest.raises(ConfigError, match=r"^the command line \(--set audio.sample_rate=10\): key 'audio.sample_rate'"):
        load_config(path, overrides={"audio.sample_rate": 10})
    with pytest.raises(ConfigError, match=r"^the command line \(--set audio.smaple_rate=1\): unknown key "
                                          r"'audio.smaple_rate'; allowed keys in \[audio\]: "):
        load_config(path, overrides={"audio.smaple_rate": 1})


def test_set_into_a_key_that_is_not_a_section(tmp_path: Path) -> None:
    path = write(tmp_path, "seed = 3\n")
    with pytest.raises(ConfigError, match=r"^the command line \(--set seed.x=1\): 'seed' is a key, not a section"):
        load_config(path, overrides={"seed.x": 1}, override_flags={"seed.x": "--set seed.x=1"})
    # With no seed in the file, the override makes seed a table: still the command line's fault.
    with pytest.raises(ConfigError, match=r"^the command line \(--set seed.x=1\): key 'seed' has value"):
        load_config(None, overrides={"seed.x": 1}, override_flags={"seed.x": "--set seed.x=1"})


def test_cross_field_rule_names_the_key_that_came_from_the_command_line(tmp_path: Path) -> None:
    with pytest.raises(ConfigError) as err:
        load_config(None, overrides={"audio.max_clip_s": 10})
    assert str(err.value) == ("the command line (--set audio.max_clip_s=10): key 'audio.segment_max_s' has value 15; "
                              "allowed: a number at most audio.max_clip_s (10)")
    path = write(tmp_path, "[audio]\nmax_clip_s = 10\n")
    with pytest.raises(ConfigError, match=rf"^{re.escape(str(path))}: key 'audio.segment_max_s' has value 15"):
        load_config(path)


@pytest.mark.parametrize("name", ["utf-9", "base64", "rot13"])
def test_transcript_encoding_must_be_a_text_encoding(tmp_path: Path, name: str) -> None:
    # base64 and rot13 are codecs Python knows, but not text encodings (bytes -> str).
    path = write(tmp_path, f'[ingest]\ntranscript_encoding = "{name}"\n')
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert str(err.value).startswith(f"{path}: key 'ingest.transcript_encoding' has value \"{name}\"; allowed: a "
                                     "text encoding Python knows, such as \"utf-8\", \"cp1252\"")


@pytest.mark.parametrize("name", ["utf-8", "Latin-1", "cp1252", "iso8859_15", "utf-16", "shift_jis"])
def test_transcript_encoding_accepts_python_codecs(tmp_path: Path, name: str) -> None:
    assert load_config(write(tmp_path, f'[ingest]\ntranscript_encoding = "{name}"\n')).ingest.transcript_encoding == name


def test_speakers_from_metadata_need_a_metadata_table(tmp_path: Path) -> None:
    path = write(tmp_path, '[ingest]\nspeaker_from = "metadata"\n')
    with pytest.raises(ConfigError, match=rf"^{re.escape(str(path))}: key 'ingest.metadata' is empty; allowed: the "
                                          r"metadata table"):
        load_config(path)


def test_one_speaker_and_speakers_from_metadata_exclude_each_other(tmp_path: Path) -> None:
    path = write(tmp_path, '[ingest]\nspeaker = "narrator"\nspeaker_from = "metadata"\nmetadata = "m.csv"\n')
    with pytest.raises(ConfigError, match=rf"^{re.escape(str(path))}: key 'ingest.speaker' has value \"narrator\"; "
                                          r"allowed: empty when ingest.speaker_from is \"metadata\""):
        load_config(path)
    assert load_config(write(tmp_path, '[ingest]\nspeaker = "narrator"\n')).ingest.speaker == "narrator"


def test_one_named_speaker_is_refused_in_a_pseudonymised_build(tmp_path: Path) -> None:
    # The resolved config is shared with a pseudonymised build: it must not name the speaker.
    path = write(tmp_path, '[ingest]\nspeaker = "narrator"\n[privacy]\npseudonymise = true\nkey_file = "k"\n')
    with pytest.raises(ConfigError, match=r"key 'ingest.speaker' has value \"narrator\"; allowed: empty when "
                                          r"privacy.pseudonymise is true"):
        load_config(path)


def test_duplicate_budget_stops_at_load(tmp_path: Path) -> None:
    path = write(tmp_path, '[split]\nlabelled_budgets = ["1h", "10m", "1h"]\n')
    with pytest.raises(ConfigError, match=rf"^{re.escape(str(path))}: key 'split.labelled_budgets' has value "
                                          r"\['1h', '10m', '1h'\]; allowed: each budget once \(1h appears twice\)"):
        load_config(path)


@pytest.mark.parametrize(("argv", "message"), [
    (["--set", "audio.sample_rate=abc"],
     "the command line (--set audio.sample_rate=abc): key 'audio.sample_rate' has value \"abc\""),
    (["--workers", "-1"], "the command line (--workers -1): key 'run.workers' has value -1; allowed: integer >= 0"),
    (["--set", "audio.sample_rate"], "--set 'audio.sample_rate': expected KEY=VALUE"),
    (["--set", "ingest.speaker_from=metadata"],
     "the command line (--set ingest.speaker_from=metadata): key 'ingest.metadata' is empty"),
])
def test_cli_configuration_errors_exit_2_and_name_the_option(
        tmp_path: Path, capsys: pytest.CaptureFixture[str], argv: list[str], message: str) -> None:
    from pipeline.commands.cli import main

    (tmp_path / "raw").mkdir()
    assert main(["prepare", str(tmp_path / "raw"), str(tmp_path / "out"), *argv]) == 2
    err = capsys.readouterr().err
    assert err.startswith("loam: error: ") and message in err, err
    assert "<defaults>" not in err


def test_cli_bad_config_file_exits_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from pipeline.commands.cli import main

    (tmp_path / "raw").mkdir()
    path = write(tmp_path, "[audio]\nsample_rate = 7\n")
    assert main(["prepare", str(tmp_path / "raw"), str(tmp_path / "out"), "--config", str(path)]) == 2
    assert f"{path}: key 'audio.sample_rate' has value 7" in capsys.readouterr().err
    assert main(["prepare", str(tmp_path / "raw"), str(tmp_path / "out"), "--config", str(tmp_path / "none.toml")]) == 2
    assert "none.toml: cannot read config file" in capsys.readouterr().err


def test_a_config_that_passed_is_not_checked_again_and_a_new_one_is(tmp_path: Path) -> None:
    import subprocess
    import sys

    checked = tmp_path / "out" / "cache" / "config-checked.txt"
    config = tmp_path / "corpus.toml"
    config.write_text("[audio]\nsample_rate = 22050\n", encoding="utf-8")
    first = load_config(config, checked=checked)
    assert len(checked.read_text(encoding="utf-8").split()) == 1
    # The same file in a fresh process: the same Config, without importing jsonschema.
    script = ("import sys; from pathlib import Path; from pipeline.core.config import load_config; "
              f"c = load_config(Path({str(config)!r}), checked=Path({str(checked)!r})); "
              "print(c.sha256(), 'jsonschema' in sys.modules)")
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True)
    assert done.stdout.split() == [first.sha256(), "False"]
    # Another value is checked (and refused) although a config passed before.
    with pytest.raises(ConfigError, match="audio.sample_rate"):
        load_config(config, overrides={"audio.sample_rate": 10}, checked=checked)
    assert len(checked.read_text(encoding="utf-8").split()) == 1
    for rate in range(16000, 16010):
        load_config(config, overrides={"audio.sample_rate": rate}, checked=checked)
    assert len(checked.read_text(encoding="utf-8").split()) == 8  # the last ones only
    # An unreadable record is no record: the check runs and the record is written anew.
    checked.write_bytes(b"\xff\xfe")
    assert load_config(config, checked=checked) == first
    assert len(checked.read_text(encoding="utf-8").split()) == 1
