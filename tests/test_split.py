"""Split stage: groups, gates, held-out ranking, nested tiers, determinism, rebuild stability.

Audio and text tables are built here with ``table_from_rows`` (the audio and text
stages are tested on their own); the stage's ``run`` is called directly.
"""

from __future__ import annotations

import hashlib
import io
import itertools
import logging
import math
import re
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from pipeline.core.config import build_config
from pipeline.core.errors import DataError, UsageError
from pipeline.core.manifest import table_from_rows, validate_table
from pipeline.core.stage import StageContext, StageResult
from pipeline.signal.fingerprint import decode_fingerprint, encode_fingerprint
from pipeline.stages import split
from tests.conftest import examples

REPO = Path(__file__).resolve().parent.parent
# The 39 stressless ARPAbet phones of the CMU Pronouncing Dictionary.
ARPABET = ["AA", "AE", "AH", "AO", "AW", "AY", "B", "CH", "D", "DH", "EH", "ER", "EY", "F", "G", "HH", "IH", "IY", "JH", "K", "L", "M", "N", "NG", "OW", "OY", "P", "R", "S", "SH", "T", "TH", "UH", "UW", "V", "W", "Y", "Z", "ZH"]
SPEAKERS = ("alder", "heron", "otter", "plover", "sedge", "wren", "linnet", "teal")
MIN_SNR_DB = 5.0  # the schema default of quality.min_snr_db
MIN_BANDWIDTH_HZ = 5000.0  # the schema default of quality.min_bandwidth_hz
MAX_CLIPPED_FRACTION = 0.001  # the schema default of audio.max_clipped_fraction


# ---------------------------------------------------------------------------------------
# Corpus builder
# ---------------------------------------------------------------------------------------

def _seed_of(text: str) -> int:
    return int.from_bytes(hashlib.sha256(text.encode()).digest()[:8], "little")


def random_fingerprint(key: str, duration_s: float) -> np.ndarray:
    rng = np.random.default_rng(_seed_of(key))
    return rng.integers(1, 2**32, size=max(8, min(int(duration_s * 86), 256)), dtype=np.uint32)


@dataclass
class Corpus:
    """Audio rows (one per clip) and text rows (one per accepted transcript)."""

    audio: list[dict[str, Any]] = field(default_factory=list)
    text: list[dict[str, Any]] = field(default_factory=list)
    counter: int = 0

    def add(self, speaker: str, duration_s: float, *, transcribed: bool = True, phones: list[str] | None = None,
            rate: float = 12.0, accepted: bool = True, source_id: str | None = None, start_ms: int | None = None,
            snr_db: float | None = 25.0, bandwidth_hz: float | None = 7500.0, sha: str | None = None,
            fingerprint: np.ndarray | None = None, upsampled_from: int | None = None,
            peak_limited_db: float = 0.0, clipped_fraction: float = 0.0) -> str:
        self.counter += 1
        source = source_id or f"{speaker}-{self.counter:010x}"
        cid = source if start_ms is None else f"{source}_{start_ms:08d}"
        speech_s = 0.9 * duration_s
        fp = random_fingerprint(cid, duration_s) if fingerprint is None else fingerprint
        self.audio.append({
            "clip_id": cid, "source_id": source, "source_path": f"{speaker}/{source}.wav", "speaker": speaker,
            "audio_path": f"audio/{speaker}/{cid}.flac",
            "audio_sha256": sha or hashlib.sha256(cid.encode()).hexdigest(),
            "sample_rate": 16000, "num_samples": max(1, round(duration_s * 16000)), "duration_s": duration_s,
            "source_start_s": (start_ms or 0) / 1000, "source_end_s": (start_ms or 0) / 1000 + duration_s,
            "source_sample_rate": 16000 if upsampled_from is None else upsampled_from,
            "upsampled_from": upsampled_from, "segment_index": 0, "speech_s": speech_s, "speech_ratio": 0.9,
            "loudness_in_lufs": -31.0, "loudness_lufs": -23.0, "gain_db": 8.0, "peak_limited_db": peak_limited_db,
            "peak_dbfs": -2.0, "clipped_fraction": clipped_fraction, "dc_offset": 0.0, "snr_db": snr_db,
            "bandwidth_hz": bandwidth_hz, "fingerprint": encode_fingerprint(fp), "transcribed": transcribed,
        })
        if transcribed and accepted:
            if phones is None:
                rng = np.random.default_rng(_seed_of(cid))
                phones = list(rng.choice(ARPABET, size=max(1, round(rate * speech_s))))
            self.text.append({
                "clip_id": cid, "transcript": f"words of {cid}", "norm_text": f"words of {cid}",
                "words": ["words", "of", cid], "phones": phones, "word_backends": ["cmudict"] * 3, "oov_words": [], "language": "en",
                "transcript_origin": "sidecar",
            })
        return cid

    def subset(self, ids: set[str]) -> Corpus:
        return Corpus([r for r in self.audio if r["clip_id"] in ids], [r for r in self.text if r["clip_id"] in ids],
                      self.counter)

    def inputs(self, order: np.random.Generator | None = None) -> dict[str, Any]:
        audio, text = list(self.audio), list(self.text)
        if order is not None:
            audio = [audio[i] for i in order.permutation(len(audio))]
            text = [text[i] for i in order.permutation(len(text))]
        return {"audio": table_from_rows("audio", audio), "text": table_from_rows("text", text)}


def make_ctx(root: Path, corpus: Corpus, data: dict[str, Any] | None = None, *, fresh: bool = False,
             order: np.random.Generator | None = None, source: str | None = None) -> StageContext:
    data = {"seed": 7, **(data or {})}
    cfg = build_config(data) if source is None else build_config(data, source=source, base_dir=str(Path(source).parent))
    log = logging.getLogger("split-tests")  # not under "loam", whose handlers the runner replaces
    log.setLevel(logging.INFO)
    return StageContext(raw=root / "raw", out=root / "out", config=cfg, inputs=corpus.inputs(order), workers=1,
                        log=log, options={"fresh": fresh})


def rows_by_subset(result: StageResult) -> dict[str, list[dict[str, Any]]]:
    return {s: result.manifests[split.SUBSET_PATHS[s]][1].to_pylist() for s in split.SUBSETS}


def all_rows(result: StageResult) -> dict[str, dict[str, Any]]:
    return {r["clip_id"]: r for rows in rows_by_subset(result).values() for r in rows}


def eligible_ids(corpus: Corpus, quality_config: dict[str, Any] | None = None) -> set[str]:
    """Eligibility recomputed from the inputs (rate gate disabled where this is used).

    Defaults from schemas/config.schema.json: noisy clips are demoted, narrowband and
    clipped ones only flagged."""
    q = {"noisy_action": "demote", "narrowband_action": "flag", "clipped_action": "flag", **(quality_config or {})}
    has_text = {t["clip_id"] for t in corpus.text}
    out = set()
    for a in corpus.audio:
        noisy = a["snr_db"] is not None and a["snr_db"] < MIN_SNR_DB
        narrow = a["bandwidth_hz"] is not None and a["bandwidth_hz"] < MIN_BANDWIDTH_HZ
        clipped = a["clipped_fraction"] > MAX_CLIPPED_FRACTION
        held = ((noisy and q["noisy_action"] != "flag") or (narrow and q["narrowband_action"] == "demote")
                or (clipped and q["clipped_action"] != "flag"))
        if a["clip_id"] in has_text and not held:
            out.add(a["clip_id"])
    return out


# ---------------------------------------------------------------------------------------
# Ranking hash and the worked example
# ---------------------------------------------------------------------------------------

def test_sha256_reference_and_rank_key() -> None:
    # FIPS 180-4 (Secure Hash Standard), example "abc" for SHA-256.
    assert hashlib.sha256(b"abc").hexdigest() == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    # The documented formula, computed by hashlib: SHA-256 of f"{seed}\t{group}" in UTF-8.
    for seed, group in [(0, "alder"), (7, "wren"), (12345, "spk_3"), (7, "grèbe-ü")]:
        expected = hashlib.sha256(f"{seed}\t{group}".encode()).hexdigest()
        assert split.group_rank_key(group, seed=seed) == expected
    assert split.group_rank_key("grèbe-ü", seed=1) == hashlib.sha256("1\tgrèbe-ü".encode()).hexdigest()
    ranked = split.rank_groups(["c", "a", "b"], seed=3)
    assert ranked == sorted("abc", key=lambda g: hashlib.sha256(f"3\t{g}".encode()).hexdigest())


def parse_worked_example() -> list[dict[str, str]]:
    text = (REPO / "docs" / "split.md").read_text(encoding="utf-8")
    section = text.split("## Worked example", 1)[1].split("\n## ", 1)[0]
    lines = [ln.strip() for ln in section.splitlines() if ln.strip().startswith("|")]
    header = [c.strip() for c in lines[0].strip("|").split("|")]
    rows = []
    for ln in lines[2:]:
        cells = [c.strip() for c in ln.strip("|").split("|")]
        rows.append(dict(zip(header, cells, strict=True)))
    return rows


def test_worked_example_in_docs(tmp_path: Path) -> None:
    # Source: the table in docs/split.md, keys recomputed with hashlib.
    rows = parse_worked_example()
    seed = int(re.search(r"`seed = (\d+)`", (REPO / "docs" / "split.md").read_text()).group(1))
    heldout = re.search(r'`split.heldout = "([^"]+)"`', (REPO / "docs" / "split.md").read_text().split(
        "## Worked example", 1)[1]).group(1)
    key_column = next(k for k in rows[0] if k.startswith("key"))
    assert len(rows) >= 5
    for row in rows:
        # Every key recomputed with hashlib.
        assert row[key_column] == hashlib.sha256(f"{seed}\t{row['group']}".encode()).hexdigest()
    by_key = sorted(rows, key=lambda r: r[key_column])
    assert [int(r["rank"]) for r in by_key] == list(range(1, len(rows) + 1))

    corpus = Corpus()
    for row in rows:
        for column, transcribed in (("eligible transcribed s", True), ("untranscribed s", False)):
            left = float(row[column])
            while left > 1e-9:  # 10 s clips, so held-out totals are the table's sums
                corpus.add(row["group"], min(10.0, left), transcribed=transcribed)
                left -= min(10.0, left)
    result = split.run(make_ctx(tmp_path, corpus, {"seed": seed, "split": {"heldout": heldout,
                                                                           "labelled_budgets": ["1m"]}}))
    side_of = {}
    for r in all_rows(result).values():
        side_of.setdefault(r["group"], set()).add("heldout" if r["subset"] == "heldout" else "training")
    assert {g: s.pop() for g, s in side_of.items()} == {r["group"]: r["side"] for r in rows}
    part_of = {r["group"]: r["part"] or "-" for r in all_rows(result).values()}
    assert part_of == {r["group"]: r["part"] for r in rows}


# ---------------------------------------------------------------------------------------
# Random corpora and the invariants every split must keep
# ---------------------------------------------------------------------------------------

def random_corpus(sizes: list[int], seed: int, *, dup_share: float) -> tuple[Corpus, set[str]]:
    """Speakers with random clips; the first clip of the first two speakers is always
    eligible (returned as ``anchors``), the rest random in duration, transcript, SNR,
    bandwidth and, for speakers after the first two, byte-identical copies."""
    rng = np.random.default_rng(seed)
    corpus = Corpus()
    anchors = set()
    copyable: list[str] = []
    for s, n in enumerate(sizes):
        for k in range(n):
            anchor = k == 0 and s < 2
            duration = float(rng.uniform(0.5, 20.0))
            transcribed = anchor or bool(rng.random() < 0.7)
            sha = None
            if not anchor and s >= 2 and copyable and rng.random() < dup_share:
                source = copyable[int(rng.integers(len(copyable)))]
                sha = next(r["audio_sha256"] for r in corpus.audio if r["clip_id"] == source)
            cid = corpus.add(
                SPEAKERS[s], duration, transcribed=transcribed, accepted=anchor or bool(rng.random() < 0.9),
                rate=float(rng.uniform(10.0, 14.0)), sha=sha,
                snr_db=25.0 if anchor else float(rng.choice([2.0, 25.0, 30.0], p=[0.2, 0.4, 0.4])),
                bandwidth_hz=7500.0 if anchor else float(rng.choice([3400.0, 7500.0], p=[0.15, 0.85])),
                clipped_fraction=0.0 if anchor else float(rng.choice([0.0, 0.0004, 0.02], p=[0.8, 0.1, 0.1])),
            )
            if anchor:
                anchors.add(cid)
            elif s >= 2:
                copyable.append(cid)
    return corpus, anchors


NO_RATE_GATE = {"rate_max_abs_z": 1e9}  # rate gating is tested on its own below

configs = st.fixed_dictionaries({
    "seed": st.integers(0, 2**31),
    "split": st.fixed_dictionaries({
        "group_by": st.sampled_from(["speaker", "recording", "clip"]),
        "heldout": st.sampled_from(["20%", "45s", "0%", "60%", "10m"]),
        "labelled_budgets": st.sampled_from([["20s", "1m"], ["10s", "30s", "2m"], ["1m"], [], ["5m", "10h"]]),
        "selection": st.sampled_from(["coverage", "random"]),
    }),
    "quality": st.fixed_dictionaries({**{k: st.just(v) for k, v in NO_RATE_GATE.items()},
                                      "noisy_action": st.sampled_from(["demote", "flag"]),
                                      "narrowband_action": st.sampled_from(["flag", "demote"]),
                                      "clipped_action": st.sampled_from(["flag", "demote", "reject"])}),
})
corpus_shapes = st.tuples(st.lists(st.integers(1, 6), min_size=2, max_size=6), st.integers(0, 2**32 - 1),
                          st.sampled_from([0.0, 0.15]))
PROPERTY_SETTINGS = settings(max_examples=examples(40), deadline=None,
                             suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


def check_invariants(corpus: Corpus, data: dict[str, Any], result: StageResult, *, fresh: bool) -> None:
    rows = rows_by_subset(result)
    for s, table_rows in rows.items():
        assert all(r["subset"] == s for r in table_rows)
        assert [r["clip_id"] for r in table_rows] == sorted(r["clip_id"] for r in table_rows)
        validate_table("subset", result.manifests[split.SUBSET_PATHS[s]][1], where=s)
    by_id = all_rows(result)
    rejected = {r["clip_id"] for r in result.rejects}
    # Disjoint and complete: every audio clip exactly once in a subset or the rejects.
    ids = [r["clip_id"] for rs in rows.values() for r in rs] + sorted(rejected)
    assert len(ids) == len(set(ids))
    assert set(ids) == {a["clip_id"] for a in corpus.audio}

    eligible = eligible_ids(corpus, data.get("quality"))
    durations = {a["clip_id"]: a["duration_s"] for a in corpus.audio}
    training = {r["group"] for s in ("labelled", "unlabelled") for r in rows[s]}
    heldout_groups = {r["group"] for r in rows["heldout"]}
    straddling = set(result.summary["changes"]["straddling_groups"])
    assert not (training & heldout_groups) - straddling
    assert all(r["clip_id"] in eligible for r in rows["labelled"])
    if fresh:
        assert not straddling
    assert all(r["transcript"] is None and r["phones"] is None for r in rows["unlabelled"])
    assert all(r["tiers"] == [] for s in ("unlabelled", "heldout") for r in rows[s])
    assert all(("heldout_untranscribed" in r["quality_flags"]) == (r["transcript"] is None) for r in rows["heldout"])

    budgets = sorted(data["split"]["labelled_budgets"], key=split.parse_duration_s)
    members = {b: [r["clip_id"] for r in rows["labelled"] if b in r["tiers"]] for b in budgets}
    for r in rows["labelled"]:
        assert r["tiers"] and r["tiers"] == budgets[len(budgets) - len(r["tiers"]):]  # a run of the largest
    for small, large in itertools.pairwise(budgets):
        assert set(members[small]) <= set(members[large])
    shortfalls = {s["tier"]: s for s in result.summary["shortfalls"]}
    waiting = [r["clip_id"] for r in rows["unlabelled"] if r["clip_id"] in eligible]
    for b in budgets:
        total = math.fsum(durations[c] for c in members[b])
        budget = split.parse_duration_s(b)
        if total >= budget:
            assert b not in shortfalls
            assert total - budget < max(durations[c] for c in members[b])  # within one clip
        else:
            assert shortfalls[b]["shortfall_s"] == pytest.approx(budget - total, abs=1e-3)
            if fresh:
                assert not waiting  # every eligible training clip was taken

    # Held-out: a prefix of the ranking of groups with eligible audio (fresh runs).
    group_of = {c: r["group"] for c, r in by_id.items()}
    eligible_s: dict[str, float] = {}
    for c in eligible - rejected:
        eligible_s[group_of[c]] = eligible_s.get(group_of[c], 0.0) + durations[c]
    if len(eligible_s) >= 2:
        assert any(g in training for g in eligible_s)  # one group always trains
    if fresh:
        # The default parts, dev and test, each half the target; each group in ranking order
        # goes to the part least filled (ties to dev) until both are full, one group left to train.
        target = split.heldout_target_s(data["split"]["heldout"], transcribed_s=math.fsum(eligible_s.values()))
        ranked = sorted(eligible_s, key=lambda g: hashlib.sha256(f"{data.get('seed', 7)}\t{g}".encode()).hexdigest())
        expected: dict[str, str] = {}
        filled = {"dev": 0.0, "test": 0.0}
        for k, g in enumerate(ranked):
            open_parts = [p for p in filled if filled[p] < target / 2]
            if not open_parts or k == len(ranked) - 1:
                break
            part = min(open_parts, key=lambda p: (filled[p] / (target / 2), p))
            expected[g] = part
            filled[part] += eligible_s[g]
        assert {g for g in heldout_groups if g in eligible_s} == set(expected)
        assert heldout_groups <= set(expected)
        assert all(r["part"] == expected[r["group"]] for r in rows["heldout"])
    assert all(r["part"] is None for s in ("labelled", "unlabelled") for r in rows[s])
    for part in ("dev", "test"):  # parts are disjoint by group
        assert not {r["group"] for r in rows["heldout"] if r["part"] == part} & \
            {r["group"] for r in rows["heldout"] if r["part"] != part}


@PROPERTY_SETTINGS
@given(shape=corpus_shapes, data=configs)
def test_random_corpora_keep_every_invariant(shape: tuple[list[int], int, float], data: dict[str, Any]) -> None:
    # Source: the split rules of docs/split.md (Groups, Held-out groups, Labelled tiers); ranking keys by hashlib.
    sizes, seed, dup_share = shape
    corpus, _ = random_corpus(sizes, seed, dup_share=dup_share)
    with tempfile.TemporaryDirectory() as tmp:
        result = split.run(make_ctx(Path(tmp), corpus, data))
    check_invariants(corpus, data, result, fresh=True)


@PROPERTY_SETTINGS
@given(shape=corpus_shapes, data=configs, arrival_seed=st.integers(0, 2**32 - 1), batches=st.integers(2, 4))
def test_rebuilds_under_random_arrivals_keep_old_assignments(
        shape: tuple[list[int], int, float], data: dict[str, Any], arrival_seed: int, batches: int) -> None:
    # Source: the rebuild rules of docs/split.md (The ledger): same config, old clips keep subset and tiers.
    sizes, seed, dup_share = shape
    corpus, anchors = random_corpus(sizes, seed, dup_share=dup_share)
    rng = np.random.default_rng(arrival_seed)
    others = [a["clip_id"] for a in corpus.audio if a["clip_id"] not in anchors]
    arrival = [int(b) for b in rng.integers(0, batches, size=len(others))]
    previous: dict[str, dict[str, Any]] = {}
    ever_heldout: set[str] = set()
    with tempfile.TemporaryDirectory() as tmp:
        for b in range(batches):
            present = anchors | {c for c, when in zip(others, arrival, strict=True) if when <= b}
            part = corpus.subset(present)
            result = split.run(make_ctx(Path(tmp), part, data, order=rng))
            check_invariants(part, data, result, fresh=b == 0)
            now = all_rows(result)
            for cid, before in previous.items():
                # Same config: an old clip keeps its subset and its tiers.
                assert (now[cid]["subset"], now[cid]["tiers"]) == (before["subset"], before["tiers"]), cid
            assert all(now[c]["subset"] == "heldout" for c in ever_heldout)
            ever_heldout |= {c for c, r in now.items() if r["subset"] == "heldout"}
            changes = result.summary["changes"]
            assert sum(changes["added"].values()) == len(set(now) - set(previous))
            assert changes["moved"] == {}
            previous = now


changed_configs = st.lists(configs, min_size=2, max_size=4)


def _run_config(seed: int, *, group_by: str = "speaker", clipped_action: str = "flag") -> dict[str, Any]:
    return {"seed": seed,
            "split": {"group_by": group_by, "heldout": "20%", "labelled_budgets": ["1m"], "selection": "coverage"},
            "quality": {**NO_RATE_GATE, "noisy_action": "demote", "narrowband_action": "flag",
                        "clipped_action": clipped_action}}


# A held-out clipped clip is set aside by clipped_action = "reject", then comes back
# under group_by = "recording", where its new group had no ledger row.
GONE_AND_BACK = [_run_config(1), _run_config(0), _run_config(0, clipped_action="reject"),
                 _run_config(0, group_by="recording")]


@PROPERTY_SETTINGS
@given(shape=corpus_shapes, runs=changed_configs, arrival_seed=st.integers(0, 2**32 - 1))
@example(shape=([5, 1], 1, 0.0), runs=GONE_AND_BACK, arrival_seed=0)
def test_heldout_clip_never_moves_to_training_whatever_changes(
        shape: tuple[list[int], int, float], runs: list[dict[str, Any]], arrival_seed: int) -> None:
    # Source: docs/split.md, The ledger: "a held-out clip never moves to training".
    sizes, seed, dup_share = shape
    corpus, anchors = random_corpus(sizes, seed, dup_share=dup_share)
    rng = np.random.default_rng(arrival_seed)
    others = [a["clip_id"] for a in corpus.audio if a["clip_id"] not in anchors]
    arrival = [int(b) for b in rng.integers(0, len(runs), size=len(others))]
    ever_heldout: set[str] = set()
    with tempfile.TemporaryDirectory() as tmp:
        for b, data in enumerate(runs):
            present = anchors | {c for c, when in zip(others, arrival, strict=True) if when <= b}
            try:
                result = split.run(make_ctx(Path(tmp), corpus.subset(present), data))
            except DataError:
                continue  # e.g. the group_by of this run binds the anchors into one group
            now = all_rows(result)
            assert all(now[c]["subset"] == "heldout" for c in ever_heldout if c in now)
            ever_heldout |= {c for c, r in now.items() if r["subset"] == "heldout"}


# ---------------------------------------------------------------------------------------
# Groups
# ---------------------------------------------------------------------------------------

def single_speaker_corpus() -> Corpus:
    corpus = Corpus()
    for k in range(8):
        corpus.add("alder", 3.0 + k % 3)
    for start_ms in (0, 12000, 24000):  # one long untranscribed recording in three segments
        corpus.add("alder", 12.0, transcribed=False, source_id="alder-marsh-0123456789", start_ms=start_ms)
    return corpus


def test_single_speaker_needs_another_grouping(tmp_path: Path) -> None:
    # Source: docs/split.md, Groups: fewer than two groups stop the run with advice.
    with pytest.raises(DataError) as info:
        split.run(make_ctx(tmp_path, single_speaker_corpus(), {"split": {"heldout": "20%"}}))
    message = str(info.value)
    assert "only 1 group (alder)" in message
    assert 'split.group_by = "recording"' in message


@pytest.mark.parametrize("group_by", ["recording", "clip"])
def test_single_speaker_by_recording_or_clip(tmp_path: Path, group_by: str) -> None:
    # Source: docs/split.md, Groups: a recording's segments share a group; "clip" makes each clip one.
    corpus = single_speaker_corpus()
    data = {"split": {"group_by": group_by, "heldout": "20%", "labelled_budgets": ["10s"]}}
    result = split.run(make_ctx(tmp_path, corpus, data))
    rows = rows_by_subset(result)
    assert rows["heldout"] and rows["labelled"]
    check_invariants(corpus, data, result, fresh=True)
    source_sides: dict[str, set[str]] = {}
    sources = {a["clip_id"]: a["source_id"] for a in corpus.audio}
    for s, rs in rows.items():
        for r in rs:
            source_sides.setdefault(sources[r["clip_id"]], set()).add(s == "heldout")
    if group_by == "recording":
        # All segments of a recording on one side; the group is the source.
        assert all(len(v) == 1 for v in source_sides.values())
        assert all(r["group"] == sources[r["clip_id"]] for rs in rows.values() for r in rs)
    else:
        assert all(r["group"] == r["clip_id"] for rs in rows.values() for r in rs)


def test_near_duplicates_bind_groups(tmp_path: Path) -> None:
    # Source: docs/split.md, Groups; similarity by pipeline.signal.fingerprint.fingerprint_similarity (bit agreement).
    corpus = Corpus()
    for spk in SPEAKERS[:4]:
        for k in range(4):
            corpus.add(spk, 4.0 + k)
    # heron's clip is alder's first clip re-encoded: a few flipped fingerprint bits.
    original = next(r for r in corpus.audio if r["speaker"] == "alder")
    fp = decode_fingerprint(original["fingerprint"]).copy()
    rng = np.random.default_rng(5)
    hit = rng.choice(fp.size, size=fp.size // 10, replace=False)
    fp[hit] ^= np.uint32(1) << rng.integers(0, 32, size=hit.size).astype(np.uint32)
    copy_id = corpus.add("heron", original["duration_s"], fingerprint=fp)
    # otter and plover hold byte-identical audio (same SHA-256), fingerprints unrelated.
    twin_a = next(r for r in corpus.audio if r["speaker"] == "otter")
    twin_b = corpus.add("plover", 3.0, sha=twin_a["audio_sha256"])
    result = split.run(make_ctx(tmp_path, corpus, {"split": {"heldout": "40%", "labelled_budgets": ["10s"]}}))
    rows = all_rows(result)
    groups = {r["speaker"]: r["group"] for r in rows.values()}
    # Merged groups take the smallest member id.
    assert groups["alder"] == groups["heron"] == "alder"
    assert groups["otter"] == groups["plover"] == "otter"
    assert rows[copy_id]["near_duplicate_of"] == original["clip_id"]
    assert rows[original["clip_id"]]["near_duplicate_of"] == copy_id
    assert rows[twin_b]["near_duplicate_of"] == twin_a["clip_id"]
    assert "near_duplicate" in rows[copy_id]["quality_flags"] and "near_duplicate" in rows[twin_b]["quality_flags"]
    pairs = {tuple(p["clips"]): p for p in result.summary["near_duplicate_pairs"]}
    assert pairs[tuple(sorted([copy_id, original["clip_id"]]))]["similarity"] >= 0.85
    assert pairs[tuple(sorted([twin_b, twin_a["clip_id"]]))]["identical"] is True
    assert result.summary["gates"]["near_duplicate"] == 4
    sides = {}
    for r in rows.values():
        sides.setdefault(r["group"], set()).add(r["subset"] == "heldout")
    assert all(len(v) == 1 for v in sides.values())


@pytest.mark.parametrize("cached", [False, True])
def test_the_search_in_a_forked_process_gives_what_it_gives_here(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                                 cached: bool) -> None:
    """The stage searches the clips added since the cached search in a forked process
    (pipeline.core.forked) while it reads the ledger; the same search in this process
    gives the same manifests and ledger, and so does a whole search (without the cache,
    or before it holds anything), which runs in this process."""
    import copy

    import pipeline.core.forked as forked

    corpus, _ = random_corpus([3, 4, 5, 2, 6], 11, dup_share=0.3)
    grown = copy.deepcopy(corpus)
    grown.add(SPEAKERS[0], 5.5, transcribed=False, fingerprint=decode_fingerprint(corpus.audio[0]["fingerprint"]))
    seen = []

    def run(root: Path, fork: bool) -> tuple[dict[str, Any], ...]:
        def begin(func: Any, *args: Any) -> Any:
            seen.append(fork)
            return forked.begin(func, *args, fork=fork)

        monkeypatch.setattr(split, "begin", begin)
        results = []
        for c in (corpus, grown):
            ctx = make_ctx(root, c, {"split": {"heldout": "30%"}})
            ctx.use_cache = cached
            result = split.run(ctx)
            results.append({"rows": all_rows(result), "pairs": result.summary["near_duplicate_pairs"],
                            "ledger": (root / "out" / "ledger.tsv").read_text()})
        return tuple(results)

    forked_run = run(tmp_path / "forked", True)
    assert forked_run == run(tmp_path / "here", False)
    # Only a search of added clips runs in a child: the grown corpus's, with the cache.
    assert seen == ([True, False] if cached else [])
    assert (tmp_path / "forked" / "out" / "cache" / "split").exists() == cached
    assert any(p["clips"][1] == grown.audio[-1]["clip_id"] or p["clips"][0] == grown.audio[-1]["clip_id"]
               for p in forked_run[1]["pairs"])


# ---------------------------------------------------------------------------------------
# Quality gates
# ---------------------------------------------------------------------------------------

def gated_corpus() -> tuple[Corpus, dict[str, str]]:
    corpus = Corpus()
    special = {}
    rng = np.random.default_rng(11)
    def rate() -> float:
        # A natural spread of speaking rate, 8 % around 12 phones/s (common practice, no source).
        return 12.0 * float(1 + 0.08 * rng.standard_normal())

    for spk in SPEAKERS[:5]:
        for _ in range(20):  # enough clips for a steady median and MAD
            corpus.add(spk, float(rng.uniform(2.0, 4.0)), rate=rate())
        special[f"{spk}:noisy"] = corpus.add(spk, 3.0, snr_db=1.0, rate=rate())
        special[f"{spk}:narrow"] = corpus.add(spk, 3.0, bandwidth_hz=3300.0, rate=rate())
        long_text = corpus.add(spk, 9.0, rate=rate())
        mismatched = corpus.add(spk, 2.0, transcribed=True, accepted=False)
        # The short clip gets the long clip's transcript: 4.5x its plausible phone count.
        donor = next(t for t in corpus.text if t["clip_id"] == long_text)
        corpus.text.append({**donor, "clip_id": mismatched})
        special[f"{spk}:mismatch"] = mismatched
    return corpus, special


@pytest.mark.parametrize("clipped_action", ["flag", "demote", "reject"])
def test_clipped_transcribed_clips_stay_labelled_unless_the_config_demotes_or_rejects(
        tmp_path: Path, clipped_action: str) -> None:
    # Source: issue 14 item 4 and quality.clipped_action in schemas/config.schema.json
    # ("flag" by default; the threshold is audio.max_clipped_fraction, 0.001).
    corpus = Corpus()
    clipped, at_threshold = set(), set()
    for spk in SPEAKERS[:4]:
        for k in range(6):
            fraction = {0: 0.004, 1: 0.02, 2: MAX_CLIPPED_FRACTION}.get(k, 0.0)
            cid = corpus.add(spk, 3.0 + k / 10, clipped_fraction=fraction)
            (clipped if k < 2 else at_threshold if k == 2 else set()).add(cid)
    data = {"split": {"heldout": "50%", "labelled_budgets": ["10h"]}, "quality": {"clipped_action": clipped_action}}
    result = split.run(make_ctx(tmp_path, corpus, data))
    rows = all_rows(result)
    rejected = {r["clip_id"]: r for r in result.rejects}
    if clipped_action == "reject":
        assert set(rejected) == clipped and not clipped & set(rows)
        for r in rejected.values():
            assert (r["reason"], r["stage"]) == ("clipped", "split")
            assert r["detail"].startswith(r["source_path"]) and "audio.max_clipped_fraction" in r["detail"]
    else:
        assert not rejected
        assert all(rows[c]["quality_flags"] == ["clipped"] and rows[c]["clipped_fraction"] > 0.001 for c in clipped)
        demoted = clipped_action == "demote"
        training = [c for c in clipped if rows[c]["subset"] != "heldout"]
        heldout = [c for c in clipped if rows[c]["subset"] == "heldout"]
        assert training and heldout  # clipped clips on both sides of the split
        # The 10h tier is short, so every eligible training clip is labelled.
        assert all(rows[c]["subset"] == ("unlabelled" if demoted else "labelled") for c in training)
        assert all((rows[c]["transcript"] is None) == demoted for c in training)
        scored = result.summary["subsets"]["heldout"]["scored_clips"]
        assert scored == sum(1 for r in rows.values() if r["subset"] == "heldout") - (len(heldout) if demoted else 0)
    # At the threshold is not above it: never flagged.
    assert all(rows[c]["quality_flags"] == [] and rows[c]["subset"] != "unlabelled" for c in at_threshold)
    gates = result.summary["gates"]
    assert (gates["clipped"], gates["rejected_clipped"]) == (8, 8 if clipped_action == "reject" else 0)


@pytest.mark.parametrize("narrowband_action", ["flag", "demote"])
def test_gates_flag_and_demote_as_configured(tmp_path: Path, narrowband_action: str) -> None:
    # Source: docs/split.md, Quality gates; |z| > 3.5 after Iglewicz and Hoaglin (1993).
    # Noisy and rate-outlier clips are demoted by default; narrowband ones only when asked.
    corpus, special = gated_corpus()
    data = {"split": {"heldout": "40%", "labelled_budgets": ["10h"]},
            "quality": {"narrowband_action": narrowband_action}}
    result = split.run(make_ctx(tmp_path, corpus, data))
    rows = all_rows(result)
    flagged = {cid: kind.split(":")[1] for kind, cid in special.items()}
    expected_flag = {"noisy": "noisy", "narrow": "narrowband", "mismatch": "rate_outlier"}
    demoted = {cid for cid, kind in flagged.items() if kind != "narrow" or narrowband_action == "demote"}
    for cid, kind in flagged.items():
        assert expected_flag[kind] in rows[cid]["quality_flags"], (cid, rows[cid]["quality_flags"], rows[cid]["rate_z"])
        assert rows[cid]["transcript"] is not None or rows[cid]["subset"] == "unlabelled"
        if cid in demoted:
            assert rows[cid]["subset"] != "labelled"
    # Correct transcripts are not rate outliers.
    assert not [c for c, r in rows.items() if "rate_outlier" in r["quality_flags"] and c not in flagged]
    assert all(abs(r["rate_z"]) <= 3.5 for c, r in rows.items() if r["rate_z"] is not None and c not in flagged)
    # The 10h tier is short, so every eligible training clip is labelled, and nothing else:
    # a flagged narrowband clip keeps its transcript and its place unless demotion is on.
    for r in rows.values():
        if r["subset"] != "heldout":
            assert (r["subset"] == "labelled") == (r["clip_id"] not in demoted)
    sides = {r["subset"] == "heldout" for c, r in rows.items() if c in flagged}
    assert sides == {True, False}  # flagged clips on both sides of the split
    heldout = [r for r in rows.values() if r["subset"] == "heldout"]
    scored = [r for r in heldout if r["clip_id"] not in demoted]
    assert result.summary["subsets"]["heldout"]["scored_clips"] == len(scored)
    assert result.summary["gates"] == {"noisy": 5, "narrowband": 5, "rate_outlier": 5, "clipped": 0,
                                       "near_duplicate": 0, "rejected_noisy": 0, "rejected_clipped": 0}


def test_every_gate_can_be_a_flag_only_and_noisy_clips_rejected(tmp_path: Path) -> None:
    # Source: the [quality] keys of schemas/config.schema.json and the reasons of schemas/rejected.schema.json.
    corpus, special = gated_corpus()
    data = {"split": {"heldout": "40%", "labelled_budgets": ["10h"]},
            "quality": {"noisy_action": "reject", "rate_outlier_action": "flag"}}
    result = split.run(make_ctx(tmp_path, corpus, data))
    rows = all_rows(result)
    noisy = {cid for kind, cid in special.items() if kind.endswith(":noisy")}
    assert {r["clip_id"] for r in result.rejects} == noisy
    assert all(r["reason"] == "noisy" and r["stage"] == "split" and "min_snr_db" in r["detail"]
               for r in result.rejects)
    assert not noisy & set(rows)
    for kind, flag in (("narrow", "narrowband"), ("mismatch", "rate_outlier")):
        marked = [rows[cid] for k, cid in special.items() if k.endswith(":" + kind)]
        assert all(flag in r["quality_flags"] for r in marked)
        assert any(r["subset"] == "labelled" for r in marked)
    result = split.run(make_ctx(tmp_path, corpus, {**data, "quality": {"noisy_action": "flag"}}, fresh=True))
    rows = all_rows(result)
    assert not result.rejects and any(rows[cid]["subset"] == "labelled" for cid in noisy)


def test_notes_and_rejected_transcripts(tmp_path: Path) -> None:
    # Source: the flag list of schemas/subset.schema.json and docs/split.md, Quality gates.
    corpus = Corpus()
    for spk in SPEAKERS[:3]:
        for _ in range(3):
            corpus.add(spk, 3.0)
    up = corpus.add("alder", 3.0, upsampled_from=8000, bandwidth_hz=None)
    limited = corpus.add("heron", 3.0, peak_limited_db=1.5)
    lost = corpus.add("otter", 3.0, transcribed=True, accepted=False)
    result = split.run(make_ctx(tmp_path, corpus, {"split": {"labelled_budgets": ["1h"], "keep_transcripts": True}}))
    rows = all_rows(result)
    assert "upsampled" in rows[up]["quality_flags"] and "peak_limited" in rows[limited]["quality_flags"]
    assert "transcript_rejected" in rows[lost]["quality_flags"]
    assert rows[lost]["subset"] != "labelled" and rows[lost]["transcript"] is None
    # keep_transcripts keeps them in unlabelled.
    assert all(r["transcript"] is not None for r in rows.values() if r["subset"] == "unlabelled"
               and r["clip_id"] != lost)


# ---------------------------------------------------------------------------------------
# Determinism
# ---------------------------------------------------------------------------------------

def parquet_bytes(table: Any) -> bytes:
    buf = io.BytesIO()
    pq.write_table(table, buf, compression="zstd")
    return buf.getvalue()


@pytest.mark.parametrize("selection", ["coverage", "random"])
def test_same_inputs_in_any_row_order_give_identical_bytes(tmp_path: Path, selection: str) -> None:
    # Source: the reproducibility promise of README.md (same inputs, config and seed: same bytes).
    corpus, _ = random_corpus([5, 6, 4, 7, 3], 99, dup_share=0.15)
    data = {"split": {"labelled_budgets": ["20s", "1m"], "heldout": "25%", "selection": selection},
            "quality": NO_RATE_GATE}
    outputs = []
    for k in range(3):
        order = None if k == 0 else np.random.default_rng(k)
        result = split.run(make_ctx(tmp_path / str(k), corpus, data, order=order))
        blobs = {rel: parquet_bytes(t) for rel, (_s, t) in result.manifests.items()}
        blobs["rejects"] = parquet_bytes(result.rejects_table())
        blobs["ledger"] = (tmp_path / str(k) / "out" / "ledger.tsv").read_bytes()
        outputs.append(blobs)
    assert outputs[0] == outputs[1] == outputs[2]
    check_invariants(corpus, data, result, fresh=True)


# ---------------------------------------------------------------------------------------
# Through the runner, and configuration edge cases
# ---------------------------------------------------------------------------------------

def test_runner_writes_the_three_manifests_and_rejects(tmp_path: Path) -> None:
    # Source: the stage contract of pipeline/core/stage.py and DEVELOPERS.md (the runner validates and writes).
    from pipeline.core.manifest import read_manifest, read_metadata, write_manifest
    from pipeline.core.runner import Runner
    from pipeline.stages import STAGES

    corpus, special = gated_corpus()
    out = tmp_path / "out"
    inputs = corpus.inputs()
    for name in ("audio", "text"):
        write_manifest(out / "stages" / f"{name}.parquet", name, inputs[name], metadata={"stage": name})
    cfg = build_config({"seed": 7, "split": {"labelled_budgets": ["30s"]}, "quality": {"noisy_action": "reject"}})
    (tmp_path / "raw").mkdir()
    Runner(tmp_path / "raw", out, cfg, stages=STAGES, workers=1).prepare(("split",))
    counts = {s: read_manifest(out / split.SUBSET_PATHS[s]).num_rows for s in split.SUBSETS}
    rejected = read_manifest(out / "manifests" / "rejected.parquet").to_pylist()
    assert sum(counts.values()) + len(rejected) == len(corpus.audio)
    assert {r["reason"] for r in rejected} == {"noisy"} and len(rejected) == 5
    assert read_metadata(out / split.STAGE.main_manifest)["stage"] == "split"
    assert (out / "ledger.tsv").exists() and (out / "stages" / "split.summary.json").exists()


def test_default_tiers_double_across_minutes_to_hours() -> None:
    # Source: README.md's opening paragraph (a few minutes to a few hours of transcribed
    # speech) and the reasoning in the split.labelled_budgets description of
    # schemas/config.schema.json: each tier twice the one before, evenly spaced on a log scale.
    budgets = [split.parse_duration_s(b) for b in build_config({}).split.labelled_budgets]
    assert budgets == sorted(budgets) and len(budgets) >= 3
    assert all(large == 2 * small for small, large in itertools.pairwise(budgets))
    assert 60 <= budgets[0] <= 30 * 60  # minutes
    assert 2 * 3600 <= budgets[-1] <= 6 * 3600  # a few hours


def test_zero_heldout_needs_no_second_group_and_budgets_are_unique(tmp_path: Path) -> None:
    # Source: docs/split.md, Groups (zero target) and Labelled tiers (one tier per budget).
    result = split.run(make_ctx(tmp_path, single_speaker_corpus(), {"split": {"heldout": "0%"}}))
    assert rows_by_subset(result)["heldout"] == [] and rows_by_subset(result)["labelled"]
    with pytest.raises(UsageError, match=r"split.labelled_budgets.*1h appears twice"):
        split.run(make_ctx(tmp_path, single_speaker_corpus(), {"split": {"heldout": "0%",
                                                                          "labelled_budgets": ["1h", "1h"]}}))


def test_merge_groups_matches_connected_components() -> None:
    # Source: scipy.sparse.csgraph.connected_components, the reference the union-find replaces.
    import random

    import numpy as np
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    from pipeline.stages.split import merge_groups

    assert merge_groups(["b", "c", "a", "d"], [(0, 1), (1, 2)]) == ["a", "a", "a", "d"]
    assert merge_groups(["x", "y"], []) == ["x", "y"]
    rng = random.Random(4)
    for _ in range(50):
        groups = [f"g{rng.randrange(40):02d}" for _ in range(120)]
        pairs = [(rng.randrange(120), rng.randrange(120)) for _ in range(rng.randrange(60))]
        ids = sorted(set(groups))
        index = {g: k for k, g in enumerate(ids)}
        rows = [index[groups[i]] for i, _ in pairs] or [0]
        cols = [index[groups[j]] for _, j in pairs] or [0]
        graph = coo_matrix((np.ones(len(rows)), (rows, cols)), shape=(len(ids), len(ids)))
        _, labels = connected_components(graph, directed=False)
        smallest: dict[int, str] = {}
        for k, label in enumerate(labels.tolist()):
            smallest.setdefault(label, ids[k])
        assert merge_groups(groups, pairs) == [smallest[int(labels[index[g]])] for g in groups]


@pytest.mark.parametrize("keep", [False, True])
def test_scorable_is_eligible_with_transcript_and_phones_in_the_row(tmp_path: Path, keep: bool) -> None:
    # Source: schemas/subset.schema.json, "scorable": transcript and phones in the row, and
    # no gate guarding scoring holds the clip back (eligible, recomputed here from the inputs).
    corpus = Corpus()
    for k, spk in enumerate(SPEAKERS[:5] * 4):
        corpus.add(spk, 4.0 + k % 3, transcribed=k % 4 != 0, snr_db=2.0 if k % 5 == 0 else 25.0)
    data = {"quality": {"rate_max_abs_z": 1000.0}, "split": {"labelled_budgets": ["10s"], "heldout": "20%",
                                                               "keep_transcripts": keep}}
    rows = all_rows(split.run(make_ctx(tmp_path, corpus, data)))
    eligible = eligible_ids(corpus)
    want = {c for c in eligible if keep or rows[c]["subset"] != "unlabelled"}
    assert {c for c, r in rows.items() if r["scorable"]} == want
    assert any(r["scorable"] for r in rows.values() if r["subset"] == "heldout")
    assert any(not r["scorable"] for r in rows.values() if r["subset"] == "heldout")
