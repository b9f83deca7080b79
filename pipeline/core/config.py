"""Corpus configuration: TOML in, a frozen dataclass out.

The JSON Schema in ``schemas/config.schema.json`` is the single source of
truth for keys, types, ranges and defaults; the dataclasses below mirror it and
a test keeps the two in step.
"""

from __future__ import annotations

import contextlib
import copy
import dataclasses
import hashlib
import json
import math
import os
import re
import sys
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pipeline.core.errors import ConfigError, ParameterError
from pipeline.core.schemas_io import load_schema

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on 3.10 only
    import tomli as tomllib


@dataclass(frozen=True)
class RunConfig:
    workers: int
    scheduler: str
    progress: bool


@dataclass(frozen=True)
class IngestConfig:
    extensions: tuple[str, ...]
    speaker: str
    speaker_from: str
    speaker_path_level: int
    sidecar_extension: str
    transcript_encoding: str
    metadata: str
    metadata_path_column: str
    metadata_transcript_column: str
    metadata_speaker_column: str
    metadata_language_column: str


@dataclass(frozen=True)
class AudioConfig:
    sample_rate: int
    channel: str | int
    resample_quality: str
    upsampled: str
    vad_aggressiveness: int
    vad_frame_ms: int
    min_speech_ms: int
    min_pause_ms: int
    hangover_ms: int
    pad_ms: int
    max_clip_s: float
    segment_min_s: float
    segment_max_s: float
    min_duration_s: float
    min_speech_ratio: float
    clip_level: float
    max_clipped_fraction: float
    unusable_clipped_fraction: float
    target_lufs: float
    peak_ceiling_dbfs: float
    true_peak: bool
    format: str
    quality_measures: bool
    align: str
    align_min_confidence: float
    align_snap_ms: int


@dataclass(frozen=True)
class TextConfig:
    backend: str
    lexicon: str
    override_lexicon: str
    oov: str
    punctuation: str
    keep_stress: bool
    word_boundary: str
    alphabet: str
    verbalise_numbers: bool
    abbreviations: tuple[tuple[str, str], ...]
    language_abbreviations: tuple[tuple[str, tuple[tuple[str, str], ...]], ...]
    language: str
    engines: tuple[tuple[str, str], ...]
    keep_tone: bool
    number_words: tuple[tuple[str, tuple[tuple[str, str], ...]], ...]

    @property
    def english(self) -> bool:
        """Whether the corpus language (``text.language``) is English."""
        return self.language.split("-")[0].lower() == "en"

    @property
    def resolved_backend(self) -> str:
        """The backend ``auto`` stands for: english for English, rules for any other language."""
        if self.backend != "auto":
            return self.backend
        return "english" if self.english else "rules"


@dataclass(frozen=True)
class PartSpec:
    """One held-out part of ``split.parts``: its name, its target (a share of
    ``split.heldout`` or a duration) and whether ``split.text_overlap`` applies to it."""

    name: str
    target: str
    text_disjoint: bool = True


@dataclass(frozen=True)
class SplitConfig:
    group_by: str
    heldout: str
    parts: tuple[PartSpec, ...]
    text_overlap: str
    balance_table: str
    balance_speaker_column: str
    balance_columns: tuple[str, ...]
    balance_tolerance: float
    labelled_budgets: tuple[str, ...]
    selection: str
    keep_transcripts: bool
    ledger: str


@dataclass(frozen=True)
class QualityConfig:
    min_snr_db: float
    noisy_action: str
    rate_max_abs_z: float
    rate_min_clips: int
    rate_min_spread: float
    rate_outlier_action: str
    near_duplicate_min_similarity: float
    min_bandwidth_hz: float
    narrowband_action: str
    clipped_action: str

    @property
    def gate_actions(self) -> dict[str, str]:
        """What each gate of :mod:`pipeline.stages.gates` does to the clips it flags."""
        return {"noisy": self.noisy_action, "narrowband": self.narrowband_action,
                "rate_outlier": self.rate_outlier_action, "clipped": self.clipped_action}


@dataclass(frozen=True)
class PrivacyConfig:
    pseudonymise: bool
    key_file: str
    mapping_file: str


@dataclass(frozen=True)
class DatasheetConfig:
    """Answers for the datasheet that only a person can give (``[datasheet]``); an
    empty string leaves the question marked as to be answered."""

    name: str
    purpose: str
    creators: str
    funding: str
    sampling: str
    subpopulations: str
    sensitive_content: str
    collection: str
    timeframe: str
    consent: str
    consent_withdrawal: str
    ethical_review: str
    compensation: str
    transcription: str
    raw_data: str
    uses_so_far: str
    intended_uses: str
    out_of_scope_uses: str
    known_limitations: str
    distribution: str
    licence: str
    third_party_restrictions: str
    maintainer: str
    contact: str
    updates: str
    retention: str
    contributions: str


@dataclass(frozen=True)
class Config:
    seed: int
    run: RunConfig
    ingest: IngestConfig
    audio: AudioConfig
    text: TextConfig
    split: SplitConfig
    quality: QualityConfig
    privacy: PrivacyConfig
    datasheet: DatasheetConfig
    # Folder that relative paths in the file (lexicons, ledger, key) resolve against.
    base_dir: str = field(default=".", compare=False)
    source: str = field(default="", compare=False)
    # Where each key given on the command line came from, as typed ("--set audio.x=1").
    overridden: Mapping[str, str] = field(default_factory=dict, compare=False)
    # Dotted keys the config file itself sets.
    file_keys: frozenset[str] = field(default=frozenset(), compare=False)

    def section(self, name: str) -> dict[str, Any]:
        """One section as plain JSON-ready data (used for stage parameter hashes)."""
        return _jsonable(getattr(self, name))

    def to_json(self) -> dict[str, Any]:
        """The resolved configuration, every default filled in."""
        out = {"seed": self.seed}
        for name in SECTIONS:
            out[name] = self.section(name)
        return out

    def sha256(self) -> str:
        """Hash of every setting that can change a manifest or a clip, i.e. all but the
        :data:`UNHASHED_SECTIONS`: the worker count never changes a manifest, and editing
        a datasheet answer rewrites no manifest's metadata."""
        settings = {k: v for k, v in self.to_json().items() if k not in UNHASHED_SECTIONS}
        return hashlib.sha256(canonical_json(settings)).hexdigest()

    def origin(self, *keys: str) -> str:
        """Where the value of a dotted key came from, for messages: the command-line option
        that set it, the config file, or the default. With several keys (a rule between
        two of them), the first one the command line set wins, then the file."""
        for key in keys:
            flag = _override_for(self.overridden, key)
            if flag is not None:
                return f"the command line ({flag})"
        if any(key in self.file_keys for key in keys) or not keys:
            return self.source
        return f"the default (not set in {self.source})" if _is_file(self.source) else "the default"

    def resolve_path(self, value: str) -> Path:
        """A path from the config file, relative to the config file's folder; always
        absolute, so it means the same file in a worker started elsewhere."""
        path = Path(value).expanduser()
        return Path(os.path.abspath(path if path.is_absolute() else Path(self.base_dir) / path))


_DURATION_RE = re.compile(r"^([0-9]+(?:\.[0-9]+)?)(s|m|h)$")
_UNIT_SECONDS = {"s": 1.0, "m": 60.0, "h": 3600.0}


def parse_duration_s(text: str) -> float:
    """Seconds in a duration such as "45s", "30m" or "1.5h".

    Examples
    --------
    >>> parse_duration_s("1.5h")
    5400.0
    """
    m = _DURATION_RE.match(text)
    if not m:
        raise ParameterError(f"text={text!r} is not a duration such as 45s, 30m or 2h")
    return float(m.group(1)) * _UNIT_SECONDS[m.group(2)]



SECTIONS = {
    "run": RunConfig,
    "ingest": IngestConfig,
    "audio": AudioConfig,
    "text": TextConfig,
    "split": SplitConfig,
    "quality": QualityConfig,
    "privacy": PrivacyConfig,
    "datasheet": DatasheetConfig,
}

# Sections that change no manifest or clip, left out of the config hash: how a run is
# carried out, and the datasheet's answers (only ``report/datasheet.md`` shows them).
UNHASHED_SECTIONS = ("run", "datasheet")


# Config tables (string to string) kept as sorted tuples of pairs in the frozen dataclasses.
_TABLES = frozenset({"abbreviations", "engines", "number_words", "language_abbreviations"})


def canonical_json(data: Any) -> bytes:
    """JSON with sorted keys and no whitespace: the bytes every hash is taken over."""
    return json.dumps(data, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()


def _jsonable(section: Any) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for f in dataclasses.fields(section):
        value = getattr(section, f.name)
        if f.name in _TABLES:
            value = {k: dict(v) if isinstance(v, tuple) else v for k, v in value}
        elif isinstance(value, tuple):
            value = [dataclasses.asdict(v) if dataclasses.is_dataclass(v) else v for v in value]
        out[f.name] = value
    return out


def _is_file(source: str) -> bool:
    """Whether ``source`` names a config file rather than "<defaults>" or "<config>"."""
    return bool(source) and not (source.startswith("<") and source.endswith(">"))


def _override_for(overridden: Mapping[str, str], key: str) -> str | None:
    """The command-line option that set ``key``, a section holding it, or a key under it
    (``--set seed.x=1`` makes ``seed`` a table)."""
    for dotted, flag in overridden.items():
        if dotted == key or key.startswith(dotted + ".") or dotted.startswith(key + "."):
            return flag
    return None


def _dotted_keys(data: Mapping[str, Any], prefix: str = "") -> frozenset[str]:
    """Every dotted key in nested config data, sections included."""
    keys: set[str] = set()
    for name, value in data.items():
        keys.add(prefix + name)
        if isinstance(value, Mapping):
            keys |= _dotted_keys(value, prefix + name + ".")
    return frozenset(keys)


def _fill_defaults(schema: dict[str, Any], data: dict[str, Any]) -> dict[str, Any]:
    """Apply the schema's defaults, recursing into object-valued properties."""
    out = copy.deepcopy(data)
    for key, sub in schema.get("properties", {}).items():
        if key not in out and "default" in sub:
            out[key] = copy.deepcopy(sub["default"])
        if sub.get("type") == "object" and "properties" in sub and isinstance(out.get(key), dict):
            out[key] = _fill_defaults(sub, out[key])
    return out


def _describe_allowed(rule_schema: dict[str, Any]) -> str:
    """A short phrase for what a schema node accepts."""
    if "enum" in rule_schema:
        return "one of " + ", ".join(json.dumps(v) for v in rule_schema["enum"])
    if "oneOf" in rule_schema:
        return " or ".join(_describe_allowed(s) for s in rule_schema["oneOf"])
    if "const" in rule_schema:
        return json.dumps(rule_schema["const"])
    kind = rule_schema.get("type", "value")
    parts = [kind if isinstance(kind, str) else "/".join(kind)]
    if "minimum" in rule_schema:
        parts.append(f">= {rule_schema['minimum']}")
    if "exclusiveMinimum" in rule_schema:
        parts.append(f"> {rule_schema['exclusiveMinimum']}")
    if "maximum" in rule_schema:
        parts.append(f"<= {rule_schema['maximum']}")
    if "pattern" in rule_schema:
        parts.append(f"matching {rule_schema['pattern']}")
    if kind == "array" and "items" in rule_schema:
        parts.append("of " + _describe_allowed(rule_schema["items"]))
    return " ".join(parts)


def _format_error(origin: Callable[[str], str], error: Any, schema: dict[str, Any]) -> str:
    """One schema error as a sentence; ``origin(dotted key)`` says where the value came from."""
    path = ".".join(str(p) for p in error.absolute_path)
    if error.validator == "additionalProperties":
        extra = sorted(set(error.instance) - set(error.schema.get("properties", {})))
        where = f"{path}." if path else ""
        allowed = ", ".join(sorted(error.schema.get("properties", {})))
        return (
            f"{origin(where + extra[0])}: unknown key '{where}{extra[0]}'; allowed keys"
            f"{' in [' + path + ']' if path else ''}: {allowed}"
        )
    # Describe the property's own schema, not the failing sub-rule, so the message
    # says everything that is allowed.
    node: dict[str, Any] = schema
    for part in error.absolute_path:
        node = node.get("properties", {}).get(part, node.get("items", {})) if isinstance(part, str) else node.get("items", {})
    return (
        f"{origin(path)}: key '{path}' has value {json.dumps(error.instance)}; "
        f"allowed: {_describe_allowed(node)}"
    )


def validate_config_data(data: dict[str, Any], *, source: str = "<config>",
                         overridden: Mapping[str, str] | None = None, checked: Path | None = None) -> dict[str, Any]:
    """Check raw config data against the schema and return it with defaults filled.

    A failing key that ``overridden`` (dotted key -> option as typed) names is reported
    as coming from the command line, any other from ``source``. ``checked`` is a file
    remembering the configs that passed (see :func:`_check_key`); None checks every time.
    """
    def origin(key: str) -> str:
        flag = _override_for(overridden or {}, key)
        return source if flag is None else f"the command line ({flag})"

    schema = load_schema("config")
    key = _check_key(data, schema) if checked is not None else None
    if key is None or key not in _passed(checked):
        from jsonschema import Draft202012Validator

        errors = sorted(Draft202012Validator(schema).iter_errors(data), key=lambda e: list(e.absolute_path))
        if errors:
            raise ConfigError(_format_error(origin, errors[0], schema))
        if key is not None and checked is not None:
            _remember_passed(checked, key)
    return _fill_defaults(schema, data)


# How many passed configs ``checked`` remembers (a few commands with different --set).
_CHECKS_KEPT = 8


def _check_key(data: dict[str, Any], schema: dict[str, Any]) -> str | None:
    """The hash of what the schema check's verdict depends on: the data as given, the
    schema and the jsonschema library's version. Importing jsonschema cost 0.10 CPU
    seconds of every ``loam prepare``; with the same three, the check passes again.
    None for data JSON cannot hold (TOML dates), which is always checked."""
    from pipeline.core.codeversion import library_version

    try:
        return hashlib.sha256(canonical_json({"data": data, "schema": schema,
                                              "jsonschema": library_version("jsonschema")})).hexdigest()
    except (TypeError, ValueError):
        return None


def _passed(checked: Path | None) -> list[str]:
    try:
        return Path(checked).read_text(encoding="utf-8").split() if checked is not None else []
    except (OSError, UnicodeError):
        return []


def _remember_passed(checked: Path, key: str) -> None:
    from pipeline.core.fsio import write_text_atomic

    keys = [k for k in _passed(checked) if k != key][-(_CHECKS_KEPT - 1):] + [key]
    # A cache: OUT is created right after the config is read, and a folder that cannot
    # be created is reported there, by the command.
    with contextlib.suppress(OSError):
        write_text_atomic(checked, "\n".join(keys) + "\n")


def _set_override(data: dict[str, Any], dotted: str, value: Any, *, flag: str) -> None:
    node = data
    *parents, leaf = dotted.split(".")
    for depth, part in enumerate(parents):
        node = node.setdefault(part, {})
        if not isinstance(node, dict):
            section = ".".join(parents[:depth + 1])
            raise ConfigError(f"the command line ({flag}): '{section}' is a key, not a section; "
                              "expected --set section.key=value with a key of that section")
    node[leaf] = value


def override_flag(dotted: str, value: Any) -> str:
    """How an override is shown in messages when the caller does not say how it was typed."""
    return f"--set {dotted}={value if isinstance(value, str) else json.dumps(value)}"


def build_config(
    data: dict[str, Any],
    *,
    source: str = "<config>",
    base_dir: str = ".",
    overrides: dict[str, Any] | None = None,
    override_flags: Mapping[str, str] | None = None,
    checked: Path | None = None,
) -> Config:
    """Validate raw data (plus dotted-key overrides from the command line) into a Config.

    ``override_flags`` maps an override's dotted key to the option as the user typed it
    (``--workers -1``), so a message about it names the command line, not the file.
    ``checked``: the file of configs that passed the schema check (``validate_config_data``).
    """
    file_keys = _dotted_keys(data)
    data = copy.deepcopy(data)
    overridden = {k: (override_flags or {}).get(k) or override_flag(k, v) for k, v in (overrides or {}).items()}
    for dotted, value in (overrides or {}).items():
        _set_override(data, dotted, value, flag=overridden[dotted])
    full = validate_config_data(data, source=source, overridden=overridden, checked=checked)
    sections = {}
    for name, cls in SECTIONS.items():
        values = dict(full[name])
        for f in dataclasses.fields(cls):
            if f.name == "parts":
                # text_disjoint left out means true, written out so the resolved config shows it.
                values[f.name] = tuple(PartSpec(p["name"], p["target"], p.get("text_disjoint", True))
                                       for p in values[f.name])
            elif f.name in _TABLES:
                values[f.name] = tuple(sorted((k, tuple(sorted(v.items())) if isinstance(v, dict) else v)
                                              for k, v in values[f.name].items()))
            elif isinstance(values[f.name], list):
                values[f.name] = tuple(values[f.name])
        sections[name] = cls(**values)
    cfg = Config(seed=full["seed"], base_dir=base_dir, source=source, overridden=overridden,
                 file_keys=file_keys, **sections)
    _check_cross_field(cfg)
    return cfg


def _check_cross_field(cfg: Config) -> None:
    """Rules a JSON Schema cannot express between two keys, or about a key's meaning."""
    a = cfg.audio
    if a.segment_min_s >= a.segment_max_s:
        raise ConfigError(
            f"{cfg.origin('audio.segment_min_s', 'audio.segment_max_s')}: key 'audio.segment_min_s' has value "
            f"{a.segment_min_s}; allowed: a number below audio.segment_max_s ({a.segment_max_s})"
        )
    if a.segment_max_s > a.max_clip_s:
        raise ConfigError(
            f"{cfg.origin('audio.segment_max_s', 'audio.max_clip_s')}: key 'audio.segment_max_s' has value "
            f"{a.segment_max_s}; allowed: a number at most audio.max_clip_s ({a.max_clip_s})"
        )
    if cfg.privacy.pseudonymise and not cfg.privacy.key_file:
        raise ConfigError(
            f"{cfg.origin('privacy.key_file', 'privacy.pseudonymise')}: key 'privacy.key_file' is empty; "
            "allowed: a path to the secret key file (required when privacy.pseudonymise is true)"
        )
    if cfg.text.backend == "lexicon" and not cfg.text.lexicon:
        raise ConfigError(
            f"{cfg.origin('text.lexicon', 'text.backend')}: key 'text.lexicon' is empty; allowed: a path to a "
            "lexicon TSV (required when text.backend is \"lexicon\")"
        )
    _check_ingest(cfg)
    _check_parts(cfg)
    budgets = cfg.split.labelled_budgets
    twice = sorted({b for b in budgets if budgets.count(b) > 1})
    if twice:
        raise ConfigError(
            f"{cfg.origin('split.labelled_budgets')}: key 'split.labelled_budgets' has value {list(budgets)}; "
            f"allowed: each budget once ({', '.join(twice)} appears twice)"
        )


def _check_parts(cfg: Config) -> None:
    """split.parts: unique names, targets all shares adding up to 100 % or all durations
    (with split.heldout unset), each above zero; balance columns with their table."""
    sc = cfg.split
    shown = json.dumps([dataclasses.asdict(p) for p in sc.parts])
    where = cfg.origin("split.parts")
    names = [p.name for p in sc.parts]
    twice = sorted({n for n in names if names.count(n) > 1})
    if twice:
        raise ConfigError(f"{where}: key 'split.parts' has value {shown}; allowed: each part name once "
                          f"({', '.join(twice)} appears twice)")
    shares = [p for p in sc.parts if p.target.endswith("%")]
    if shares and len(shares) != len(sc.parts):
        raise ConfigError(f"{where}: key 'split.parts' has value {shown}; allowed: targets that are all shares "
                          "of split.heldout (\"50%\") or all durations (\"30m\"), not a mix")
    zero = [p.name for p in sc.parts if float(p.target.rstrip("%smh")) <= 0]
    if zero:
        raise ConfigError(f"{where}: key 'split.parts' has value {shown}; allowed: every target above zero "
                          f"({', '.join(zero)} has none)")
    total = math.fsum(float(p.target[:-1]) for p in shares)
    if shares and abs(total - 100.0) > 1e-6:
        raise ConfigError(f"{where}: key 'split.parts' has value {shown}; allowed: shares of split.heldout "
                          f"that add up to 100% (these add up to {total:g}%)")
    if not shares and "split.heldout" in cfg.file_keys | set(cfg.overridden):
        raise ConfigError(f"{cfg.origin('split.heldout', 'split.parts')}: key 'split.heldout' has value "
                          f"{json.dumps(sc.heldout)} while split.parts gives every part a duration ({shown}); "
                          "allowed: one of the two (leave split.heldout unset: the held-out target is the parts' sum)")
    if bool(sc.balance_table) != bool(sc.balance_columns):
        raise ConfigError(f"{cfg.origin('split.balance_table', 'split.balance_columns')}: key "
                          f"'split.balance_columns' has value {json.dumps(list(sc.balance_columns))} and "
                          f"'split.balance_table' {json.dumps(sc.balance_table)}; allowed: both set (columns of "
                          "that table) or both empty")


def _check_ingest(cfg: Config) -> None:
    i = cfg.ingest
    if i.speaker_from == "metadata" and not i.metadata:
        raise ConfigError(
            f"{cfg.origin('ingest.metadata', 'ingest.speaker_from')}: key 'ingest.metadata' is empty; allowed: "
            "the metadata table (CSV or TSV, relative to RAW) to take speakers from (required when "
            "ingest.speaker_from is \"metadata\")"
        )
    if i.speaker and i.speaker_from == "metadata":
        raise ConfigError(
            f"{cfg.origin('ingest.speaker', 'ingest.speaker_from')}: key 'ingest.speaker' has value "
            f"{json.dumps(i.speaker)}; allowed: empty when ingest.speaker_from is \"metadata\" (one speaker "
            "for the whole dump, or each file's speaker from the metadata table, not both)"
        )
    if i.speaker and cfg.privacy.pseudonymise:
        raise ConfigError(
            f"{cfg.origin('ingest.speaker', 'privacy.pseudonymise')}: key 'ingest.speaker' has value "
            f"{json.dumps(i.speaker)}; allowed: empty when privacy.pseudonymise is true (config.resolved.json, "
            "which is shared with the build, would name the speaker; a flat dump is one speaker without it, "
            "or take the speaker from a metadata column)"
        )
    try:
        # An unknown name, or a codec that is not bytes -> text (base64, rot13), raises
        # LookupError; a one-byte input may simply not decode (UTF-16), which is fine.
        # (Empty input would not do: bytes.decode returns "" before looking the codec up.)
        b"a".decode(i.transcript_encoding)
    except UnicodeError:
        pass
    except LookupError:
        raise ConfigError(
            f"{cfg.origin('ingest.transcript_encoding')}: key 'ingest.transcript_encoding' has value "
            f"{json.dumps(i.transcript_encoding)}; allowed: a text encoding Python knows, such as \"utf-8\", "
            "\"cp1252\" (Windows Western European), \"latin-1\" or \"utf-16\" (the standard encodings of "
            "Python's codecs module)"
        ) from None


def load_config(path: str | Path | None, *, overrides: dict[str, Any] | None = None,
                override_flags: Mapping[str, str] | None = None, checked: Path | None = None) -> Config:
    """Read, validate and resolve a TOML config file (None: all defaults); see ``build_config``."""
    if path is None:
        return build_config({}, source="<defaults>", overrides=overrides, override_flags=override_flags,
                            checked=checked)
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read config file: {exc.strerror}") from exc
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{path}: config file is not UTF-8 (byte {exc.start})") from exc
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}") from exc
    return build_config(data, source=str(path), base_dir=str(path.parent), overrides=overrides,
                        override_flags=override_flags, checked=checked)
