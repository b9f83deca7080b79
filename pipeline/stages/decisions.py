"""Review decisions: the file ``loam review`` appends to and the next ``prepare`` applies.

The file is JSON Lines, recorded beside the split ledger (``ledger.tsv`` ->
``ledger.decisions.jsonl``) and meant to be committed with it. Its first line names
the format; every other line is one decision, appended under a lock, never rewritten::

    {"loam_review_decisions": 1}
    {"decision": "fix_transcript", "clip_id": "alder_01-0123456789", "source_sha256": "0123...", ...}

Fields: ``decision`` (one of :data:`KINDS`), ``clip_id`` and ``source_sha256`` (the
SHA-256 of the source file the clip was cut from, as ingest recorded it), ``audio_sha256``
(the clip as heard), ``source_path`` (as OUT names it, pseudonymised when the build is),
and by kind ``transcript`` (fix_transcript), ``reason`` and ``note`` (exclude), ``word``,
``phones`` and ``language`` (pronunciation); ``at`` is the time of the decision (UTC),
for people only.

A clip has one verdict: the last of its keep, fix_transcript, wrong_transcript and
exclude lines counts and earlier ones are superseded. A word has one pronunciation per
language: the last pronunciation line counts. A decision applies to the audio that was
heard: a clip id ends in the first ten hex digits of its source's SHA-256, so when the
recording changes its clips get new ids and the decision, now naming a clip the build
no longer has, is reported as not applied (``audio_changed`` when a clip of the same
source path is there, ``clip_gone`` otherwise); the text stage also compares the full
hash. The text stage applies transcript and pronunciation decisions, the split stage
keep and exclude; each stage's summary has a ``review`` entry counting what it applied
and what it could not apply and why, and the split stage also counts the lines it could
not read and the superseded ones, so every line is counted once. The text stage's input
hash covers only its share of the file (``extra_digest``), so a keep or an exclusion
reruns the split stage alone.
"""

from __future__ import annotations

import json
import os
import re
from collections import Counter
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pipeline.core.config import Config
from pipeline.core.errors import ParameterError
from pipeline.stages.ledger import locate_ledger

FORMAT_KEY = "loam_review_decisions"
FORMAT_VERSION = 1
KINDS = ("keep", "fix_transcript", "wrong_transcript", "exclude", "pronunciation")
# The verdicts on a clip, of which the last counts; which stage applies which.
VERDICTS = ("keep", "fix_transcript", "wrong_transcript", "exclude")
TEXT_KINDS = ("fix_transcript", "wrong_transcript", "pronunciation")
SPLIT_KINDS = ("keep", "exclude")
# Why a decision was not applied (the keys of a summary's review.not_applied).
WHY = ("unreadable", "superseded", "clip_gone", "audio_changed", "not_a_whole_file", "transcript_rejected",
       "invalid_phones", "override_conflict")
_SHA = re.compile(r"^[0-9a-f]{64}$")
_PHONE = re.compile(r"^[^\s]+$")
_MAX_TEXT = 2000


@dataclass(frozen=True)
class Decision:
    """One line of the decisions file (``line`` counts from 1, the format line included)."""

    line: int
    decision: str
    clip_id: str
    source_sha256: str = ""
    audio_sha256: str = ""
    source_path: str = ""
    transcript: str = ""
    reason: str = ""
    note: str = ""
    word: str = ""
    phones: tuple[str, ...] = ()
    language: str = ""


@dataclass
class Tally:
    """What a stage did with the decisions it owns: counts, and a sentence per decision not applied."""

    applied: Counter[str] = field(default_factory=Counter)
    not_applied: Counter[str] = field(default_factory=Counter)
    sentences: list[str] = field(default_factory=list)

    def skip(self, d: Decision | None, why: str, sentence: str) -> None:
        self.not_applied[why] += 1
        self.sentences.append(f"line {d.line}: {sentence}" if d is not None else sentence)

    def summary(self, path: str) -> dict[str, Any]:
        return {"decisions_file": path, "applied": dict(sorted(self.applied.items())),
                "applied_total": sum(self.applied.values()),
                "not_applied": dict(sorted(self.not_applied.items())),
                "not_applied_total": sum(self.not_applied.values())}


def decisions_path(ledger_path: Path) -> Path:
    """Where a ledger's decisions are recorded: beside it.

    Examples
    --------
    >>> decisions_path(Path("corpus/corpus.ledger.tsv")).name
    'corpus.ledger.decisions.jsonl'
    """
    return ledger_path.with_name(f"{ledger_path.stem}.decisions.jsonl")


def locate_decisions(config: Config, *, raw: Path, out: Path) -> Path:
    """The decisions file of a build: beside its ledger (never inside RAW, as the ledger)."""
    return decisions_path(locate_ledger(config, raw=raw, out=out)[0])


def check_decision(record: dict[str, Any]) -> Decision:
    """A decision from one JSON object; ParameterError naming the field when it is malformed.

    Examples
    --------
    >>> d = check_decision({"decision": "exclude", "clip_id": "a-0123456789", "reason": "not speech"})
    >>> d.decision, d.reason
    ('exclude', 'not speech')
    >>> check_decision({"decision": "shrug", "clip_id": "x"})
    Traceback (most recent call last):
    ...
    pipeline.core.errors.ParameterError: field 'decision' has value 'shrug'; expected one of keep, fix_transcript, wrong_transcript, exclude, pronunciation
    """
    kind = record.get("decision")
    if kind not in KINDS:
        raise ParameterError(f"field 'decision' has value {kind!r}; expected one of {', '.join(KINDS)}")
    text = {k: record.get(k, "") for k in ("clip_id", "source_sha256", "audio_sha256", "source_path", "transcript",
                                            "reason", "note", "word", "language")}
    for key, value in text.items():
        if not isinstance(value, str) or len(value) > _MAX_TEXT:
            raise ParameterError(f"field {key!r} has value {str(value)[:40]!r}; expected a string of at most "
                                 f"{_MAX_TEXT} characters")
    if not text["clip_id"] and kind != "pronunciation":
        raise ParameterError("field 'clip_id' is empty; expected the clip's id")
    for key in ("source_sha256", "audio_sha256"):
        if text[key] and not _SHA.match(text[key]):
            raise ParameterError(f"field {key!r} has value {text[key]!r}; expected 64 lowercase hex digits")
    if kind == "fix_transcript" and not text["transcript"].strip():
        raise ParameterError("field 'transcript' is empty; expected the corrected transcript")
    phones = record.get("phones", [])
    if kind == "pronunciation":
        if not text["word"] or any(c.isspace() for c in text["word"]):
            raise ParameterError(f"field 'word' has value {text['word']!r}; expected one word")
        if (not isinstance(phones, list) or not phones
                or not all(isinstance(p, str) and _PHONE.match(p) for p in phones)):
            raise ParameterError(f"field 'phones' has value {phones!r}; expected a list of phone symbols")
    return Decision(line=0, decision=kind, phones=tuple(phones) if kind == "pronunciation" else (), **text)


def read_decisions(path: Path) -> tuple[list[Decision], list[tuple[int, str]]]:
    """Every decision of the file in order, and ``(line, why)`` for each line it could not read.

    A missing file holds no decision. Bad lines never stop a build: each is reported.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     p = Path(tmp) / "d.jsonl"
    ...     _ = p.write_text('{"loam_review_decisions": 1}\\n{"decision": "keep", "clip_id": "a"}\\nnot json\\n')
    ...     found, bad = read_decisions(p)
    >>> [d.decision for d in found], bad
    (['keep'], [(3, 'not a JSON object')])
    """
    try:
        lines = path.read_bytes().decode("utf-8", "replace").splitlines()
    except FileNotFoundError:
        return [], []
    found: list[Decision] = []
    bad: list[tuple[int, str]] = []
    for number, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        try:
            record = json.loads(line)
            if not isinstance(record, dict):
                raise ValueError
        except ValueError:
            bad.append((number, "not a JSON object"))
            continue
        if FORMAT_KEY in record:
            if record[FORMAT_KEY] != FORMAT_VERSION:
                bad.append((number, f"format {record[FORMAT_KEY]!r}; expected {FORMAT_VERSION}"))
            continue
        try:
            d = check_decision(record)
        except ParameterError as exc:
            bad.append((number, str(exc)))
            continue
        found.append(Decision(**{**d.__dict__, "line": number}))
    return found, bad


def effective(decisions: Iterable[Decision]) -> tuple[dict[str, Decision], dict[tuple[str, str], Decision],
                                                       list[Decision]]:
    """The verdict in force per clip, the pronunciation per (language, word), and the superseded lines."""
    verdicts: dict[str, Decision] = {}
    words: dict[tuple[str, str], Decision] = {}
    superseded: list[Decision] = []
    for d in decisions:
        table: dict[Any, Decision] = words if d.decision == "pronunciation" else verdicts
        key: Any = (d.language, d.word) if d.decision == "pronunciation" else d.clip_id
        if key in table:
            superseded.append(table[key])
        table[key] = d
    return verdicts, words, sorted(superseded, key=lambda d: d.line)


def missing_clip(d: Decision, paths: dict[str, str]) -> tuple[str, str]:
    """Why a decision's clip is not in the build: ``audio_changed`` when another clip of the
    same source path is (the recording was replaced), else ``clip_gone``; and the sentence."""
    now = paths.get(d.source_path) if d.source_path else None
    if now is not None:
        return "audio_changed", (f"{d.decision} for clip {d.clip_id} ({d.source_path}) not applied: the audio "
                                 f"changed since the review (that file is now clip {now}); review it again")
    return "clip_gone", f"{d.decision} for clip {d.clip_id} not applied: no such clip in this build"


def append_decision(path: Path, record: dict[str, Any]) -> Decision:
    """Check ``record`` and append it as one line under an exclusive lock, creating the file
    with its format line; two reviewers appending at once both keep their lines."""
    decision = check_decision(record)
    line = json.dumps(record, ensure_ascii=False, sort_keys=True) + "\n"
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        _lock(fd)
        if os.fstat(fd).st_size == 0:
            os.write(fd, (json.dumps({FORMAT_KEY: FORMAT_VERSION}) + "\n").encode())
        os.write(fd, line.encode("utf-8"))
        os.fsync(fd)
    finally:
        os.close(fd)  # closing releases the lock
    return decision


def _lock(fd: int) -> None:
    try:
        import fcntl
    except ImportError:  # Windows: O_APPEND writes of one line each still land whole
        return
    fcntl.flock(fd, fcntl.LOCK_EX)
