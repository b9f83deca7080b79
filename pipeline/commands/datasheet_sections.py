"""The datasheet's Composition and Collection process sections, from the build."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from pipeline.commands.datasheet_facts import StageSoftware
from pipeline.commands.datasheet_sheet import Sheet, clock, hms, plural
from pipeline.commands.markdown import Md, md_code, md_table, md_text
from pipeline.core.config import Config
from pipeline.core.names import FLAGS, HELDOUT, LABELLED, SUBSETS, UNLABELLED

SPEAKERS_LISTED = 200


@dataclass(frozen=True)
class Build:
    """What the datasheet knows about one build."""

    summary: dict[str, Any]  # the report's summary.json
    config: Config  # the resolved config (the defaults when it is unreadable)
    config_read: bool  # whether config.resolved.json was read
    stages: dict[str, dict[str, Any]]  # each stage's summary.json ({} when missing)
    formats: list[dict[str, Any]]  # accepted sources by format and rate
    origins: dict[str, int]  # accepted sources by transcript origin
    software: list[StageSoftware]
    review: dict[str, dict[str, Any]]  # each stage summary's review entry, with file_exists

    def count(self, stage: str, key: str) -> int:
        """An integer from a stage summary; 0 when absent."""
        value = self.stages.get(stage, {}).get(key)
        return int(value) if isinstance(value, (int, float)) else 0


def composition(sheet: Sheet, b: Build) -> None:
    """Section 2: what the corpus holds."""
    s, cfg = b.summary, b.config
    t = s["totals"]
    sheet.heading(2, "2. Composition")
    sheet.ask(question="What does one instance of the corpus stand for?", built=[
        f"One clip of speech by one speaker: a mono 16-bit {cfg.audio.format.upper()} file at "
        f"{cfg.audio.sample_rate} Hz under `audio/`, described by one row of a subset manifest "
        "(`manifests/labelled.parquet`, `manifests/unlabelled.parquet`, `manifests/heldout.parquet`): its speaker, "
        "duration, span of the source recording, loudness, quality measures and flags and, when it is "
        "transcribed, its transcript, normalised text and phones."])
    sheet.ask(question="How many instances are there, of what kind?", built=[
        f"{plural(t['clips'], 'clip')}, {hms(t['seconds'])}, from {plural(t['speakers'], 'speaker')} in "
        f"{plural(t['groups'], 'split group')}; {t['transcribed_clips']} of the clips have a transcript.",
        md_table(["subset", "clips", "h:mm:ss", "speakers", "transcribed clips"],
                 [[name, v["clips"], Md(clock(v["seconds"])), v["speakers"], v["transcribed_clips"]]
                  for name, v in s["subsets"].items()])])
    sheet.ask(question="Which languages are spoken?", built=[_languages(b)])
    sheet.ask(question="Who speaks, and how much?", built=_speakers(s["speakers"]))
    sheet.ask("sampling", built=[
        f"Of the {plural(b.count('ingest', 'audio_files_found'), 'audio file')} found in the raw dump, "
        f"{b.count('ingest', 'audio_files_accepted')} were accepted and {b.count('ingest', 'audio_files_rejected')} "
        "set aside (section 4 lists every reason)."])
    sheet.ask(question="What is the label of an instance?", built=[_labels(b)])
    sheet.ask(question="Is any information missing from instances?", built=[_missing(b)])
    sheet.ask(question="Are instances related to each other?", built=[_relations(b)])
    sheet.ask(question="Are there recommended splits?", built=_splits(b))
    sheet.ask(question="Are there errors, noise or redundancies?", built=[
        "Clips carrying each quality flag, by subset (the flags are the `quality_flags` column; section 4 "
        "gives the thresholds and what each flag does):",
        md_table(["flag", *SUBSETS], [[Md(md_code(f)), *(v.get(n, 0) for n in SUBSETS)]
                                      for f, v in s["quality"]["flags"].items() if f in FLAGS])])
    sheet.ask(question="Is the corpus self-contained?", built=[
        "Yes for what a trainer reads: the clips, manifests and lexicon files are in the corpus folder (the "
        "folder above `report/`), and every manifest names its clip by a path relative to it. `source_path` names the recording in the raw dump "
        "each clip was cut from; the raw dump is not part of the corpus."])
    sheet.ask(question="Can individuals be identified from the corpus?", built=[_identification(b)])
    sheet.ask("subpopulations")
    sheet.ask("sensitive_content")


def _languages(b: Build) -> str:
    text = b.stages.get("text", {}).get("languages", {})
    rows = []
    for tag, x in b.summary.get("languages", {}).items():
        stage = text.get(tag, {}) if isinstance(text, dict) else {}
        engine = stage.get("engine")
        how = f"{stage.get('backend') or x.get('backend') or 'unknown'}" + (f" ({engine})" if engine else "")
        rows.append([Md(md_code(tag)), x.get("clips", 0), x.get("word_tokens", 0), Md(md_code(how))])
    table = md_table(["language (BCP-47)", "transcripts", "word tokens", "pronounced by"], rows,
                     empty="no transcript, so no language is recorded")
    return ("Transcripts by language as the text stage read them, with the backend that gave their phones (a "
            "transcribed clip that went to unlabelled keeps its transcript only with `split.keep_transcripts`):"
            "\n\n" + table)


def _speakers(speakers: dict[str, dict[str, float]]) -> list[str]:
    listed = list(speakers.items())[:SPEAKERS_LISTED]
    rows = [[Md(md_code(name)), *(Md(clock(3600 * v.get(n, 0.0))) for n in SUBSETS),
             Md(clock(3600 * sum(v.get(n, 0.0) for n in SUBSETS)))] for name, v in listed]
    blocks = ["Audio per speaker and subset (h:mm:ss), the speaker with the most audio first:",
              md_table(["speaker", *SUBSETS, "total"], rows, empty="no speaker")]
    if len(speakers) > SPEAKERS_LISTED:
        blocks.append(f"The other {len(speakers) - SPEAKERS_LISTED} speakers are in `report/summary.json`.")
    return blocks


def _labels(b: Build) -> str:
    s, o = b.summary, b.origins
    given = ", ".join(f"{n} from {_ORIGIN_WORDS.get(k, md_text(k))}" for k, n in o.items() if k != "none")
    phones = s["phones"]
    return (f"A transcript, where the raw dump gave one ({given or 'none given'}): the text as written "
            "(`transcript`), its normalised form (`norm_text`) and its phones (`phones`), from an inventory of "
            f"{plural(len(phones['inventory']), 'symbol')}. Labelled and scored held-out clips always have all "
            "three; clips without a transcript are untranscribed audio.")


_ORIGIN_WORDS = {"sidecar": "sidecar files", "metadata": "the metadata table", "review": "review decisions"}


def _missing(b: Build) -> str:
    s = b.summary["subsets"]
    untranscribed = {n: s[n]["clips"] - s[n]["transcribed_clips"] for n in SUBSETS}
    set_aside = b.count("ingest", "transcripts_set_aside")
    return (f"{plural(sum(untranscribed.values()), 'clip')} have no transcript ({untranscribed[UNLABELLED]} "
            f"unlabelled, {untranscribed[HELDOUT]} held-out, {untranscribed[LABELLED]} labelled). "
            f"{plural(set_aside, 'transcript')} of the raw dump were set aside (undecodable, empty or in "
            "conflict with another) and their audio kept as untranscribed; section 4 names them.")


def _relations(b: Build) -> str:
    pairs = b.summary["quality"]["near_duplicate_pairs"]
    segmented = b.count("audio", "sources_segmented")
    return (f"Clips of one speaker share `speaker`; clips of one split group share `group` (grouped by "
            f"{md_code(b.config.split.group_by, in_table=False)}), and a group is never on both sides of the "
            f"held-out split. {plural(segmented, 'long recording was', 'long recordings were')} cut into several "
            "clips, which share `source_path`. "
            f"{plural(len(pairs), 'near-duplicate pair was', 'near-duplicate pairs were')} found "
            "(`near_duplicate_of`); a pair is kept in one split group.")


def _splits(b: Build) -> list[str]:
    s, sp = b.summary, b.config.split
    held = s["subsets"][HELDOUT]
    rows = [[Md(md_code(tier)), Md(clock(v["budget_s"])), v["clips"], Md(clock(v["seconds"])), v["speakers"],
             Md("none" if v["phone_coverage"] is None else f"{100 * v['phone_coverage']:.1f} %")]
            for tier, v in s["tiers"].items()]
    return [
        f"Yes, the subsets: split by {md_code(sp.group_by, in_table=False)}, so no {md_text(sp.group_by)} is on "
        f"both sides; the held-out subset takes whole groups towards {md_code(sp.heldout, in_table=False)} of the "
        f"transcribed duration, ranked with seed {b.config.seed}; {held.get('scored_clips', 0)} of its clips have a "
        "transcript, and those with `scorable` true are the evaluation set. The labelled tiers are nested (each "
        f"holds every clip of the smaller ones), chosen by {md_code(sp.selection, in_table=False)} selection; the "
        "`tiers` column names the tiers a clip is in:",
        md_table(["tier", "budget", "clips", "selected", "speakers", "phone coverage"], rows, empty="no tier"),
        *_parts(s.get("parts")),
    ]


def _parts(parts: Any) -> list[str]:
    """The held-out parts and their sizes, as the report's summary records them."""
    if not isinstance(parts, dict) or not parts:
        return ["The held-out subset is not divided into parts (the report's summary records none)."]
    disjoint = {True: "yes", False: "no"}
    rows = [[Md(md_code(name)), v.get("clips", 0), Md(clock(v.get("seconds"))), v.get("speakers", 0),
             v.get("scorable_clips", "not recorded"),
             Md(clock(v["target_s"])) if isinstance(v.get("target_s"), (int, float)) else "none",
             disjoint.get(v.get("text_disjoint"), "not configured")]
            for name, v in parts.items() if isinstance(v, dict)]
    return ["The held-out subset is divided into parts (the `part` column), no group in two of them:",
            md_table(["part", "clips", "h:mm:ss", "speakers", "scorable clips", "target", "text-disjoint"], rows)]


def _identification(b: Build) -> str:
    if b.config.privacy.pseudonymise:
        ids = ("Speaker ids and source paths are keyed pseudonyms (HMAC-SHA-256, RFC 2104; "
               "`privacy.pseudonymise` is true): without the key nobody can recompute or reverse them. ")
    else:
        ids = ("Speaker ids and source paths are as the raw dump named them (`privacy.pseudonymise` is false), "
               "and such names often carry people's names. ")
    return ("Yes. A voice identifies its speaker whatever the ids, and transcripts may name people. " + ids
            + "See the caution on personal data at the top.")


def collection(sheet: Sheet, b: Build) -> None:
    """Section 3: how the recordings were gathered, as far as the raw dump shows it."""
    found = b.count("ingest", "audio_files_found")
    seconds = sum(row["seconds"] for row in b.formats)
    sheet.heading(2, "3. Collection process")
    sheet.ask(question="What did the raw dump hold?", built=[
        f"{plural(found, 'audio file')}, of which {b.count('ingest', 'audio_files_accepted')} were accepted: "
        f"{hms(seconds)} of audio from {plural(b.count('ingest', 'speakers'), 'speaker')}, in these formats "
        "and rates (what the recording devices and their software produced):",
        md_table(["format", "subtype", "channels", "sample rate (Hz)", "files", "h:mm:ss"],
                 [[Md(md_code(r["format"])), Md(md_code(r["subtype"])), r["channels"], r["sample_rate"], r["files"],
                   Md(clock(r["seconds"]))] for r in b.formats], empty="no accepted audio file"),
        f"Transcripts: {_origin_counts(b.origins)}; the metadata table had "
        f"{plural(b.count('ingest', 'metadata_rows'), 'row')}."])
    for key in ("collection", "timeframe", "consent", "consent_withdrawal", "ethical_review", "compensation"):
        sheet.ask(key)


def _origin_counts(origins: dict[str, int]) -> str:
    parts = [f"{n} from {_ORIGIN_WORDS.get(k, md_text(k))}" for k, n in origins.items() if k != "none"]
    parts.append(f"{origins.get('none', 0)} accepted files had none")
    return ", ".join(parts)
