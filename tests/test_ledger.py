"""Split ledger: format round trip, messages for malformed files, where it lives (never
inside RAW), and what a rebuild does with it (budget shrink, removals, returning groups)."""

from __future__ import annotations

import logging
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.core.config import build_config
from pipeline.core.errors import UsageError
from pipeline.stages import split
from pipeline.stages.ledger import (
    MAGIC,
    MAGIC_V1,
    ClipRecord,
    Ledger,
    _Parser,
    format_ledger,
    locate_ledger,
    parse_ledger,
    read_ledger,
)
from tests.conftest import examples, tree_hash
from tests.test_split import SPEAKERS, Corpus, all_rows, make_ctx

SETTINGS = {"group_by": "speaker", "seed": "7", "heldout": "10%", "budgets": "10m,1h", "selection": "coverage",
            "parts": "dev:50%,test:50%"}
HEADER = "\t".join([MAGIC] + [f"{k}={v}" for k, v in SETTINGS.items()])
HEADER_V1 = "\t".join([MAGIC_V1] + [f"{k}={v}" for k, v in SETTINGS.items() if k != "parts"])

ids = st.text("abcdefghijklmnopqrstuvwxyz0123456789_-", min_size=1, max_size=12)


@st.composite
def ledgers(draw: st.DrawFn) -> Ledger:
    budgets = draw(st.sampled_from([(), ("10m",), ("10m", "1h"), ("30s", "5m", "2h")]))
    groups = draw(st.dictionaries(ids, st.sampled_from(["heldout", "training"]), min_size=1, max_size=6))
    # A held-out group has a part, or none yet ("-": gone since a version 1 ledger).
    parts = {g: draw(st.sampled_from(["dev", "test", ""])) for g, side in groups.items() if side == "heldout"}
    parts = {g: p for g, p in parts.items() if p}
    clips = {}
    for cid in draw(st.lists(ids, unique=True, max_size=20)):
        group = draw(st.sampled_from(sorted(groups)))
        subset = draw(st.sampled_from(["labelled", "unlabelled", "heldout"] if budgets else ["unlabelled", "heldout"]))
        tiers: tuple[str, ...] = ()
        if subset == "labelled":
            tiers = budgets[draw(st.integers(0, len(budgets) - 1)):]
        part = draw(st.sampled_from(["dev", "test", ""])) if subset == "heldout" else ""
        clips[cid] = ClipRecord(subset, tiers, group, part)
    settings_ = dict(SETTINGS, budgets=",".join(budgets) or "-")
    return Ledger(settings_, groups, clips, parts=parts)


@settings(max_examples=examples(100), deadline=None)
@given(ledger=ledgers())
def test_round_trip(ledger: Ledger) -> None:
    # Source: the format in the docstring of pipeline/stages/ledger.py and docs/split.md, The ledger.
    text = format_ledger(ledger)
    back = parse_ledger(text, source="x.tsv")
    assert back == ledger
    assert format_ledger(back) == text
    lines = text.splitlines()
    assert lines[0].startswith(MAGIC + "\t")
    keys = [(ln.split("\t")[0], ln.split("\t")[1]) for ln in lines[1:]]
    assert keys == sorted(keys)  # sorted by kind, then id
    assert all(len(ln.split("\t")) == (6 if ln.startswith("clip\t") else 4) for ln in lines[1:])


@settings(max_examples=examples(100), deadline=None)
@given(ledger=ledgers())
def test_reading_by_kind_equals_reading_line_by_line(ledger: Ledger) -> None:
    # The fast reading of a well-formed ledger (a regular expression per kind of row)
    # must give what the line-by-line reading gives; CRLF line ends take the latter.
    text = format_ledger(ledger)
    first, _, body = text.partition("\n")
    parser = _Parser("x.tsv")
    fast = parser.parse_plain(body, parser.header(first))
    assert fast == ledger
    assert parse_ledger(text.replace("\n", "\r\n"), source="x.tsv") == ledger
    # Rows out of kind order, or a last row without its newline, are read line by line.
    lines = text.splitlines()
    shuffled = "\n".join([lines[0], *reversed(lines[1:])]) + "\n"
    assert parse_ledger(shuffled, source="x.tsv") == ledger
    assert parse_ledger(text.rstrip("\n"), source="x.tsv") == ledger


# Any text but a tab or a line end: quotes, spaces, commas, "NA", non-ASCII letters.
odd_ids = st.text(st.characters(blacklist_characters="\t\n\r", blacklist_categories=("Cs",)), min_size=1,
                  max_size=8)


@st.composite
def odd_ledger_texts(draw: st.DrawFn) -> tuple[str, bool]:
    """Ledger text with odd clip ids, and whether every row is well formed; a broken row
    (a field too many or too few, an empty id, a bad source key or state) when not."""
    tails = [("unlabelled", "-", "alder", "-"), ("heldout", "-", "wren", "test"), ("labelled", "1h", "alder", "-")]
    rows = sorted((cid, draw(st.sampled_from(tails))) for cid in draw(st.lists(odd_ids, unique=True, max_size=12)))
    lines = [HEADER, *(f"clip\t{cid}\t" + "\t".join(tail) for cid, tail in rows),
             "group\talder\ttraining\t-", "group\twren\theldout\ttest"]
    lines += [f"source\t{key:010x}\t{state}" for key, state in
              sorted(draw(st.dictionaries(st.integers(0, 2**40 - 1), st.sampled_from(["present", "gone"]),
                                          max_size=6)).items())]
    broken = draw(st.sampled_from(["", "extra field", "missing field", "empty id", "source key", "source state"]))
    at = draw(st.integers(1, len(lines) - 1))
    clip_at = next((k for k, line in enumerate(lines) if line.startswith("clip\t")), None)
    source_at = next((k for k, line in enumerate(lines) if line.startswith("source\t")), None)
    if broken == "extra field":
        lines[at] += "\t-"
    elif broken == "missing field":
        lines[at] = lines[at].rsplit("\t", 1)[0]
    elif broken == "empty id" and clip_at is not None:
        lines[clip_at] = "clip\t\t" + lines[clip_at].split("\t", 2)[2]
    elif broken in ("source key", "source state") and source_at is not None:
        kind, key, state = lines[source_at].split("\t")
        lines[source_at] = "\t".join([kind, key[:9] + "G", state] if broken == "source key" else [kind, key, "lost"])
    else:
        broken = ""
    return "\n".join(lines) + "\n", not broken


def _read(text: str) -> Ledger | str:
    try:
        return parse_ledger(text, source="x.tsv")
    except UsageError as exc:
        return str(exc)


@settings(max_examples=examples(200), deadline=None)
@given(case=odd_ledger_texts())
def test_reading_by_columns_equals_reading_line_by_line_on_odd_rows(case: tuple[str, bool]) -> None:
    # The clip and source rows are read as tab-separated columns (no quoting, no
    # escapes, no nulls): a quote, "NA" or an empty field must read as the line-by-line
    # reading reads it, and a row of another shape must leave the reading to it.
    text, well_formed = case
    parser = _Parser("x.tsv")
    first, _, body = text.partition("\n")
    fast = parser.parse_plain(body, parser.header(first))
    assert (fast is not None) == well_formed
    # CRLF line ends take the line-by-line reading.
    assert _read(text) == _read(text.replace("\n", "\r\n"))
    if fast is not None:
        assert fast == _read(text.replace("\n", "\r\n"))


def test_rows_out_of_kind_order_are_read_line_by_line() -> None:
    body = "group\talder\ttraining\t-\nclip\ta-1\tunlabelled\t-\talder\t-\n"
    parser = _Parser("x.tsv")
    assert parser.parse_plain(body, parser.header(HEADER)) is None
    found = parse_ledger(HEADER + "\n" + body, source="x.tsv")
    assert found.clips == {"a-1": ClipRecord("unlabelled", (), "alder", "")}
    assert found.groups == {"alder": "training"}


@pytest.mark.parametrize(("body", "line", "expected"), [
    ("", 1, "expected the header line"),
    ("# some other file\n", 1, "expected the header line"),
    (HEADER.replace("\tseed=7", "") + "\n", 1, "seed=VALUE"),
    (HEADER.replace("\tparts=dev:50%,test:50%", "") + "\n", 1, "parts=VALUE"),
    (HEADER.replace("budgets=10m,1h", "budgets=ten") + "\n", 1, "comma-separated durations"),
    (HEADER + "\ngroup\talder\ttraining\n", 2, "'group<TAB>id<TAB>side<TAB>part'"),
    (HEADER + "\ngroup\talder\tleft\t-\n", 2, "a side: heldout or training"),
    (HEADER + "\ngroup\talder\ttraining\t-\ngroup\talder\theldout\ttest\n", 3, "each group id once"),
    (HEADER + "\ngroup\talder\ttraining\ttest\n", 2, "only held-out rows have parts"),
    (HEADER + "\ngroup\talder\theldout\tTest\n", 2, "a part name"),
    (HEADER + "\nspeaker\talder\ttraining\n", 2, "a row starting with 'clip', 'group' or 'source'"),
    (HEADER + "\nclip\ta-1\tlabelled\t10m,1h\talder\n", 2, "6 tab-separated fields"),
    (HEADER + "\nclip\ta-1\ttrain\t-\talder\t-\ngroup\talder\ttraining\t-\n", 2, "labelled, unlabelled or heldout"),
    (HEADER + "\nclip\ta-1\tlabelled\t-\talder\t-\ngroup\talder\ttraining\t-\n", 2, "the tiers of a labelled clip"),
    (HEADER + "\nclip\ta-1\tunlabelled\t1h\talder\t-\ngroup\talder\ttraining\t-\n", 2,
     "only labelled clips have tiers"),
    (HEADER + "\nclip\ta-1\tlabelled\t10m\talder\t-\ngroup\talder\ttraining\t-\n", 2, "as tiers are nested"),
    (HEADER + "\nclip\ta-1\tlabelled\t1h,10m\talder\t-\ngroup\talder\ttraining\t-\n", 2, "as tiers are nested"),
    (HEADER + "\nclip\ta-1\tunlabelled\t-\talder\tdev\ngroup\talder\ttraining\t-\n", 2,
     "only held-out rows have parts"),
    (HEADER + "\nclip\ta-1\theldout\t-\twren\tdev\ngroup\talder\ttraining\t-\n", 2, "its own 'group' row"),
    (HEADER + "\nclip\ta-1\theldout\t-\talder\tdev\nclip\ta-1\theldout\t-\talder\tdev\n"
     "group\talder\theldout\tdev\n", 3, "each clip id once"),
    # A version 1 ledger keeps its own row shapes.
    (HEADER_V1 + "\ngroup\talder\ttraining\t-\n", 2, "'group<TAB>id<TAB>side' (3 tab-separated fields)"),
])
def test_malformed_ledger_names_file_line_and_expectation(tmp_path: Path, body: str, line: int, expected: str) -> None:
    # Source: RULES.md / README.md message style: file, line, what was found and what was expected.
    path = tmp_path / "corpus.ledger.tsv"
    path.write_text(body, encoding="utf-8")
    with pytest.raises(UsageError) as info:
        read_ledger(path)
    message = str(info.value)
    assert message.startswith(f"{path}: line {line}: found ")
    assert expected in message
    assert "--fresh" in message


def test_read_ledger_missing_crlf_and_bad_bytes(tmp_path: Path) -> None:
    # Source: UTF-8 (RFC 3629): 0xE9 alone is not a valid UTF-8 sequence.
    assert read_ledger(tmp_path / "none.tsv") is None
    path = tmp_path / "l.tsv"
    path.write_bytes((HEADER + "\r\n\r\ngroup\talder\ttraining\t-\r\n").encode())
    assert read_ledger(path).groups == {"alder": "training"}
    path.write_bytes((HEADER + "\ngroup\tal\xe9der\ttraining\t-\n").encode("latin-1"))
    with pytest.raises(UsageError, match=r"line 2: found bytes that are not UTF-8"):
        read_ledger(path)


# ---------------------------------------------------------------------------------------
# Where the ledger lives
# ---------------------------------------------------------------------------------------

def test_location_rules(tmp_path: Path) -> None:
    # Source: the split.ledger description in schemas/config.schema.json and README.md (never inside RAW).
    raw, out = tmp_path / "raw", tmp_path / "out"
    raw.mkdir()
    # Beside the config when its folder holds RAW or OUT (the corpus project) ...
    conf = tmp_path / "field.toml"
    cfg = build_config({}, source=str(conf), base_dir=str(conf.parent))
    assert locate_ledger(cfg, raw=raw, out=out) == (tmp_path / "field.ledger.tsv", "beside the config file")
    assert locate_ledger(cfg, raw=tmp_path.parent / "elsewhere", out=out)[1] == "beside the config file"
    # ... else in OUT: a shared config must not give one corpus's ledger to another.
    conf = tmp_path / "conf" / "field.toml"
    cfg = build_config({}, source=str(conf), base_dir=str(conf.parent))
    path, why = locate_ledger(cfg, raw=raw, out=out)
    assert path == out / "ledger.tsv" and "holds neither RAW nor OUT" in why
    assert locate_ledger(build_config({}, source="<defaults>"), raw=raw, out=out)[0] == out / "ledger.tsv"
    assert locate_ledger(build_config({}), raw=raw, out=out)[0] == out / "ledger.tsv"
    inside = raw / "corpus.toml"
    cfg = build_config({}, source=str(inside), base_dir=str(raw))
    path, why = locate_ledger(cfg, raw=raw, out=out)
    assert path == out / "ledger.tsv" and "inside RAW" in why
    cfg = build_config({"split": {"ledger": "../kept/split.tsv"}}, source=str(inside), base_dir=str(raw))
    # Absolute and normalised: a worker in another folder would read the same file.
    assert locate_ledger(cfg, raw=raw, out=out)[0] == tmp_path / "kept" / "split.tsv"
    cfg = build_config({"split": {"ledger": "sub/split.tsv"}}, source=str(inside), base_dir=str(raw))
    with pytest.raises(UsageError, match=r"key 'split.ledger' has value 'sub/split.tsv'.*inside RAW"):
        locate_ledger(cfg, raw=raw, out=out)


def small_corpus(speakers: int = 4, clips: int = 6) -> Corpus:
    corpus = Corpus()
    for spk in SPEAKERS[:speakers]:
        for k in range(clips):
            corpus.add(spk, 3.0 + k)
    return corpus


def test_stage_never_writes_inside_raw(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    # Source: README.md, "RAW is only ever read"; the tree is hashed with hashlib before and after.
    raw = tmp_path / "raw"
    (raw / "alder").mkdir(parents=True)
    (raw / "alder" / "a.txt").write_text("a line\n", encoding="utf-8")
    config = raw / "corpus.toml"
    config.write_text("seed = 7\n", encoding="utf-8")
    before = tree_hash(raw)
    caplog.set_level(logging.INFO)
    result = split.run(make_ctx(tmp_path, small_corpus(), {"split": {"labelled_budgets": ["20s"]}}, source=str(config)))
    assert tree_hash(raw) == before
    ledger = read_ledger(tmp_path / "out" / "ledger.tsv")
    assert set(ledger.clips) == set(all_rows(result))
    assert result.summary["ledger"]["path"] == "ledger.tsv"  # inside OUT: given from OUT
    assert any("inside RAW" in r.getMessage() for r in caplog.records)
    with pytest.raises(UsageError, match="inside RAW"):
        split.run(make_ctx(tmp_path, small_corpus(), {"split": {"ledger": "l.tsv"}}, source=str(config)))
    assert tree_hash(raw) == before


# ---------------------------------------------------------------------------------------
# Rebuilds
# ---------------------------------------------------------------------------------------

def test_stage_ledger_matches_manifests_and_reruns_unchanged(tmp_path: Path) -> None:
    # Source: docs/split.md, The ledger: one row per clip and group, unchanged when nothing changed.
    corpus = small_corpus()
    data = {"split": {"labelled_budgets": ["10s", "30s"], "heldout": "25%"}}
    first = split.run(make_ctx(tmp_path, corpus, data))
    path = tmp_path / "out" / "ledger.tsv"
    text = path.read_text(encoding="utf-8")
    ledger = parse_ledger(text, source=str(path))
    for cid, row in all_rows(first).items():
        assert ledger.clips[cid] == ClipRecord(row["subset"], tuple(row["tiers"]), row["group"], row["part"] or "")
        side = "heldout" if row["subset"] == "heldout" else "training"
        assert ledger.groups[row["group"]] == side
    again = split.run(make_ctx(tmp_path, corpus, data))
    assert path.read_text(encoding="utf-8") == text
    assert all_rows(again) == all_rows(first)
    assert again.summary["changes"]["added"] == {"labelled": 0, "unlabelled": 0, "heldout": 0}
    assert again.summary["ledger"]["read"] is True


def test_budget_shrink_drops_clips_added_last_and_says_so(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    # Source: docs/split.md, The ledger: a shrunk budget drops the clips added last, within one clip.
    corpus = small_corpus(speakers=5, clips=10)
    split.run(make_ctx(tmp_path, corpus, {"split": {"labelled_budgets": ["20s", "2m"], "heldout": "20%"}}))
    before = all_rows(split.run(make_ctx(tmp_path, corpus, {"split": {"labelled_budgets": ["20s", "2m"],
                                                                      "heldout": "20%"}})))
    caplog.set_level(logging.INFO)
    result = split.run(make_ctx(tmp_path, corpus, {"split": {"labelled_budgets": ["20s", "1m"], "heldout": "20%"}}))
    after = all_rows(result)
    messages = [r.getMessage() for r in caplog.records]
    assert any("budget 1m is smaller than the ledger's 2m" in m and "left tier 1m" in m for m in messages), messages
    small_before = {c for c, r in before.items() if "20s" in r["tiers"]}
    big_before = {c for c, r in before.items() if "2m" in r["tiers"]}
    small_after = {c for c, r in after.items() if "20s" in r["tiers"]}
    big_after = {c for c, r in after.items() if "1m" in r["tiers"]}
    assert small_after == small_before  # the unchanged tier keeps every clip
    assert small_after <= big_after <= big_before  # the shrunk tier only loses clips
    total = sum(after[c]["duration_s"] for c in big_after)
    assert 60.0 <= total < 60.0 + max(after[c]["duration_s"] for c in big_after)
    left = big_before - big_after
    assert left and all(after[c]["subset"] == "unlabelled" for c in left)
    changes = result.summary["changes"]
    assert changes["renamed_tiers"] == {"1m": "2m"}
    assert changes["tiers_left"] == {"1m": len(left)} and changes["moved"] == {"labelled->unlabelled": len(left)}
    # Held-out is untouched by a budget change.
    assert {c for c, r in after.items() if r["subset"] == "heldout"} == \
        {c for c, r in before.items() if r["subset"] == "heldout"}


def test_removed_clips_and_returning_groups(tmp_path: Path) -> None:
    # Source: docs/split.md, The ledger: removed clips are counted; group rows outlive their clips.
    corpus = small_corpus(speakers=5, clips=4)
    data = {"split": {"labelled_budgets": ["20s"], "heldout": "20%"}}
    first = all_rows(split.run(make_ctx(tmp_path, corpus, data)))
    held = sorted({r["speaker"] for r in first.values() if r["subset"] == "heldout"})
    assert held
    gone = {c for c, r in first.items() if r["speaker"] == held[0]}
    second = split.run(make_ctx(tmp_path, corpus.subset(set(first) - gone), data))
    assert second.summary["changes"]["removed"]["heldout"] == len(gone)
    assert read_ledger(tmp_path / "out" / "ledger.tsv").groups[held[0]] == "heldout"  # kept for its return
    # The speaker comes back with new recordings: they follow the group's side.
    returning = corpus.subset(set(first) - gone)
    new_ids = {returning.add(held[0], 5.0) for _ in range(3)}
    third = all_rows(split.run(make_ctx(tmp_path, returning, data)))
    assert all(third[c]["subset"] == "heldout" for c in new_ids)


def test_fresh_ignores_a_malformed_ledger_and_rewrites_it(tmp_path: Path) -> None:
    # Source: the --fresh help of pipeline/commands/cli.py: ignore the split ledger.
    path = tmp_path / "out" / "ledger.tsv"
    path.parent.mkdir(parents=True)
    path.write_text("not a ledger\n", encoding="utf-8")
    with pytest.raises(UsageError, match=r"ledger.tsv: line 1"):
        split.run(make_ctx(tmp_path, small_corpus(), {}))
    result = split.run(make_ctx(tmp_path, small_corpus(), {}, fresh=True))
    assert result.summary["ledger"] == {"path": "ledger.tsv", "where": "no config file", "read": False, "fresh": True}
    assert set(read_ledger(path).clips) == set(all_rows(result))


def test_heldout_clip_that_was_gone_returns_to_heldout_under_another_grouping(tmp_path: Path) -> None:
    # Source: docs/split.md, The ledger: "a held-out clip never moves to training"; the row
    # of a gone held-out clip stays, as its new group (after a group_by change) has no row.
    corpus = small_corpus(speakers=5, clips=4)
    data = {"split": {"labelled_budgets": ["20s"], "heldout": "20%"}}
    first = all_rows(split.run(make_ctx(tmp_path, corpus, data)))
    held = sorted(c for c, r in first.items() if r["subset"] == "heldout")
    assert held
    second = split.run(make_ctx(tmp_path, corpus.subset(set(first) - set(held)), data))
    assert second.summary["changes"]["removed"]["heldout"] == len(held)
    ledger = read_ledger(tmp_path / "out" / "ledger.tsv")
    assert {c: ledger.clips[c].subset for c in held} == dict.fromkeys(held, "heldout")
    by_clip = {"split": {**data["split"], "group_by": "clip"}}
    third = all_rows(split.run(make_ctx(tmp_path, corpus, by_clip)))
    assert {c: third[c]["subset"] for c in held} == dict.fromkeys(held, "heldout")
    assert set(read_ledger(tmp_path / "out" / "ledger.tsv").clips) == set(first)


# ---------------------------------------------------------------------------------------
# The corpus a ledger describes
# ---------------------------------------------------------------------------------------

def test_another_corpus_against_the_ledger_stops_and_leaves_it_byte_identical(tmp_path: Path) -> None:
    # Source: docs/split.md, "The ledger belongs to its corpus": a corpus sharing less than
    # half of the smaller source set is refused with exit 2 (UsageError) and the ledger kept.
    data = {"split": {"labelled_budgets": ["20s"], "heldout": "20%"}}
    split.run(make_ctx(tmp_path, small_corpus(), data))
    path = tmp_path / "out" / "ledger.tsv"
    before = path.read_bytes()
    assert read_ledger(path).sources  # the corpus identity is recorded
    other = Corpus(counter=10_000)  # other content: no source hash in common
    for spk in SPEAKERS[:4]:
        for k in range(6):
            other.add(spk, 3.0 + k)
    with pytest.raises(UsageError, match=r"ledger.tsv: this split ledger describes corpus [0-9a-f]{12} "
                                         r"\(24 sources\), but RAW .* is corpus [0-9a-f]{12} \(24 sources\), "
                                         r"sharing 0") as caught:
        split.run(make_ctx(tmp_path, other, data))
    assert caught.value.exit_code == 2
    assert path.read_bytes() == before
    # The ways out: --fresh overwrites it, another ledger path leaves it alone.
    split.run(make_ctx(tmp_path, other, {"split": {**data["split"], "ledger": str(tmp_path / "other.tsv")}},
                       source=str(tmp_path / "conf" / "c.toml")))
    assert path.read_bytes() == before and (tmp_path / "other.tsv").exists()
    split.run(make_ctx(tmp_path, other, data, fresh=True))
    assert path.read_bytes() != before


def test_moving_or_growing_the_corpus_keeps_its_ledger(tmp_path: Path) -> None:
    # Source: docs/split.md, "The ledger belongs to its corpus": the identity is the sources'
    # content, so renamed files, a moved RAW and arriving audio keep the ledger.
    corpus = small_corpus()
    data = {"split": {"labelled_budgets": ["20s"], "heldout": "20%"}}
    first = all_rows(split.run(make_ctx(tmp_path, corpus, data)))
    for row in corpus.audio:
        row["source_path"] = "moved/" + row["source_path"]
    for spk in SPEAKERS[:6]:
        for k in range(8):  # twice the corpus arrives
            corpus.add(spk, 4.0 + k)
    again = all_rows(split.run(make_ctx(tmp_path / "elsewhere", corpus, data | {"split": {
        **data["split"], "ledger": str(tmp_path / "out" / "ledger.tsv")}}, source=str(tmp_path / "c.toml"))))
    assert {c: again[c]["subset"] for c in first} == {c: r["subset"] for c, r in first.items()}


def test_every_gone_source_is_kept_and_returns_to_its_subset(tmp_path: Path) -> None:
    # Source: docs/split.md, The ledger: entries are never dropped; a source that is gone
    # stays as gone, and when it comes back its clips return to their subset and tiers.
    corpus = small_corpus(speakers=5, clips=6)
    data = {"split": {"labelled_budgets": ["20s"], "heldout": "20%"}}
    first = all_rows(split.run(make_ctx(tmp_path, corpus, data)))
    # One clip of each subset leaves.
    gone = {sorted(c for c, r in first.items() if r["subset"] == s)[0] for s in ("labelled", "unlabelled", "heldout")}
    second = split.run(make_ctx(tmp_path, corpus.subset(set(first) - gone), data))
    assert second.summary["changes"]["removed"] == {"labelled": 1, "unlabelled": 1, "heldout": 1}
    assert second.summary["changes"]["gone_sources"] == 3
    ledger = read_ledger(tmp_path / "out" / "ledger.tsv")
    assert set(ledger.clips) == set(first)
    assert sorted(k for k, v in ledger.sources.items() if v == "gone") == sorted(c.rsplit("-", 1)[1] for c in gone)
    back = split.run(make_ctx(tmp_path, corpus, data))
    assert back.summary["changes"]["returned_sources"] == 3
    rows = all_rows(back)
    assert {c: (rows[c]["subset"], rows[c]["tiers"]) for c in gone} == \
        {c: (first[c]["subset"], first[c]["tiers"]) for c in gone}
    assert [c for c, r in rows.items() if (r["subset"] == "heldout") != (first[c]["subset"] == "heldout")] == []
    assert set(read_ledger(tmp_path / "out" / "ledger.tsv").sources.values()) == {"present"}


def test_source_keys_equal_source_key_of_each_id() -> None:
    # The Arrow path takes ingest's ids (ten hex digits after the last hyphen); ids of
    # other shapes, a final newline among them (Python's "$" matches before it, RE2's
    # does not), take source_key itself.
    import pyarrow as pa

    from pipeline.stages.ledger import source_key, source_keys

    ids = ["alder_01-0123456789", "0123456789", "abcdef0123\n", "x-abcdef0123\n", "x-ABCDEF0123", "ü-9876543210",
           "a-b-c-fedcba9876", "-0011223344", "00112233445", "x-0011223344-", "no-hash-here", "alder_01-0123456789"]
    assert source_keys(pa.chunked_array([ids[:5], ids[5:]])) == {source_key(i) for i in ids}
    assert source_keys(pa.array([], pa.string())) == set()


# An id in ingest's shape (ten hex digits after a hyphen) or near it: upper case, a
# non-hex letter, a final newline or hyphen, no hyphen, too few digits, non-ASCII.
_HEX = "0123456789abcdef"
_near_ids = st.one_of(
    st.builds(lambda head, sep, key, tail: head + sep + key + tail,
              st.text("ab_ü-", max_size=4), st.sampled_from(["-", "", "x", "--"]),
              st.text(_HEX, min_size=8, max_size=11), st.sampled_from(["", "", "", "\n", "-", "g", "A"])),
    st.text(_HEX + "ABCDEFg-_\nü ", max_size=14))


_usual_ids = st.builds(lambda head, key: f"{head}-{key}", st.text("ab_ü", max_size=3),
                       st.text(_HEX, min_size=10, max_size=10))


@settings(max_examples=300, deadline=None)
@given(st.lists(_usual_ids, max_size=30), st.lists(_near_ids, max_size=10), st.integers(0, 40), st.booleans())
def test_sorted_source_keys_equal_sorting_source_key_of_each_id(usual: list[str], near: list[str], cut: int,
                                                                sliced: bool) -> None:
    """The keys read as numbers equal :func:`source_key` of each id, distinct and sorted
    by Python, for chunked and sliced arrays too (an Arrow slice keeps its parent's buffers)."""
    import pyarrow as pa

    from pipeline.stages.ledger import sorted_source_keys, source_key

    ids = usual + near + usual[:3]
    chunks = pa.chunked_array([ids[:cut], ids[cut:]], pa.string())
    array = pa.array(["0123456789"] + ids, pa.string()).slice(1) if sliced else chunks
    assert sorted_source_keys(array) == sorted({source_key(i) for i in ids})
