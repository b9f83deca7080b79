"""``OUT/report/datasheet.md``: a datasheet for the prepared corpus.

It answers the questions of Gebru et al., "Datasheets for Datasets" (2018/2021) in
their seven sections: Motivation, Composition, Collection process, Preprocessing /
cleaning / labelling, Uses, Distribution, Maintenance. What the build knows (counts,
hours, speakers, languages, formats and rates, every step with its parameters and
library versions, rejects by reason, review decisions, the split, pseudonymisation)
is filled in from OUT; what only a person can say comes from the config's
``[datasheet]`` section, read from ``config.resolved.json``, or stays marked
:data:`~pipeline.commands.datasheet_sheet.TO_BE_ANSWERED`. Text from the inputs and
the config is escaped (:mod:`pipeline.commands.markdown`). The file depends only on
OUT and the installed code: no time, no absolute path, nothing from the run's history.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from pipeline.commands.datasheet_facts import (
    review_counts,
    source_formats,
    stage_software,
    stage_summaries,
)
from pipeline.commands.datasheet_sections import Build, collection, composition
from pipeline.commands.datasheet_sheet import QUESTIONS, Sheet, hms, plural
from pipeline.commands.datasheet_steps import preprocessing
from pipeline.commands.markdown import md_code, md_text
from pipeline.commands.report import CAUTION
from pipeline.commands.validate import load_resolved_config
from pipeline.core.fsio import write_text_atomic
from pipeline.core.names import HELDOUT, LABELLED, REPORT_DATASHEET

SOURCE = ('Gebru, Morgenstern, Vecchione, Wortman Vaughan, Wallach, Daumé III and Crawford, "Datasheets '
          'for Datasets", arXiv:1803.09010 (2018), Communications of the ACM 64(12) (2021)')


def build_facts(out: Path, summary: dict[str, Any]) -> Build:
    """Everything the datasheet of ``out`` is written from; ``summary`` is the report's."""
    config, problems = load_resolved_config(out)
    formats, origins = source_formats(out)
    stages = stage_summaries(out)
    return Build(summary=summary, config=config, config_read=not problems, stages=stages,
                 formats=formats, origins=origins, software=stage_software(out), review=review_counts(out, stages))


def render_datasheet(b: Build) -> str:
    """The datasheet's Markdown for the build ``b``.

    Parameters
    ----------
    b : Build
        From :func:`build_facts`.

    Returns
    -------
    str
        The page: a title, the caution on personal data, then the seven sections.
    """
    sheet = Sheet(b.config.section("datasheet"))
    _header(sheet, b)
    _motivation(sheet, b)
    composition(sheet, b)
    collection(sheet, b)
    preprocessing(sheet, b)
    _uses(sheet, b)
    _distribution(sheet, b)
    _maintenance(sheet, b)
    asked = [k for k in QUESTIONS if k in sheet.unanswered]
    sheet.add("---", f"{plural(len(QUESTIONS) - len(asked), 'question')} of {len(QUESTIONS)} answered in "
              "`[datasheet]`" + (f"; still to be answered: {', '.join(f'`{k}`' for k in asked)}." if asked else "."))
    return sheet.text()


def _header(sheet: Sheet, b: Build) -> None:
    name = b.config.datasheet.name
    sheet.add(f"# Datasheet: {md_text(name)}" if name.strip() else "# Datasheet of a corpus prepared with Loam")
    sheet.add(f"This datasheet follows the questions of {SOURCE}. `loam report` wrote it from the corpus folder "
              "(the folder above `report/`): every figure comes from the manifests, the stage summaries and `config.resolved.json`. What only a person "
              "can answer comes from the `[datasheet]` section of the config (run `loam prepare` after editing it, "
              "then `loam report`); a question with no answer there is marked **[to be answered]**.")
    note = (" In this build speaker ids and source paths are keyed pseudonyms, but the voices still identify "
            "the speakers." if b.config.privacy.pseudonymise else
            " This build is not pseudonymised: speaker ids, source paths and reject sentences keep the raw "
            "dump's names (`privacy.pseudonymise`).")
    sheet.add(f"> **Personal data.** {md_text(CAUTION)}{note}")


def _motivation(sheet: Sheet, b: Build) -> None:
    t = b.summary["totals"]
    sheet.heading(2, "1. Motivation")
    sheet.ask("purpose", built=[
        f"What Loam made of the raw dump: {plural(t['clips'], 'clip')} ({hms(t['seconds'])}) for training and "
        "evaluating speech models with little labelled speech, split by "
        f"{md_code(b.config.split.group_by, in_table=False)} into nested labelled tiers, unlabelled audio and a "
        "held-out subset."])
    sheet.ask("creators")
    sheet.ask("funding")


def _uses(sheet: Sheet, b: Build) -> None:
    s = b.summary
    heldout = s["subsets"][HELDOUT]
    tiers = ", ".join(f"{tier} ({plural(v['clips'], 'clip')})" for tier, v in s["tiers"].items())
    sheet.heading(2, "5. Uses")
    sheet.ask("uses_so_far")
    sheet.ask("intended_uses", built=[
        f"As prepared: the nested labelled tiers ({tiers or 'none'}) for supervised training at growing amounts "
        "of labelled speech, the unlabelled subset for self-supervised or semi-supervised training, and the "
        f"held-out subset ({plural(heldout.get('scored_clips', 0), 'scored clip')} from "
        f"{plural(heldout['speakers'], 'speaker')} no training subset holds) for evaluation"
        + (f", in parts {', '.join(md_code(p, in_table=False) for p in s['parts'])}."
           if isinstance(s.get("parts"), dict) and s["parts"] else ".")])
    sheet.ask("out_of_scope_uses", built=[
        "Whatever the answer, the caution on personal data applies: identifying or verifying speakers by their "
        "voice uses biometric data and needs their consent for that purpose."])
    sheet.ask("known_limitations", built=[_measured_limits(s)])


def _measured_limits(s: dict[str, Any]) -> str:
    shortfalls = [x for x in (s.get("shortfalls") or []) if isinstance(x, dict) and x.get("shortfall_s")]
    short = ", ".join(f"{md_text(x.get('tier'))} short by {float(x['shortfall_s']):g} s" for x in shortfalls)
    languages = ", ".join(f"{md_text(tag)} {plural(x.get('clips', 0), 'clip')}"
                          for tag, x in s.get("languages", {}).items())
    return (f"Measured in this build: {plural(s['totals']['speakers'], 'speaker')} in all, "
            f"{s['subsets'][LABELLED]['speakers']} in labelled and {s['subsets'][HELDOUT]['speakers']} held out; "
            f"{hms(s['subsets'][LABELLED]['seconds'])} of labelled speech; transcribed clips by language: "
            f"{languages or 'none'}; labelled tiers short of their budget: {short or 'none'}.")


def _distribution(sheet: Sheet, b: Build) -> None:
    sheet.heading(2, "6. Distribution")
    shared = ("As far as names go, everything in the corpus folder but `cache/` and `logs/` (which name the raw "
              "dump's files) may be shared, and `loam validate` checks that no other file names a speaker or a "
              "raw file; the voices and transcripts remain personal data."
              if b.config.privacy.pseudonymise else
              "This build is not pseudonymised, so its manifests, reject sentences and report name the raw "
              "dump's speakers, folders and files: set `privacy.pseudonymise` and rebuild before sharing it. "
              "`cache/` and `logs/` are never to be shared.")
    sheet.ask("distribution", built=[shared])
    sheet.ask("licence")
    sheet.ask("third_party_restrictions")


def _maintenance(sheet: Sheet, b: Build) -> None:
    sheet.heading(2, "7. Maintenance")
    for key in ("maintainer", "contact"):
        sheet.ask(key)
    sheet.ask("updates", built=[
        "How a rebuild behaves: the same raw dump, configuration and split ledger give byte-identical manifests "
        "and audio; new recordings join without moving any clip already assigned, as the split ledger records "
        "every assignment."])
    sheet.ask("retention")
    sheet.ask("contributions")


def write_datasheet(out: Path, summary: dict[str, Any]) -> Path:
    """Write ``OUT/report/datasheet.md`` from ``out`` and the report's ``summary``.

    Parameters
    ----------
    out : Path
        A folder written by ``loam prepare``.
    summary : dict
        :func:`pipeline.commands.report.build_summary` of ``out``.

    Returns
    -------
    Path
        The datasheet's path.
    """
    path = Path(out) / REPORT_DATASHEET
    write_text_atomic(path, render_datasheet(build_facts(Path(out), summary)))
    return path
