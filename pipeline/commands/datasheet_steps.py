"""The datasheet's Preprocessing section: every step with its parameters and software,
the rejects by reason, the review decisions applied and the pseudonymisation."""

from __future__ import annotations

import json
import platform
from pathlib import PurePath
from typing import Any

from pipeline import __version__
from pipeline.commands.datasheet_sections import Build
from pipeline.commands.datasheet_sheet import Sheet, plural
from pipeline.commands.markdown import Md, md_code, md_table, md_text
from pipeline.commands.reasons import meaning
from pipeline.core.config import parse_duration_s

# Keys holding a path: the datasheet shows the file's name only (never a folder of the
# machine that built it), and for the privacy files only whether one is set.
_FILE_NAME_KEYS = frozenset({"text.lexicon", "text.override_lexicon", "split.ledger"})
_SECRET_KEYS = frozenset({"privacy.key_file", "privacy.mapping_file"})


def parameters(b: Build, *sections: str) -> str:
    """A table of every key of ``sections`` of the resolved config and its value."""
    rows = []
    for section in sections:
        for key, value in b.config.section(section).items():
            dotted = f"{section}.{key}"
            if dotted in _SECRET_KEYS:
                shown = Md("set, not shown" if value else "not set")
            elif dotted in _FILE_NAME_KEYS and value:
                shown = Md(md_code(PurePath(str(value)).name))
            else:
                shown = Md(md_code(json.dumps(value, ensure_ascii=False, sort_keys=True)))
            rows.append([Md(md_code(dotted)), shown])
    return md_table(["parameter", "value"], rows)


def _software(b: Build, stage: str) -> str:
    for sw in b.software:
        if sw.stage == stage:
            libraries = ", ".join(sw.libraries) or "none"
            note = ("" if sw.same_code else
                    f" These are the installed versions: the outputs were written by other code (code version "
                    f"{md_code(sw.recorded_version or 'unknown', in_table=False)}, installed "
                    f"{md_code(sw.installed_version, in_table=False)}), so they may differ.")
            return f"Libraries its code can run: {md_text(libraries)}.{note}"
    return ""


def preprocessing(sheet: Sheet, b: Build) -> None:
    """Section 4: what Loam did to the raw dump, step by step."""
    sheet.heading(2, "4. Preprocessing, cleaning and labelling")
    sheet.ask(question="What preprocessing, cleaning and labelling was done?", built=[
        f"Loam {__version__} (Python {platform.python_version()}) ran four steps over the raw dump, which it only "
        f"reads. The configuration in force is `config.resolved.json` (SHA-256 "
        f"{md_code(b.summary.get('config_sha256') or 'unknown', in_table=False)}); the seed of every ranked or "
        f"random choice is {b.config.seed}."
        + ("" if b.config_read else " `config.resolved.json` could not be read: the parameters below are "
           "Loam's defaults, not necessarily those of the build.")])
    for title, stage, sections, what in _STEPS:
        sheet.heading(3, title)
        sheet.add(what(b), parameters(b, *sections), _software(b, stage))
    sheet.ask(question="What was set aside, and why?", built=_rejects(b.summary["rejects"]))
    sheet.ask(question="Were review decisions applied?", built=_review(b))
    sheet.ask(question="Were names replaced by pseudonyms?", built=[_pseudonyms(b)])
    sheet.ask("transcription")
    sheet.ask("raw_data", built=[
        "Loam never writes to the raw dump; each clip's `source_path`, `source_start_s` and `source_end_s` "
        "lead back to the span of the raw recording it came from."])


def _ingest(b: Build) -> str:
    c = b.count
    return (f"Walked the raw dump in sorted order, probed every audio file and hashed its bytes (SHA-256), took "
            "each file's speaker and paired its transcript from a sidecar file or the metadata table, and set "
            f"aside broken, duplicate and unreadable inputs. Here: {plural(c('ingest', 'audio_files_found'), 'audio file')} "
            f"found, {c('ingest', 'audio_files_accepted')} accepted, {c('ingest', 'audio_files_rejected')} set aside; "
            f"{plural(c('ingest', 'transcribed'), 'file')} with a transcript, "
            f"{plural(c('ingest', 'transcripts_set_aside'), 'transcript')} set aside.")


def _audio(b: Build) -> str:
    a, c = b.config.audio, b.count
    peak = "true peak (4x oversampling)" if a.true_peak else "sample peak"
    return (f"Decoded each file, downmixed it ({md_code(a.channel, in_table=False)}), resampled it to "
            f"{a.sample_rate} Hz with soxr ({a.resample_quality}), found speech with webrtcvad (aggressiveness "
            f"{a.vad_aggressiveness}), trimmed silence keeping {a.pad_ms} ms, cut untranscribed recordings longer "
            f"than {a.max_clip_s:g} s at pauses into clips of {a.segment_min_s:g} to {a.segment_max_s:g} s, "
            f"normalised loudness to {a.target_lufs:g} LUFS (ITU-R BS.1770-4) under a {a.peak_ceiling_dbfs:g} dBFS "
            f"{peak} ceiling, and wrote 16-bit {a.format.upper()}. Here: {plural(c('audio', 'sources'), 'source')} "
            f"gave {plural(c('audio', 'clips'), 'clip')}; {c('audio', 'sources_segmented')} cut into segments, "
            f"{c('audio', 'upsampled_sources')} below the output rate, {c('audio', 'peak_limited_clips')} peak-limited."
            + _aligned(b))


def _aligned(b: Build) -> str:
    """The alignment of long transcribed recordings (pipeline.stages.alignment), when on."""
    a = b.config.audio
    if a.align == "off":
        return (f" Transcribed recordings longer than {a.max_clip_s:g} s were not aligned to their transcripts "
                "(`audio.align` is off): they were set aside.")
    aligned = b.stages.get("audio", {}).get("aligned_sources", {})
    return (f" Transcribed recordings longer than {a.max_clip_s:g} s were aligned to their transcripts sentence by "
            "sentence (a synthetic reading by espeak-ng, MFCCs, dynamic time warping, cuts snapped to pauses within "
            f"{a.align_snap_ms} ms); sentences placed with confidence at least {a.align_min_confidence:g} became "
            f"transcribed clips, the rest of their audio untranscribed clips. Here: "
            f"{plural(len(aligned), 'recording')} aligned.")


def _text(b: Build) -> str:
    t, c = b.config.text, b.count
    languages = b.stages.get("text", {}).get("languages", {})
    how = "; ".join(f"{md_code(tag, in_table=False)}: {md_text(x.get('backend'))}"
                    + (f" ({md_code(x['engine'], in_table=False)})" if x.get("engine") else "")
                    + f", {x.get('accepted', 0)} of {x.get('transcripts', 0)} accepted"
                    for tag, x in sorted(languages.items()) if isinstance(x, dict))
    return (f"Normalised each transcript (Unicode NFC, case, punctuation {t.punctuation}, numbers "
            f"{'spelt out' if t.verbalise_numbers else 'left as written'}, abbreviations expanded) and converted "
            f"it to phones with the {md_code(t.backend, in_table=False)} backend. By language: {how or 'none'}. "
            f"Here: {plural(c('text', 'accepted'), 'transcript')} accepted of {c('text', 'transcripts')}; "
            f"{plural(c('text', 'oov_words'), 'word')} outside the dictionary got a predicted pronunciation, "
            "listed for review in `lexicon/predicted.tsv`.")


def _split(b: Build) -> str:
    sp, q, c = b.config.split, b.config.quality, b.stages.get("split", {})
    budgets = ", ".join(sorted(sp.labelled_budgets, key=parse_duration_s))
    gates = ", ".join(f"{gate} {action}" for gate, action in q.gate_actions.items())
    ledger = c.get("ledger", {}) if isinstance(c.get("ledger"), dict) else {}
    inside = ledger.get("path") and not PurePath(str(ledger["path"])).is_absolute()
    return (f"Grouped the clips by {md_code(sp.group_by, in_table=False)}, held out whole groups towards "
            f"{md_code(sp.heldout, in_table=False)} of the transcribed duration (ranked with seed {b.config.seed}), "
            f"chose nested labelled tiers of {budgets} by {md_code(sp.selection, in_table=False)} selection, applied "
            f"the quality gates ({gates}) and recorded every assignment in the split ledger "
            f"({md_code(ledger['path'], in_table=False) + ' in the corpus folder' if inside else 'kept outside the corpus folder'}). "
            f"Here: {plural(int(c.get('groups', 0)), 'group')}, {int(c.get('heldout_groups', 0))} held out.")


_STEPS = (
    ("Step 1: ingest", "ingest", ("ingest", "privacy"), _ingest),
    ("Step 2: audio", "audio", ("audio",), _audio),
    ("Step 3: text", "text", ("text",), _text),
    ("Step 4: split and quality gates", "split", ("split", "quality"), _split),
)


def _rejects(rejects: dict[str, Any]) -> list[str]:
    rows = []
    for reason, n in rejects.get("by_reason", {}).items():
        example = (rejects.get("examples", {}).get(reason) or [{}])[0]
        rows.append([Md(md_code(reason)), meaning(reason), Md(md_code(example.get("stage"))), n,
                     example.get("detail") or ""])
    return [f"{plural(int(rejects.get('total', 0)), 'input')} of the raw dump are in "
            "`manifests/rejected.parquet`, each with its reason code and a sentence naming the input:",
            md_table(["reason", "what it means", "stage", "inputs", "one of the sentences"], rows,
                     empty="nothing was set aside")]


def _review(b: Build) -> list[str]:
    """What the stages did with the decisions recorded by ``loam review``, from their summaries."""
    if not b.review:
        return ["None: no stage summary of this build records review decisions (`stages/*.summary.json` have "
                "no `review` entry), so no decisions file was read."]
    named = sorted({str(e.get("decisions_file") or "") for e in b.review.values()} - {""})
    shown = ", ".join(md_code(PurePath(n).name, in_table=False) + (" in the corpus folder" if not
                                                                   PurePath(n).is_absolute() else
                                                                   " beside the split ledger, outside the corpus folder")
                      for n in named) or "none named"
    if not any(e["file_exists"] for e in b.review.values()):
        return [f"None: no review decisions file exists for this build ({shown}); `loam review` writes one."]
    rows = [[Md(md_code(stage)), e.get("applied_total", 0), _counts(e.get("applied")),
             e.get("not_applied_total", 0), _counts(e.get("not_applied"))] for stage, e in sorted(b.review.items())]
    return [f"The decisions file ({shown}) holds what `loam review` recorded; each stage applied its share "
            "(transcripts and pronunciations in text, keep and exclude in split) and counted what it could not "
            "apply, and why. Decisions recorded after the last `loam prepare` wait for the next one.",
            md_table(["stage", "applied", "by kind", "not applied", "why"], rows)]


def _counts(counts: object) -> Md:
    if not isinstance(counts, dict) or not counts:
        return Md("none")
    return Md(", ".join(f"{md_code(k)} {int(v)}" for k, v in sorted(counts.items())))


def _pseudonyms(b: Build) -> str:
    if b.config.privacy.pseudonymise:
        return ("Yes: every speaker id is `spk-` and every source path `src-` followed by 16 hex digits of "
                "HMAC-SHA-256 of the real name under a secret key kept outside the corpus folder (RFC 2104), and "
                "reject sentences have the raw dump's names replaced. The mapping back is not in the corpus folder.")
    return ("No: `privacy.pseudonymise` is false, so speaker ids, source paths and reject sentences keep the "
            "raw dump's names.")
