"""Held-out parts (dev, test), text-disjoint evaluation, balance by speaker attributes,
sizes per part, stability over arriving batches and version 1 ledgers.

The corpora are made of synthetic stage rows (tests/test_split.py's builder): the split
stage reads rows, not audio, so a prompted corpus of 12 speakers and 30 prompts costs
milliseconds. Checks that need ``loam validate`` write the stage's manifests to OUT and
validate them without the per-file audio checks (there are no audio files).
"""

from __future__ import annotations

import json
import math
from collections import Counter, defaultdict
from pathlib import Path
from typing import Any

import pytest

from pipeline.commands.validate import validate_out
from pipeline.core.config import build_config
from pipeline.core.errors import ConfigError, DataError
from pipeline.core.manifest import empty_table, write_manifest
from pipeline.core.names import REJECTED, RESOLVED_CONFIG, subset_manifest
from pipeline.core.stage import StageResult
from pipeline.stages import split
from pipeline.stages.decisions import append_decision
from pipeline.stages.heldout import GroupFacts, PartTarget, choose_parts
from pipeline.stages.ledger import MAGIC, MAGIC_V1, read_ledger
from pipeline.stages.prompts import prompt_key
from pipeline.stages.review_apply import decisions_file
from tests.test_split import Corpus, all_rows, make_ctx, random_fingerprint, rows_by_subset

# Invented speaker names.
SPEAKERS = ("avocet", "bittern", "curlew", "dunlin", "eider", "fulmar", "gannet", "hobby", "ibis", "jacana",
            "kestrel", "lapwing")
PROMPTS = [f"prompt number {k} about the {w} shore" for k, w in
           enumerate(("north", "south", "east", "west", "reed", "salt", "shingle", "mud", "dune", "tidal") * 3)]


def prompted_corpus(*, speakers: int = 12, prompts: int = 30, readers: int = 4, crossed: bool = False) -> Corpus:
    """``speakers`` speakers reading ``prompts`` prompts. Not crossed: the speakers fall in
    ``speakers // readers`` sets of ``readers``, each set reading its own prompts (so
    each prompt is read by ``readers`` speakers); crossed: everyone reads every prompt."""
    corpus = Corpus()
    sets = speakers // readers
    for k in range(speakers):
        mine = range(prompts) if crossed else [p for p in range(prompts) if p % sets == k % sets]
        for p in mine:
            cid = corpus.add(SPEAKERS[k], 3.0 + 0.1 * (p % 5))
            set_prompt(corpus, cid, PROMPTS[p % len(PROMPTS)] + ("" if p < len(PROMPTS) else f" {p}"))
    return corpus


def set_prompt(corpus: Corpus, cid: str, text: str) -> None:
    row = next(t for t in corpus.text if t["clip_id"] == cid)
    row.update(transcript=text.capitalize() + ".", norm_text=text, words=text.split(),
               word_backends=["cmudict"] * len(text.split()))


def write_out(root: Path, result: StageResult, data: dict[str, Any]) -> Path:
    """The stage's manifests, an empty rejected.parquet and the resolved config in OUT."""
    out = root / "out"
    cfg = build_config({"seed": 7, **data})
    (out / RESOLVED_CONFIG).write_text(json.dumps(cfg.to_json()), encoding="utf-8")
    meta = {"config_sha256": cfg.sha256()}
    for rel, (schema, table) in result.manifests.items():
        write_manifest(out / rel, schema, table, metadata=meta)
    write_manifest(out / REJECTED, "rejected", empty_table("rejected"), metadata=meta)
    return out


def places(result: StageResult) -> dict[str, str]:
    """Each clip's subset, or its part when held out."""
    return {cid: r["part"] or r["subset"] for cid, r in all_rows(result).items()}


def check_parts_and_prompts(result: StageResult, *, disjoint: bool = True) -> None:
    """Parts speaker-disjoint from training and from each other; no scorable clip of a
    text-disjoint part reads a prompt labelled holds."""
    rows = rows_by_subset(result)
    training = {r["speaker"] for s in ("labelled", "unlabelled") for r in rows[s]}
    by_part: dict[str, set[str]] = defaultdict(set)
    for r in rows["heldout"]:
        by_part[r["part"]].add(r["speaker"])
    assert set(by_part) == {"dev", "test"}
    assert not by_part["dev"] & by_part["test"]
    assert not (by_part["dev"] | by_part["test"]) & training
    labelled = {prompt_key(r["norm_text"]) for r in rows["labelled"]}
    scored = [r for r in rows["heldout"] if r["scorable"]]
    assert scored
    if disjoint:
        assert not [r for r in scored if prompt_key(r["norm_text"]) in labelled]


# ---------------------------------------------------------------------------------------
# A prompted corpus: 12 speakers, 30 prompts, each read by 4
# ---------------------------------------------------------------------------------------

PROMPTED = {"split": {"heldout": "33%", "labelled_budgets": ["1m", "3m"]}}


def test_prompted_corpus_parts_are_disjoint_and_no_test_prompt_is_in_labelled(tmp_path: Path) -> None:
    # Source: issue "Checks" and docs/split.md, Text-disjoint evaluation.
    corpus = prompted_corpus()
    result = split.run(make_ctx(tmp_path, corpus, PROMPTED))
    check_parts_and_prompts(result)
    cost = result.summary["text_overlap"]
    assert cost["mode"] == "unscore" and cost["parts"] == ["dev", "test"]
    unscored = [r for r in rows_by_subset(result)["heldout"] if "prompt_in_labelled" in r["quality_flags"]]
    assert cost["unscored_clips"] == len(unscored)
    assert cost["unscored_hours"] == pytest.approx(sum(r["duration_s"] for r in unscored) / 3600, abs=1e-4)
    # Four speakers read the same ten prompts: holding out one whole set of readers
    # leaves no held-out prompt in training at all, and the choice finds it.
    assert cost["unscored_clips"] == 0
    assert len({r["speaker"] for r in rows_by_subset(result)["heldout"]}) == 4
    out = write_out(tmp_path, result, PROMPTED)
    assert validate_out(out, audio_files=False).problems == []


def test_held_out_choice_keeps_overlap_below_the_ranking_alone() -> None:
    # Source: pipeline/stages/heldout.py (the overlap weighting), against the plain ranking.
    facts = {}
    for k, spk in enumerate(SPEAKERS):
        facts[spk] = GroupFacts(30.0, {f"p{p}": 3.0 for p in range(30) if p % 3 == k % 3})
    parts = [PartTarget("dev", 60.0), PartTarget("test", 60.0)]
    chosen = choose_parts(facts, parts=parts, seed=7)
    plain = choose_parts({g: GroupFacts(f.seconds) for g, f in facts.items()}, parts=parts, seed=7)

    def overlap_s(where: dict[str, str]) -> float:
        train = {p for g, f in facts.items() if where[g] == "training" for p in f.prompts}
        return sum(s for g, f in facts.items() if where[g] != "training" for p, s in f.prompts.items() if p in train)

    assert overlap_s(chosen) == 0.0 < overlap_s(plain)


def test_demote_keeps_every_test_clip_scorable_and_counts_the_labelled_cost(tmp_path: Path) -> None:
    # Source: docs/split.md, Text-disjoint evaluation ("demote").
    corpus = prompted_corpus(readers=3)  # four sets of three: no set fills a part alone
    data = {"split": {"text_overlap": "demote", "heldout": "20%", "labelled_budgets": ["30s", "1m"]}}
    result = split.run(make_ctx(tmp_path, corpus, data))
    check_parts_and_prompts(result)
    rows = rows_by_subset(result)
    assert all(r["scorable"] for r in rows["heldout"])
    demoted = [r for r in rows["unlabelled"] if "prompt_demoted" in r["quality_flags"]]
    held_prompts = {prompt_key(r["norm_text"]) for r in rows["heldout"]}
    assert demoted and all(r["transcript"] is None and r["phones"] is None for r in demoted)
    cost = result.summary["text_overlap"]
    assert cost["demoted_clips"] == len(demoted) and cost["unscored_clips"] == 0
    assert cost["demoted_hours"] == pytest.approx(sum(r["duration_s"] for r in demoted) / 3600, abs=1e-4)
    # Every training clip reading a held-out prompt was demoted, and none other.
    text_of = {t["clip_id"]: t["norm_text"] for t in corpus.text}
    training = [r for r in rows["labelled"] + rows["unlabelled"]]
    assert {r["clip_id"] for r in demoted} == {r["clip_id"] for r in training
                                               if prompt_key(text_of[r["clip_id"]]) in held_prompts}
    assert validate_out(write_out(tmp_path, result, data), audio_files=False).problems == []


@pytest.mark.parametrize("mode", ["unscore", "demote"])
def test_fully_crossed_prompts_still_give_a_usable_result_with_the_cost_stated(tmp_path: Path, mode: str) -> None:
    # Source: issue "Text-disjoint evaluation": every speaker reads every prompt.
    corpus = prompted_corpus(speakers=8, prompts=24, crossed=True)
    data = {"split": {"heldout": "25%", "labelled_budgets": ["30s", "1m"], "text_overlap": mode}}
    result = split.run(make_ctx(tmp_path, corpus, data))
    check_parts_and_prompts(result)
    cost = result.summary["text_overlap"]
    parts = result.summary["parts"]
    assert parts["test"]["scorable_clips"] > 0 and parts["dev"]["scorable_clips"] > 0
    if mode == "unscore":  # the labelled prompts cost test clips; the rest are scored
        assert cost["unscored_clips"] > 0 and cost["demoted_clips"] == 0
        assert parts["test"]["scorable_clips"] < parts["test"]["clips"]
        assert result.summary["subsets"]["labelled"]["clips"] > 0
    else:  # every training clip reads a held-out prompt: labelled is what it costs
        assert cost["demoted_clips"] > 0 and cost["unscored_clips"] == 0
        assert parts["test"]["scorable_clips"] == parts["test"]["clips"]
        assert result.summary["subsets"]["labelled"]["clips"] == 0
    problems = validate_out(write_out(tmp_path, result, data), audio_files=False).problems
    # demote leaves labelled empty, which validate reports; never a text leak.
    assert not [p for p in problems if p.check == "text_leak"]
    assert [p.check for p in problems] == ([] if mode == "unscore" else ["subset_empty"])


def test_allow_keeps_shared_prompts_scorable_and_validate_warns(tmp_path: Path) -> None:
    corpus = prompted_corpus(speakers=8, prompts=24, crossed=True)
    data = {"split": {"heldout": "25%", "labelled_budgets": ["30s", "1m"], "text_overlap": "allow"}}
    result = split.run(make_ctx(tmp_path, corpus, data))
    check_parts_and_prompts(result, disjoint=False)
    problems = validate_out(write_out(tmp_path, result, data), audio_files=False).problems
    assert problems and {(p.check, p.severity) for p in problems} == {("text_leak", "warning")}


# ---------------------------------------------------------------------------------------
# Balance by speaker attributes
# ---------------------------------------------------------------------------------------

def gender_corpus(tmp_path: Path, genders: dict[str, str]) -> Corpus:
    corpus = Corpus()
    for spk in genders:
        for _ in range(6):
            corpus.add(spk, 5.0)
    raw = tmp_path / "raw"
    raw.mkdir(parents=True, exist_ok=True)
    lines = ["speaker,gender,device"] + [f"{s},{g},phone" for s, g in genders.items()]
    (raw / "speakers.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    return corpus


BALANCED = {"split": {"heldout": "33%", "labelled_budgets": ["1m"], "balance_table": "speakers.csv",
                      "balance_columns": ["gender"], "balance_tolerance": 0.1}}


def shares(result: StageResult, genders: dict[str, str]) -> dict[str, dict[str, float]]:
    per: dict[str, Counter[str]] = defaultdict(Counter)
    for r in rows_by_subset(result)["heldout"]:
        per[r["part"]][genders[r["speaker"]]] += r["duration_s"]
    return {p: {g: c[g] / sum(c.values()) for g in ("f", "m")} for p, c in per.items()}


def test_stratified_parts_keep_each_gender_share_within_tolerance(tmp_path: Path) -> None:
    # Source: issue "Balanced held-out"; shares recomputed here from the manifest rows.
    genders = {s: ("f" if k % 2 else "m") for k, s in enumerate(SPEAKERS)}
    corpus = gender_corpus(tmp_path, genders)
    result = split.run(make_ctx(tmp_path, corpus, BALANCED))
    for part, share in shares(result, genders).items():
        assert abs(share["f"] - 0.5) <= 0.1 + 1e-9, part
    balance = result.summary["balance"]
    assert balance["met"] is True and balance["columns"] == ["gender"]
    assert {(r["value"], r["corpus"]) for r in balance["rows"]} == {("f", 0.5), ("m", 0.5)}
    check_parts_and_prompts(result)
    # The same corpus and seed without balance columns: the ranking alone puts two women in test.
    plain = split.run(make_ctx(tmp_path, corpus, {"split": {"heldout": "33%", "labelled_budgets": ["1m"]}},
                               fresh=True))
    assert shares(plain, genders)["test"]["f"] == 1.0


def test_stratification_says_when_the_groups_cannot_meet_the_tolerance(tmp_path: Path) -> None:
    genders = {s: ("f" if k < 2 else "m") for k, s in enumerate(SPEAKERS)}  # two women among twelve
    corpus = gender_corpus(tmp_path, genders)
    result = split.run(make_ctx(tmp_path, corpus, BALANCED))
    balance = result.summary["balance"]
    assert balance["met"] is False
    assert [r for r in balance["rows"] if not r["within"]]
    # The report page says so.
    from pipeline.commands.report import _parts_html

    html = "".join(_parts_html({"parts": result.summary["parts"], "split_by": "speaker",
                                "text_overlap": result.summary["text_overlap"], "balance": balance}))
    assert "could not meet the tolerance" in html


def test_balance_table_errors_name_the_file_line_and_column(tmp_path: Path) -> None:
    corpus = gender_corpus(tmp_path, {s: "f" for s in SPEAKERS[:4]})
    with pytest.raises(ConfigError, match=r"speakers.csv: line 1: the header has no column 'age_band'"):
        split.run(make_ctx(tmp_path, corpus, {"split": {**BALANCED["split"], "balance_columns": ["age_band"]}}))
    (tmp_path / "raw" / "speakers.csv").write_text("speaker,gender\navocet,f\navocet,m\n", encoding="utf-8")
    with pytest.raises(DataError, match=r"speakers.csv: line 3: speaker 'avocet' appears a second time"):
        split.run(make_ctx(tmp_path, corpus, BALANCED))
    with pytest.raises(ConfigError, match=r"key 'split.balance_table' has value 'missing.csv'"):
        split.run(make_ctx(tmp_path, corpus, {"split": {**BALANCED["split"], "balance_table": "missing.csv"}}))


# ---------------------------------------------------------------------------------------
# Configuration
# ---------------------------------------------------------------------------------------

@pytest.mark.parametrize(("parts", "extra", "message"), [
    ([{"name": "dev", "target": "40%"}, {"name": "test", "target": "50%"}], {}, "add up to 100% (these add up to 90%)"),
    ([{"name": "dev", "target": "50%"}, {"name": "dev", "target": "50%"}], {}, "each part name once (dev appears twice)"),
    ([{"name": "dev", "target": "30m"}, {"name": "test", "target": "50%"}], {}, "not a mix"),
    ([{"name": "test", "target": "1h"}], {"heldout": "5%"}, "key 'split.heldout' has value \"5%\""),
    ([{"name": "test", "target": "0%"}], {}, "every target above zero (test has none)"),
    ([{"name": "Test", "target": "100%"}], {}, "key 'split.parts.0.name' has value \"Test\""),
    ([{"name": "test", "target": "100%", "share": 1}], {}, "unknown key"),
])
def test_parts_config_errors_name_the_value(parts: list[dict[str, Any]], extra: dict[str, Any], message: str) -> None:
    with pytest.raises(ConfigError) as info:
        build_config({"split": {"parts": parts, **extra}}, source="corpus.toml")
    assert message in str(info.value) and str(info.value).startswith("corpus.toml")


def test_duration_parts_set_the_held_out_target(tmp_path: Path) -> None:
    corpus = prompted_corpus()
    data = {"split": {"parts": [{"name": "test", "target": "40s"}, {"name": "dev", "target": "20s",
                                                                      "text_disjoint": False}],
                      "labelled_budgets": ["1m"]}}
    result = split.run(make_ctx(tmp_path, corpus, data))
    parts = result.summary["parts"]
    assert [parts[p]["target_s"] for p in ("test", "dev")] == [40.0, 20.0]
    assert result.summary["heldout_target_s"] == 60.0
    assert parts["dev"]["text_disjoint"] is False and result.summary["text_overlap"]["parts"] == ["test"]
    # Each part got whole speakers until it reached its target.
    for name, p in parts.items():
        assert p["seconds"] >= p["target_s"] and p["speakers"] >= 1, name


# ---------------------------------------------------------------------------------------
# Stability: three batches of arriving audio, and version 1 ledgers
# ---------------------------------------------------------------------------------------

def test_three_batches_of_arriving_audio_move_no_clip_between_subsets_or_parts(tmp_path: Path) -> None:
    # Source: issue "Checks" (Stability); docs/split.md, The ledger.
    full = prompted_corpus()
    for spk in ("merlin", "nightjar", "osprey"):  # new speakers of the last batches
        for p in range(6):
            set_prompt(full, full.add(spk, 3.2), PROMPTS[p])
    ids = [a["clip_id"] for a in full.audio]
    batches = [set(ids[: len(ids) // 2]), set(ids[: 3 * len(ids) // 4]), set(ids[: len(ids) - 4]), set(ids)]
    data = {"split": {"heldout": "34%", "labelled_budgets": ["1m", "3m"]}}
    seen: dict[str, str] = {}
    for k, batch in enumerate(batches):
        result = split.run(make_ctx(tmp_path, full.subset(batch), data))
        now = places(result)
        moved = {c: (seen[c], now[c]) for c in seen if c in now and seen[c] != now[c]
                 and not {seen[c], now[c]} <= {"labelled", "unlabelled"}}
        assert not moved, f"batch {k}: {moved}"
        assert result.summary["changes"]["parts_moved"] == {}
        seen.update(now)
        check_parts_and_prompts(result)
    assert {"dev", "test"} <= set(seen.values())


_BINDING = {"split": {"heldout": "34%", "labelled_budgets": ["1m"]}}


def _bind_dev_and_test(tmp_path: Path) -> tuple[Corpus, dict[str, str], str]:
    """A split, then a clip from a test speaker that is a copy of a dev speaker's clip:
    the corpus, the places before the copy arrived, and the copy's clip id."""
    corpus = prompted_corpus()
    before = places(split.run(make_ctx(tmp_path, corpus, _BINDING)))
    speakers = {p: sorted({r["speaker"] for r in corpus.audio if before[r["clip_id"]] == p}) for p in ("dev", "test")}
    copied = next(r for r in corpus.audio if r["speaker"] == speakers["dev"][0])
    new = corpus.add(speakers["test"][0], copied["duration_s"], transcribed=False,
                     fingerprint=random_fingerprint(copied["clip_id"], copied["duration_s"]))
    return corpus, before, new


def _moved(before: dict[str, str], after: dict[str, str]) -> dict[str, tuple[str, str | None]]:
    """Clips whose place changed, other than between labelled and unlabelled."""
    return {c: (before[c], after.get(c)) for c in before if c in after and before[c] != after[c]
            and not {before[c], after[c]} <= {"labelled", "unlabelled"}}


def test_a_new_near_duplicate_binding_dev_and_test_moves_nothing_and_is_reported(tmp_path: Path) -> None:
    # A clip arrives from a test speaker that is a copy of a dev speaker's clip: the
    # near-duplicate binds the two groups, which the ledger holds in different parts.
    # Nothing moves (docs/split.md, The ledger), the new clip stays with its own
    # speaker's part, the split reports the bound group, and validate still says that
    # dev and test now share a near-duplicate.
    corpus, before, new = _bind_dev_and_test(tmp_path)
    data = _BINDING
    result = split.run(make_ctx(tmp_path, corpus, data))
    after = places(result)
    assert set(before) <= set(after) and _moved(before, after) == {}
    assert after[new] == "test"
    bound = all_rows(result)[new]["group"]
    assert result.summary["changes"]["straddling_parts_groups"] == [bound]
    problems = validate_out(write_out(tmp_path, result, data), audio_files=False).problems
    assert {(p.check, p.column) for p in problems} == {("part_leak", "group")}


def test_excluding_the_new_copy_at_review_unbinds_dev_and_test(tmp_path: Path) -> None:
    # The remedy docs/split.md names for a new near-duplicate binding two parts: a
    # reviewer keeps one copy (the other is excluded). An excluded clip is no longer in
    # the corpus, so it binds no groups: the parts are apart again, nothing moved, and
    # validate is clean.
    corpus, before, new = _bind_dev_and_test(tmp_path)
    data = _BINDING
    assert split.run(make_ctx(tmp_path, corpus, data)).summary["changes"]["straddling_parts_groups"]
    ctx = make_ctx(tmp_path, corpus, data)
    append_decision(decisions_file(ctx), {"decision": "exclude", "clip_id": new, "reason": "duplicate"})
    result = split.run(ctx)
    after = places(result)
    assert new not in after and set(after) == set(before) and _moved(before, after) == {}
    assert result.summary["changes"]["straddling_parts_groups"] == []
    assert [r["reason"] for r in result.rejects] == ["review_excluded"]
    assert validate_out(write_out(tmp_path, result, data), audio_files=False).problems == []


def test_version_1_ledger_gets_parts_without_moving_anything(tmp_path: Path) -> None:
    # Source: the migration note in pipeline/stages/ledger.py.
    corpus = prompted_corpus()
    data = {"split": {"heldout": "34%", "labelled_budgets": ["1m"]}}
    first = split.run(make_ctx(tmp_path, corpus, data))
    path = tmp_path / "out" / "ledger.tsv"
    lines = path.read_text(encoding="utf-8").splitlines()
    header = lines[0].replace(MAGIC, MAGIC_V1).rsplit("\tparts=", 1)[0]
    old = [header] + ["\t".join(ln.split("\t")[:-1]) if ln.split("\t")[0] in ("clip", "group") else ln
                      for ln in lines[1:]]
    path.write_text("\n".join(old) + "\n", encoding="utf-8")
    assert read_ledger(path).parts == {}
    again = split.run(make_ctx(tmp_path, corpus, data))
    before, after = all_rows(first), all_rows(again)
    assert {c: r["subset"] for c, r in before.items()} == {c: r["subset"] for c, r in after.items()}
    assert all(r["part"] in ("dev", "test") for r in after.values() if r["subset"] == "heldout")
    moved = again.summary["changes"]["parts_moved"]
    assert sum(moved.values()) == sum(r["subset"] == "heldout" for r in after.values())
    assert set(moved) <= {"(none)->dev", "(none)->test"}
    assert path.read_text(encoding="utf-8").startswith(MAGIC + "\t")
    check_parts_and_prompts(again)


# ---------------------------------------------------------------------------------------
# Sizes
# ---------------------------------------------------------------------------------------

def test_sizes_per_subset_and_part_and_withheld_untranscribed_audio(tmp_path: Path) -> None:
    corpus = prompted_corpus()
    for spk in SPEAKERS:
        corpus.add(spk, 12.0, transcribed=False)  # untranscribed audio of every speaker
    result = split.run(make_ctx(tmp_path, corpus, PROMPTED))
    rows = rows_by_subset(result)
    for name, p in result.summary["parts"].items():
        mine = [r for r in rows["heldout"] if r["part"] == name]
        assert p["clips"] == len(mine) and p["speakers"] == len({r["speaker"] for r in mine})
        assert p["seconds"] == pytest.approx(math.fsum(r["duration_s"] for r in mine), abs=1e-3)
        assert p["scorable_seconds"] == pytest.approx(math.fsum(r["duration_s"] for r in mine if r["scorable"]),
                                                      abs=1e-3)
        assert p["untranscribed_clips"] == p["speakers"] and p["untranscribed_seconds"] == 12.0 * p["speakers"]
    for name, s in result.summary["sizes"].items():
        assert s["clips"] == len(rows[name])
        assert s["scorable_clips"] == sum(r["scorable"] for r in rows[name])
    held = result.summary["sizes"]["heldout"]
    assert held["untranscribed_seconds"] == pytest.approx(12.0 * held["speakers"])


def test_subset_manifest_has_the_part_column_only_in_heldout(tmp_path: Path) -> None:
    result = split.run(make_ctx(tmp_path, prompted_corpus(), PROMPTED))
    for name in ("labelled", "unlabelled", "heldout"):
        table = result.manifests[subset_manifest(name)][1]
        values = set(table.column("part").to_pylist())
        assert values == ({"dev", "test"} if name == "heldout" else {None})
