"""Text stage: normalise each transcript, pronounce its words, set aside what cannot be used.

Reads the ingest rows that have a transcript; a transcribed source is one clip,
so ``clip_id`` is the ingest ``source_id``, except a long source the audio stage cut by
aligning its transcript, whose transcribed clips each get their sentences. Writes:

``stages/text.parquet``    one row per accepted transcript (``schemas/text.schema.json``),
                           sorted by clip_id;
rejects                    ``empty_transcript`` (nothing left after normalisation),
                           ``bad_characters`` (characters the backend cannot take),
                           ``oov`` (lexicon backend, a word the lexicon lacks, with
                           ``text.oov = "reject"``) and ``unpronounceable`` (no word,
                           or a word with no phones);
``lexicon/predicted.tsv``  every out-of-vocabulary word (one CMUdict or the lexicon
                           lacks) with the pronunciation it was given and its count,
                           most frequent first (ties by word). Correct lines, point
                           ``text.override_lexicon`` at the file (or a copy) and run
                           again: override entries win over every backend, and stay
                           listed in the file with source "override".

English-only steps (the built-in abbreviation table and spelled initialisms) run
with the english backend only. Numbers follow ``text.verbalise_numbers``, and the
abbreviations of ``[text.abbreviations]`` apply with every backend.

Each transcript has a language (``text.language``, or the metadata table's language
column), kept in the manifest's ``language`` column; :mod:`pipeline.stages.languages`
gives each language its pronouncer, normalisation options and number reader, and the
summary its word tokens and OOV rate (``languages``), warning when a dictionary backend
leaves more than 30 % of a language's tokens out of vocabulary. Two more rejects:
``unreadable_number`` (digits no reader covers in that language) and, from the rules
backend, ``unpronounceable`` naming a symbol the IPA feature table lacks.
"""

from __future__ import annotations

import contextlib
import hashlib
from collections import Counter
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from pipeline.core import outputs_record
from pipeline.core.codeversion import code_version
from pipeline.core.columns import counted_items, row_members
from pipeline.core.config import Config, TextConfig, canonical_json
from pipeline.core.errors import ParameterError
from pipeline.core.fsio import sha256_file, write_text_atomic
from pipeline.core.manifest import arrow_schema, table_from_rows
from pipeline.core.names import PREDICTED_LEXICON, stage_manifest
from pipeline.core.stage import Output, Stage, StageContext, StageResult, reject
from pipeline.stages.languages import (
    LANGUAGE_TAG,
    Toolbox,
    canonical_tag,
    language_cells,
    language_metadata,
    language_summary,
    metadata_table,
    process_in_language,
    rule_phones,
    warn_wrong_language,
)
from pipeline.stages.review_apply import log_tally
from pipeline.stages.review_text import (
    TextPlan,
    count_fixes,
    count_words,
    merged_override,
    plan_text,
    review_items,
    text_decisions,
    text_digest,
)
from pipeline.text.characters import describe_characters, grapheme_units
from pipeline.text.lexicon import read_lexicon
from pipeline.text.neural import neural_cache_name
from pipeline.text.normalise import Normalised, load_abbreviations, normalise
from pipeline.text.pronounce import Pronouncer, Pronunciation

NAME = "text"
MAIN_MANIFEST = stage_manifest(NAME)
_SHOWN_CHARS = 60


def _lexicon_paths(config: Config) -> dict[str, Path]:
    cfg = config.text
    paths = {}
    if cfg.resolved_backend == "lexicon" and cfg.lexicon:
        paths["lexicon"] = config.resolve_path(cfg.lexicon)
    if cfg.override_lexicon:
        paths["override_lexicon"] = config.resolve_path(cfg.override_lexicon)
    return paths


def extra_inputs(ctx: StageContext) -> list[Path]:
    """Files besides the ingest manifest whose content changes this stage's output
    (the lexicons, and the metadata table when its language column is read; its share of
    the review decisions is hashed by ``extra_digest``)."""
    table = metadata_table(ctx.config, ctx.raw)
    return sorted([*_lexicon_paths(ctx.config).values(), *([table] if table is not None else [])])


def written_files(out: Path, table: object) -> list[str]:
    """The predicted lexicon beside the manifest (see pipeline.core.stage)."""
    return [PREDICTED_LEXICON]


def build_pronouncer(config: Config, *, cache_dir: Path | None, review: TextPlan | None = None) -> Pronouncer:
    """The Pronouncer for ``config.text``; lexicon files are read (UsageError if malformed);
    ``review`` adds the reviewed pronunciations of ``config.text.language`` to the override."""
    cfg = config.text
    paths = _lexicon_paths(config)
    override = read_lexicon(paths["override_lexicon"]) if "override_lexicon" in paths else {}
    if review is not None:
        override = merged_override(review, cfg.language, override, backend=cfg.resolved_backend)
    cache_path = None
    if cfg.resolved_backend == "english" and cache_dir is not None:
        cache_path = cache_dir / "g2p" / neural_cache_name(code_version=code_version(NAME, cache_dir=cache_dir))
    return Pronouncer(
        backend=cfg.resolved_backend,
        rules=rule_phones(cfg),
        lexicon=read_lexicon(paths["lexicon"]) if "lexicon" in paths else None,
        override=override or None,
        oov=cfg.oov,
        alphabet=cfg.alphabet,
        keep_stress=cfg.keep_stress,
        cache_path=cache_path,
    )


def normalise_options(cfg: TextConfig, pronouncer: Pronouncer) -> dict[str, Any]:
    """Keyword arguments for ``normalise`` under this configuration."""
    english = cfg.resolved_backend == "english"
    abbreviations = load_abbreviations() if english else {}
    abbreviations.update(dict(cfg.abbreviations))
    return {
        "punctuation": cfg.punctuation,
        "verbalise_numbers": cfg.verbalise_numbers,
        "abbreviations": abbreviations,
        "spell_initialisms": english,
        "is_known": pronouncer.is_known if english else None,
    }


def _shown(text: str) -> str:
    return repr(text if len(text) <= _SHOWN_CHARS else text[: _SHOWN_CHARS - 3] + "...")


def _quoted(words: list[str]) -> str:
    return ", ".join(repr(w) for w in words)


def _bad_characters_detail(source: str, found: dict[str, list[str]], cfg: TextConfig) -> str:
    chars = [ch for chars in found.values() for ch in chars]
    where = _quoted(list(found))
    if cfg.backend == "english":
        expected = "letters a-z (accents are removed) and apostrophes, or the word in text.override_lexicon"
    elif cfg.alphabet:
        expected = f"only characters of text.alphabet ({cfg.alphabet!r}), or the word in text.override_lexicon"
    else:
        expected = "letters, combining marks and apostrophes (text.alphabet is empty)"
    return (f"{source}: transcript has characters the {cfg.backend} backend cannot take: "
            f"{describe_characters(chars)} (in {where}); expected {expected}")


@dataclass
class TranscriptOutcome:
    """What became of one transcript: a manifest row or a reject, and its OOV words."""

    row: dict[str, Any] | None = None
    rejected: tuple[str, str] | None = None  # (reason, detail)
    oov: list[tuple[str, Pronunciation | None]] = field(default_factory=list)
    language: str = ""


def process_transcript(source: str, transcript: str, *, pronouncer: Pronouncer, options: dict[str, Any],
                       cfg: TextConfig) -> TranscriptOutcome:
    """Normalise and pronounce one transcript (``clip_id`` is filled in by the caller)."""
    norm: Normalised = normalise(transcript, **options)
    if not norm.text:
        return TranscriptOutcome(rejected=("empty_transcript", f"{source}: transcript {_shown(transcript)} is empty "
                                  "after normalisation; expected at least one letter or digit"))
    bad = {w: chars for w in dict.fromkeys(norm.words) if (chars := pronouncer.bad_characters(w))}
    if bad:
        return TranscriptOutcome(rejected=("bad_characters", _bad_characters_detail(source, bad, cfg)))
    if not norm.words:
        return TranscriptOutcome(rejected=("unpronounceable", f"{source}: transcript {_shown(transcript)} has no word "
                                  f"after normalisation ({_shown(norm.text)}); expected at least one word to pronounce"))
    prons = pronouncer.pronounce(norm.words)
    pairs = list(zip(norm.words, prons, strict=True))
    outcome = TranscriptOutcome(oov=[(w, p) for w, p in pairs if p is None or p.oov])
    missing = list(dict.fromkeys(w for w, p in pairs if p is None))
    if missing:
        outcome.rejected = ("oov", f"{source}: transcript words not in text.lexicon: {_quoted(missing)}; expected "
                            "every word in text.lexicon or text.override_lexicon (or text.oov = \"graphemes\")")
        return outcome
    found = [(w, p) for w, p in pairs if p is not None]
    silent = [w for w, p in found if not p.phones]
    if silent:
        outcome.rejected = ("unpronounceable", f"{source}: transcript words with no phones: {_quoted(silent)}; "
                            "expected a pronunciation for every word (add them to text.override_lexicon)")
        return outcome
    phones: list[str] = []
    for i, (_, pron) in enumerate(found):
        if i and cfg.word_boundary:
            phones.append(cfg.word_boundary)
        phones.extend(pron.phones)
    outcome.row = {
        "transcript": transcript,
        "norm_text": norm.text,
        "words": list(norm.words),
        "phones": phones,
        "word_backends": [p.source for _, p in found],
        "oov_words": list(dict.fromkeys(w for w, p in found if p.oov)),
    }
    return outcome


def run(ctx: StageContext) -> StageResult:
    cfg = ctx.config.text
    cache_dir = ctx.cache_dir if ctx.use_cache else None
    ingest = _ingest_table(ctx)
    review = plan_text(ctx, ingest)
    toolbox = Toolbox(ctx.config, make_pronouncer=lambda text_cfg: build_pronouncer(
        replace(ctx.config, text=text_cfg), cache_dir=cache_dir, review=review), make_options=normalise_options)
    pronouncer = toolbox.get(cfg.language).pronouncer  # ParameterError: no engine for text.language
    # Fixed transcripts replace the found ones; those marked wrong become rejects. The
    # items stay columns: Python sees only those whose rows are not reused.
    items, rejects = review_items(ingest, review)
    items = items.append_column("cell", language_cells(ctx, items))
    languages = _counts(items.column("cell").combine_chunks())  # transcripts per language cell
    if "audio" in ctx.inputs:  # the runner always gives it; a caller of run() alone may not
        items = _per_clip(items, ctx.inputs["audio"])
    else:
        items = items.append_column("clip_id", items.column("source_id"))
    for cell in sorted(pc.unique(items.column("cell").combine_chunks()).to_pylist()):
        # Every language gets its tools, as if each transcript were processed; one with
        # none has its transcripts rejected below, naming the reason.
        with contextlib.suppress(ParameterError):
            toolbox.get(cell)
    key = rows_key(ctx, cache_dir=cache_dir)
    reused, previous = reusable_rows(ctx.out, items, key=key) if cache_dir else (None, None)

    rows: list[dict[str, Any]] = []
    oov_counts: Counter[str] = Counter()
    oov_phones: dict[str, tuple[str, tuple[tuple[str, ...], str]]] = {}  # word -> (first clip, listing)
    todo = np.arange(items.num_rows) if reused is None else np.flatnonzero(~reused)
    picked = items.take(pa.array(todo, pa.int64())).to_pylist()
    for item in picked:
        outcome = process_in_language(item["source_path"], item["transcript"], item["cell"],
                                      toolbox=toolbox, cfg=cfg)
        pronouncer = toolbox.tools[outcome.language].pronouncer if outcome.language in toolbox.tools else pronouncer
        for word, pron in outcome.oov:
            oov_counts[word] += 1
            if word not in oov_phones:
                oov_phones[word] = (item["clip_id"], _listed(word, pron, pronouncer))
        if outcome.rejected:
            reason, detail = outcome.rejected
            rejects.append(reject(NAME, item["source_path"], reason, detail, clip_id=item["clip_id"]))
        elif outcome.row is not None:
            rows.append({"clip_id": item["clip_id"], **outcome.row, "transcript_origin": item["origin"]})
    count_fixes(review, {r["clip_id"]: r["reason"] for r in rejects})
    count_words(review, {tag: (tools.pronouncer.backend, tools.pronouncer.override)
                         for tag, tools in toolbox.tools.items()})
    table = table_from_rows(NAME, rows)
    if previous is not None and len(previous):
        _reused_oov(previous, oov_counts, oov_phones, toolbox)
        table = pa.concat_tables([table, previous]).sort_by("clip_id").combine_chunks()
    # Before predicted.tsv is rewritten: it may itself be the override lexicon just read.
    metadata = _metadata(ctx.config, toolbox.get(cfg.language).pronouncer)
    metadata.update(language_metadata(toolbox))
    metadata["text.rows_key"] = key
    pronouncer = toolbox.get(cfg.language).pronouncer
    for tools in toolbox.tools.values():
        tools.pronouncer.save_cache()
    if pronouncer.cache_misses or pronouncer.cache_hits:
        ctx.log.info("text: %d out-of-vocabulary words predicted with g2p-en, %d taken from the cache",
                     len(pronouncer.cache_misses), len(pronouncer.cache_hits))
    _write_predicted(ctx.out / PREDICTED_LEXICON, oov_counts, {w: v[1] for w, v in oov_phones.items()},
                     backend=cfg.backend)
    summary = _summary(table, rejects, items.num_rows + len(review.wrong), cfg)
    summary.update(language_summary(table, languages, toolbox))
    warn_wrong_language(summary["languages"], ctx.log)
    summary["review"] = review.tally.summary(review.path)
    log_tally(ctx, NAME, review.tally)

    rejects.sort(key=lambda r: (r["clip_id"], r["reason"]))
    stats = _run_stats(pronouncer, cache_dir is not None)
    stats["transcripts_reused"] = int(reused.sum()) if reused is not None else 0
    stats["transcripts_processed"] = len(picked)
    return StageResult(
        manifests={stage_manifest(NAME): (NAME, table)},
        rejects=rejects,
        summary=summary,
        metadata=metadata,
        run_stats=stats,
    )


def _ingest_table(ctx: StageContext) -> pa.Table:
    """The ingest columns the stage reads: of every row when a review verdict may name a
    clip (a fixed transcript can give one to a file found without), else of the
    transcribed ones (at 100,000 sources, two thirds untranscribed)."""
    table = ctx.inputs["ingest"].select(["source_id", "source_path", "sha256", "transcript", "transcript_origin",
                                         "metadata_line"])
    if not text_decisions(ctx)[0]:
        table = table.filter(pc.is_valid(table.column("transcript")))
    return table


def rows_key(ctx: StageContext, *, cache_dir: Path | None) -> str:
    """What a text row depends on besides its own transcript, origin and language: the
    stage's code version, the text and ingest sections, the lexicon files' bytes and the
    review decisions the stage applies (a reviewed pronunciation changes every transcript
    holding the word). Recorded in the manifest's metadata; a rebuild with the same key
    reuses the rows of transcripts it has seen (:func:`reusable_rows`)."""
    config = ctx.config
    parts = {"code_version": code_version(NAME, cache_dir=cache_dir), "text": config.section("text"),
             "ingest": config.section("ingest"),
             "lexicons": {k: sha256_file(p) if p.exists() else None for k, p in _lexicon_paths(config).items()},
             "review": hashlib.sha256(text_digest(ctx)).hexdigest()}
    return hashlib.sha256(canonical_json(parts)).hexdigest()


def reusable_rows(out: Path, items: pa.Table, *, key: str) -> tuple[np.ndarray | None, pa.Table | None]:
    """Which ``items`` (columns clip_id, transcript, origin and cell, the language cell)
    the previous run's manifest in ``out`` already holds, and those rows.

    A row is reused when the manifest holds the bytes this stage last wrote (their
    SHA-256 as the runner recorded it: a copied or moved OUT still qualifies, an edited
    manifest does not), under the same :func:`rows_key`, and has the item's clip with
    the same transcript, origin and language (its cell as a tag). The runner checks the whole
    table against the schema before writing it, reused rows included.
    Transcripts the previous run rejected are processed again, like new ones: their
    rejects are not kept. Returns (None, None) when nothing can be reused.
    """
    data = outputs_record.recorded_manifest(out, NAME, MAIN_MANIFEST)
    if data is None:
        return None, None
    try:
        previous = pq.ParquetFile(pa.BufferReader(data)).read()
        if (previous.schema.metadata or {}).get(b"loam.text.rows_key") != key.encode():
            return None, None
        previous = previous.select([f.name for f in arrow_schema(NAME)])
        previous = previous.cast(arrow_schema(NAME))  # Parquet names list items "element"
    except (KeyError, ValueError, pa.ArrowException):
        return None, None
    if not items.num_rows or not previous.num_rows:
        return None, None
    at = pc.index_in(items.column("clip_id").combine_chunks(), value_set=previous.column("clip_id").combine_chunks())
    found = np.asarray(pc.is_valid(at), dtype=bool)
    index = pa.array(np.asarray(at.fill_null(0), dtype=np.int64))

    def same(column: str, wanted: Any) -> np.ndarray:
        equal = pc.equal(wanted, previous.column(column).take(index))
        return np.asarray(pc.fill_null(equal, False), dtype=bool)

    cells = items.column("cell").combine_chunks()
    distinct = pc.unique(cells)
    tags = pa.array([canonical_tag(c) if LANGUAGE_TAG.match(c) else None for c in distinct.to_pylist()], pa.string())
    tag = tags.take(pc.index_in(cells, value_set=distinct))
    reused = (found & same("transcript", items.column("transcript")) & same("transcript_origin", items.column("origin"))
              & same("language", tag))
    return reused, previous.take(pa.array(np.asarray(index)[reused]))


def _reused_oov(previous: pa.Table, counts: Counter[str], listed: dict[str, tuple[str, Any]],
                toolbox: Toolbox) -> None:
    """Add the OOV word tokens of reused rows to ``counts``, and the listing of each word
    whose first occurrence (in clip order) is a reused row, from its language's
    pronouncer (an OOV word's pronunciation does not depend on its neighbours)."""
    rows, words = counted_items(previous.column("words").combine_chunks())
    member = row_members(rows, words, previous.column("oov_words").combine_chunks())
    oov, oov_rows = words.filter(pa.array(member)), rows[member]
    if not len(oov):
        return
    codes = oov.dictionary_encode()
    vocabulary = codes.dictionary.to_pylist()
    distinct, first, tokens = np.unique(np.asarray(codes.indices), return_index=True, return_counts=True)
    clips = previous.column("clip_id").take(pa.array(oov_rows[first])).to_pylist()
    tags = previous.column("language").take(pa.array(oov_rows[first])).to_pylist()
    for code, clip, tag, n in zip(distinct.tolist(), clips, tags, tokens.tolist(), strict=True):
        word = vocabulary[code]
        counts[word] += n
        if word not in listed or clip < listed[word][0]:
            pronouncer = toolbox.get(tag).pronouncer
            listed[word] = (clip, _listed(word, pronouncer.pronounce([word])[0], pronouncer))


def _per_clip(items: pa.Table, audio: pa.Table) -> pa.Table:
    """The transcripts to pronounce, one per clip (a ``clip_id`` column added): a source's
    own (its clip has the source's id) or, for a long source cut by aligning its
    transcript, each transcribed clip's sentences (pipeline.stages.alignment), in clip
    order at the source's place; a long source whose transcript placed no clip has none.
    Columnar: a rebuild's cost per existing clip stays in Arrow."""
    table = audio.select(["clip_id", "source_id", "aligned_transcript"]).combine_chunks()
    sources = table.column("source_id").combine_chunks()
    whole = pc.filter(sources, pc.equal(table.column("clip_id").combine_chunks(), sources))
    cut = pc.unique(pc.filter(sources, pc.invert(pc.is_in(sources, value_set=whole))))
    ids = items.column("source_id").combine_chunks()
    own = items.filter(pc.invert(pc.is_in(ids, value_set=cut)))
    own = own.append_column("clip_id", own.column("source_id"))
    if not len(cut):
        return own
    placed = table.filter(pc.and_(pc.is_in(sources, value_set=cut), pc.is_valid(table.column("aligned_transcript"))))
    at = pc.index_in(placed.column("source_id").combine_chunks(), value_set=ids)
    placed = placed.filter(pc.is_valid(at))
    clips = items.take(pc.drop_null(at)).set_column(items.schema.get_field_index("transcript"), "transcript",
                                                    placed.column("aligned_transcript"))
    clips = clips.append_column("clip_id", placed.column("clip_id"))
    # The items are in source_id order; each source keeps its place, its clips in clip order.
    return pa.concat_tables([own, clips.cast(own.schema)]).sort_by([("source_id", "ascending"),
                                                                   ("clip_id", "ascending")])


def _listed(word: str, pron: Pronunciation | None, pronouncer: Pronouncer) -> tuple[tuple[str, ...], str]:
    """The phones and source a word gets in predicted.tsv."""
    if pron is None:
        # Rejected by the lexicon backend: its letters, as a starting point for the reviewer.
        return grapheme_units(word), "graphemes"
    if pron.source == "override":
        # As written in the override file, so a reviewed file read back is rewritten unchanged.
        return pronouncer.override[word], "override"
    return pron.phones, pron.source


def _write_predicted(path: Path, counts: Counter[str], phones: dict[str, tuple[tuple[str, ...], str]],
                     *, backend: str) -> None:
    lines = [
        "# Out-of-vocabulary words: word<TAB>phones<TAB>count<TAB>source, most frequent first.\n",
        "# Correct the phones, set text.override_lexicon to this file (or a copy) and run again;\n",
        "# words the override supplies stay listed, with source 'override'.\n",
    ]
    if backend == "lexicon":
        lines.append("# source 'graphemes': the word's letters, a starting point only.\n")
    for word, count in sorted(counts.items(), key=lambda kv: (-kv[1], kv[0])):
        units, source = phones[word]
        lines.append(f"{word}\t{' '.join(units)}\t{count}\t{source}\n")
    write_text_atomic(path, "".join(lines))


def _summary(table: pa.Table, rejects: list[dict[str, Any]], transcripts: int,
             cfg: TextConfig) -> dict[str, Any]:
    """Counts over the accepted rows, columnar (a rebuild of 33,415 rows costs
    milliseconds, not the 0.5 s of a loop over them)."""
    _, phones = counted_items(table.column("phones").combine_chunks())
    if cfg.word_boundary:
        phones = phones.filter(pc.not_equal(phones, cfg.word_boundary))
    rows, words = counted_items(table.column("words").combine_chunks())
    oov = words.filter(pa.array(row_members(rows, words, table.column("oov_words").combine_chunks())))
    inventory = _counts(phones)
    return {
        "backend": cfg.backend,
        "transcripts": transcripts,
        "accepted": table.num_rows,
        "rejected": dict(sorted(Counter(r["reason"] for r in rejects).items())),
        "words": len(words),
        "distinct_words": len(_counts(words)),
        "oov_words": len(_counts(oov)),
        "oov_word_tokens": len(oov),
        "phones": sum(inventory.values()),
        "phone_inventory": inventory,
        "word_backends": _counts(counted_items(table.column("word_backends").combine_chunks())[1]),
        "predicted_lexicon": PREDICTED_LEXICON,
    }


def _counts(values: pa.Array) -> dict[str, int]:
    """Occurrences of each value, sorted by value."""
    counted = pc.value_counts(values)
    return dict(sorted(zip(counted.field("values").to_pylist(), counted.field("counts").to_pylist(), strict=True)))


def _run_stats(pronouncer: Pronouncer, cached: bool) -> dict[str, Any]:
    """What depends on the prediction cache earlier runs filled: for the log only."""
    return {"g2p_cache": {"enabled": cached, "hits": len(pronouncer.cache_hits),
                          "misses": len(pronouncer.cache_misses)},
            "neural_model_loaded": pronouncer.neural_loaded}


def _metadata(config: Config, pronouncer: Pronouncer) -> dict[str, str]:
    meta = pronouncer.provenance()
    for key, path in _lexicon_paths(config).items():
        value = getattr(config.text, key)
        meta[f"g2p.{key}"] = f"{value} sha256={sha256_file(path)}"
    return meta


STAGE = Stage(
    name=NAME,
    # audio: a long transcribed source is cut by aligning its transcript, and each of its
    # clips has the sentences placed in it as transcript.
    inputs=("ingest", "audio"),
    outputs=(Output(MAIN_MANIFEST, schema=NAME),),
    config_sections=("text", "ingest"),  # ingest: the metadata table's language column
    run=run,
    extra_inputs=extra_inputs,
    extra_digest=text_digest,
    written_files=written_files,
)
