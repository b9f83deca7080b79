"""Aligning a long recording to its transcript, sentence by sentence.

The transcript is cut into sentences (:mod:`pipeline.text.sentences`), each spoken by
espeak-ng in the language's default voice (:mod:`pipeline.text.speech`), with a fixed
gap of silence before, between and after them. MFCCs of that synthetic reading and of
the recording (:mod:`pipeline.signal.features`, each mean and variance normalised) are
aligned by coarse-to-fine dynamic time warping (:mod:`pipeline.signal.dtw`), which may
park stretches of the recording that the transcript lacks on a gap and skip sentences
the recording lacks. Each sentence's span in the recording follows from the path; each
boundary between two sentences is moved to the centre of the nearest pause the
voice-activity step found (:mod:`pipeline.signal.sentence_align`).
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from pipeline.signal.decode import Spool
from pipeline.signal.dtw import warp
from pipeline.signal.features import FeatureFrames, mfcc, normalise
from pipeline.signal.sentence_align import SentenceSpan, nearest_pause, sentence_spans
from pipeline.signal.vad import majority3, runs
from pipeline.text.speech import synthesis_rate, synthesise

HOP_MS = 20
GAP_S = 0.2
# Level of the white noise added to the synthetic speech, whose silence is digital
# zero: a quiet floor (-60 dBFS) gives its pauses a spectrum, as a room gives a real one.
DITHER_DBFS = -60.0
# Local costs are root-mean-square differences of normalised coefficients: 0 for equal
# frames and about 1.41 (the square root of 2) for unrelated ones, whose coefficients
# are independent with unit variance. Measured on espeak-ng readings against espeak-ng
# in another voice and speed, matching frames cost 0.6 to 0.9 on average; a gap's cap
# and the skip price sit between (tuned on those readings, not a published figure).
GARBAGE_COST = 1.05
SKIP_COST = 2.0
# Confidence (see ``confidence``): a sentence whose frames match at 0.7 on average is
# placed for sure, at 0.9 not at all. Measured on espeak-ng readings (another voice and
# speed than the aligner's), right sentences cost 0.5 to 0.65 and sentences of another
# recording 0.7 to 0.95; a judgement tuned on synthetic speech, not a published figure.
SURE_COST, DOUBT_COST = 0.7, 0.9
RATIO_SPREAD = 1.35
BLOCK_S = 60.0
# Longest stretch between two sentences taken as the pause between them (a judgement:
# readers rarely pause longer between sentences; a longer stretch is left untranscribed).
MAX_PAUSE_S = 2.0


@dataclass(frozen=True)
class SyntheticReading:
    """Normalised features of the synthetic reading, with the gap and sentence column runs."""

    features: np.ndarray
    gap_runs: np.ndarray  # (sentences + 1, 2): first and last column of each gap
    sentence_runs: np.ndarray  # (sentences, 2): first and stop column of each sentence


@functools.cache
def _gap_features(sample_rate: int, hop_ms: int) -> np.ndarray:
    return mfcc(_dither(int(GAP_S * sample_rate) + sample_rate * 25 // 1000, seed=0), sample_rate=sample_rate,
                hop_ms=hop_ms)


def _dither(count: int, *, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return (10 ** (DITHER_DBFS / 20) * rng.standard_normal(count)).astype(np.float32)


def synthetic_reading(sentences: list[str], *, voice: str, sample_rate: int, hop_ms: int = HOP_MS) -> SyntheticReading:
    """Features of ``sentences`` spoken by espeak-ng with gaps between (see the module's docstring)."""
    import soxr

    gap = _gap_features(sample_rate, hop_ms)
    pieces: list[np.ndarray] = [gap]
    gap_runs, sentence_runs = [(0, len(gap) - 1)], []
    at = len(gap)
    for k, text in enumerate(sentences):
        spoken = synthesise(text, voice=voice)
        loud = np.flatnonzero(np.abs(spoken) > 1e-4)
        spoken = spoken[loud[0]:loud[-1] + 1] if loud.size else spoken[:0]
        spoken = soxr.resample(spoken, synthesis_rate(), sample_rate).astype(np.float32)
        features = mfcc(spoken + _dither(len(spoken), seed=k + 1), sample_rate=sample_rate, hop_ms=hop_ms)
        pieces += [features, gap]
        sentence_runs.append((at, at + len(features)))
        at += len(features)
        gap_runs.append((at, at + len(gap) - 1))
        at += len(gap)
    return SyntheticReading(normalise(np.concatenate(pieces)), np.array(gap_runs, dtype=np.int64),
                            np.array(sentence_runs, dtype=np.int64).reshape(-1, 2))


def recording_features(spool: Spool, *, start: int, stop: int, sample_rate: int, hop_ms: int = HOP_MS) -> np.ndarray:
    """Normalised MFCCs of spool samples ``[start, stop)``, computed a minute at a time."""
    frames = FeatureFrames(sample_rate=sample_rate, hop_ms=hop_ms)
    total = frames.count(stop - start)
    per_block = max(1, int(BLOCK_S * sample_rate) // frames.hop)
    blocks = []
    for first in range(0, total, per_block):
        count = min(per_block, total - first)
        a = start + first * frames.hop
        samples = spool.read(start=a, stop=a + (count - 1) * frames.hop + frames.window)
        blocks.append(mfcc(samples, sample_rate=sample_rate, hop_ms=hop_ms))
    return normalise(np.concatenate(blocks)) if blocks else np.zeros((0, 13), dtype=np.float32)


@dataclass(frozen=True)
class SentencePlace:
    """One sentence's place in the recording, in seconds from ``start`` of the aligned span.

    ``start_s``/``end_s`` are its edges as snapped; ``snapped`` says whether each edge fell
    in a pause within the tolerance; ``cost`` and ``ratio`` are the path's measures and
    ``confidence`` is derived from them (see :func:`confidence`).
    """

    start_s: float
    end_s: float
    cost: float
    ratio: float
    snapped: tuple[bool, bool]
    confidence: float


def confidence(span: SentenceSpan, snapped: tuple[bool, bool], *, typical_ratio: float) -> float:
    """A sentence's confidence in [0, 1].

    1 at a mean cost of ``SURE_COST`` or less, falling linearly to 0 at ``DOUBT_COST``;
    halved for each edge that found no pause; 0 when the sentence was skipped or its
    length ratio (recording over synthetic) strays more than ``RATIO_SPREAD`` times from
    the recording's median ratio, since one reader keeps a fairly even pace.
    """
    if not span.found or not typical_ratio / RATIO_SPREAD <= span.ratio <= typical_ratio * RATIO_SPREAD:
        return 0.0
    score = min(1.0, max(0.0, (DOUBT_COST - span.cost) / (DOUBT_COST - SURE_COST)))
    return score * (0.5 ** (2 - sum(snapped)))


def pause_runs(decisions: np.ndarray, *, frame_ms: int) -> np.ndarray:
    """Pauses (start, end) in seconds: runs of non-speech in the raw voice-activity decisions
    after a three-frame majority vote (the stage's smoothing would bridge short pauses)."""
    speech = majority3(np.asarray(decisions, dtype=bool))
    return runs(~speech).astype(np.float64) * (frame_ms / 1000)


def place_sentences(spans: list[SentenceSpan], pauses: np.ndarray, *, sample_rate: int, hop_ms: int,
                    tolerance_s: float) -> list[SentencePlace]:
    """Each sentence's edges in seconds, snapped to pauses; a boundary between two found
    sentences is the centre of the frames between them before snapping."""
    frames = FeatureFrames(sample_rate=sample_rate, hop_ms=hop_ms)
    hop_s, half_s = frames.hop / sample_rate, frames.window / sample_rate / 2

    def at(frame: float) -> float:  # a frame's centre, in seconds
        return frame * hop_s + half_s

    edges: list[list[float]] = [[at(s.start) - hop_s / 2, at(s.stop - 1) + hop_s / 2] for s in spans]
    found = [k for k, s in enumerate(spans) if s.found]
    for left, right in zip(found, found[1:], strict=False):
        # Frames between two sentences are their pause, unless there are too many for
        # one: then they hold speech the transcript lacks, and each sentence keeps its edge.
        if (spans[right].start - spans[left].stop) * hop_s <= MAX_PAUSE_S:
            middle = at((spans[left].stop + spans[right].start - 1) / 2)
            edges[left][1] = edges[right][0] = middle
    ratios = [s.ratio for s in spans if s.found]
    typical = float(np.median(ratios)) if ratios else 1.0
    places = []
    for k, span in enumerate(spans):
        snapped = []
        for side in (0, 1):
            hit = nearest_pause(edges[k][side], pauses, tolerance=tolerance_s)
            snapped.append(hit is not None)
            if hit is not None:
                edges[k][side] = float(pauses[hit].mean())
        pair = (snapped[0], snapped[1])
        places.append(SentencePlace(edges[k][0], edges[k][1], span.cost, span.ratio, pair,
                                    confidence(span, pair, typical_ratio=typical)))
    return places


def align(spool: Spool, sentences: list[str], *, voice: str, start: int, stop: int, sample_rate: int,
          decisions: np.ndarray, frame_ms: int, tolerance_s: float) -> list[SentencePlace]:
    """Place each sentence in spool samples ``[start, stop)`` (``decisions``: the raw VAD frames
    of that span); times are from ``start``."""
    synthetic = synthetic_reading(sentences, voice=voice, sample_rate=sample_rate)
    real = recording_features(spool, start=start, stop=stop, sample_rate=sample_rate)
    if not len(real):
        return [SentencePlace(0.0, 0.0, math.inf, 0.0, (False, False), 0.0) for _ in sentences]
    path = warp(real, synthetic.features, gap_runs=synthetic.gap_runs, garbage_cost=GARBAGE_COST,
                skip_cost=SKIP_COST)
    spans = sentence_spans(path.columns, path.costs, synthetic.sentence_runs)
    return place_sentences(spans, pause_runs(decisions, frame_ms=frame_ms), sample_rate=sample_rate,
                           hop_ms=HOP_MS, tolerance_s=tolerance_s)


@dataclass(frozen=True)
class AlignedPlan:
    """The clips of a long transcribed source: ``plan`` as the audio stage's
    ``((first frame, stop frame), clip_id)`` pairs, ``texts`` the transcript and confidence
    of each transcribed clip, ``notes`` the reject rows about its transcript."""

    plan: list[tuple[tuple[int, int], str]]
    texts: dict[str, tuple[str, float]]
    notes: list[dict[str, Any]]


def _groups(places: list[SentencePlace], *, min_confidence: float, segment_max_s: float,
            max_clip_s: float) -> list[tuple[int, int]]:
    """Runs [first, stop) of confident sentences, merged while they share a boundary and
    stay within ``segment_max_s`` (a single sentence may reach ``max_clip_s``)."""
    groups: list[list[int]] = []
    for k, place in enumerate(places):
        if place.confidence < min_confidence or place.end_s - place.start_s > max_clip_s:
            continue
        last = groups[-1] if groups else None
        if (last is not None and last[1] == k and places[k - 1].end_s == place.start_s
                and place.end_s - places[last[0]].start_s <= segment_max_s):
            last[1] = k + 1
        else:
            groups.append([k, k + 1])
    return [(a, b) for a, b in groups]


def _untranscribed(cut: Any, gaps: list[tuple[int, int]]) -> list[tuple[int, int]]:
    """Untranscribed spans: each stretch between transcribed clips cut at its pauses."""
    return [span for a, b in gaps if b > a for span in cut(a, b)]


def plan_transcribed(*, sentences: list[str], places: list[SentencePlace], region: tuple[int, int],
                     speech: np.ndarray, cut: Any, frame_ms: int, pad_ms: int, source_id: str,
                     min_confidence: float, segment_max_s: float, max_clip_s: float) -> tuple[list[tuple[int, int, str | None, float]], int]:
    """Transcribed spans from confident sentence groups, untranscribed spans around them.

    ``places`` are in seconds from the start of ``region`` (VAD frames); ``cut(a, b)``
    cuts an untranscribed stretch of frames into spans. Returns ``(first, stop, text,
    confidence)`` per clip in order (text None for untranscribed clips) and how many
    sentences became transcribed.
    """
    from pipeline.signal.vad import ms_to_frames, trim_frames

    pad = ms_to_frames(pad_ms, frame_ms=frame_ms)
    clips: list[tuple[int, int, str | None, float]] = []
    used = 0
    for a, b in _groups(places, min_confidence=min_confidence, segment_max_s=segment_max_s, max_clip_s=max_clip_s):
        first = region[0] + int(round(places[a].start_s * 1000 / frame_ms))
        stop = region[0] + int(round(places[b - 1].end_s * 1000 / frame_ms))
        trimmed = trim_frames(speech, pad_frames=pad, start=max(region[0], first), stop=min(region[1], stop))
        if trimmed is None or (clips and trimmed[0] < clips[-1][1]):
            continue
        clips.append((trimmed[0], trimmed[1], " ".join(sentences[a:b]), min(p.confidence for p in places[a:b])))
        used += b - a
    edges = [region[0]] + [e for c in clips for e in (c[0], c[1])] + [region[1]]
    rest = _untranscribed(cut, list(zip(edges[0::2], edges[1::2], strict=True)))
    merged = sorted(clips + [(a, b, None, 0.0) for a, b in rest])
    return merged, used


# Below this share of confidently placed sentences the transcript is taken to belong to
# another recording (a wrong pairing places almost none; a right one with a damaged
# passage places most). A judgement, not a published figure.
MIN_PLACED_SHARE = 0.5


def align_long_transcribed(job: Any, scan: Any, spool: Spool, speech: np.ndarray,
                           region: tuple[int, int]) -> AlignedPlan:
    """The audio stage's plan for a transcribed source longer than ``audio.max_clip_s``
    whose language has a voice (``job.voice``): align, cut, and note what was left out."""
    from pipeline.core.stage import reject
    from pipeline.signal.segment import segment_id, split_frames
    from pipeline.text.sentences import split_sentences

    cfg, row = job.config, job.row
    rel, source_id, frame_ms, rate = row["source_path"], row["source_id"], cfg.vad_frame_ms, cfg.sample_rate
    sentences = split_sentences(row["transcript"])
    start, stop = (min(scan.out_samples, (f * frame_ms * rate + 500) // 1000) for f in region)
    places = align(spool, sentences, voice=job.voice, start=start, stop=stop, sample_rate=rate,
                   decisions=scan.decisions[region[0]:region[1]], frame_ms=frame_ms,
                   tolerance_s=cfg.align_snap_ms / 1000)

    def cut(a: int, b: int) -> list[tuple[int, int]]:
        return split_frames(speech, scan.energy_db, frame_ms=frame_ms, segment_min_s=cfg.segment_min_s,
                            segment_max_s=cfg.segment_max_s, pad_ms=cfg.pad_ms, start=a, stop=b)

    placed = sum(p.confidence >= cfg.align_min_confidence for p in places)
    if placed < MIN_PLACED_SHARE * len(sentences):
        note = reject("audio", rel, "transcript_mismatch",
                      f"{rel}: only {placed} of {len(sentences)} transcript sentences could be placed in the "
                      f"recording with confidence >= {cfg.align_min_confidence} (audio.align_min_confidence); "
                      f"expected at least {MIN_PLACED_SHARE:.0%}, so the transcript probably belongs to another "
                      "recording; its audio is kept as untranscribed clips")
        spans = cut(*region)
        return AlignedPlan([(s, segment_id(source_id, start_ms=s[0] * frame_ms)) for s in spans], {}, [note])
    clips, used = plan_transcribed(sentences=sentences, places=places, region=region, speech=speech, cut=cut,
                                   frame_ms=frame_ms, pad_ms=cfg.pad_ms, source_id=source_id,
                                   min_confidence=cfg.align_min_confidence, segment_max_s=cfg.segment_max_s,
                                   max_clip_s=cfg.max_clip_s)
    plan, texts = [], {}
    for a, b, text, conf in clips:
        clip_id = segment_id(source_id, start_ms=a * frame_ms)
        plan.append(((a, b), clip_id))
        if text is not None:
            texts[clip_id] = (text, round(conf, 3))
    notes = []
    if used < len(sentences):
        left = [k + 1 for k, p in enumerate(places) if p.confidence < cfg.align_min_confidence]
        shown = ", ".join(map(str, left[:12])) + (", ..." if len(left) > 12 else "")
        notes.append(reject("audio", rel, "sentences_unaligned",
                            f"{rel}: {len(sentences) - used} of {len(sentences)} transcript sentences are not in a "
                            f"transcribed clip (sentence {shown} below audio.align_min_confidence "
                            f"{cfg.align_min_confidence}, or too long for a clip); expected every sentence placed; "
                            "the audio around them is kept as untranscribed clips"))
    return AlignedPlan(plan, texts, notes)


def alignment_voices(ctx: Any, rows: list[dict[str, Any]]) -> dict[str, tuple[str | None, str]]:
    """For each transcribed source: the espeak-ng voice that would align its transcript, or
    None and a sentence saying why (``audio.align = "off"``, or no voice for its language)."""
    from pipeline.stages.tags import canonical_tag, file_languages
    from pipeline.text.speech import speech_voice

    transcribed = [r for r in rows if r["transcript"] is not None]
    if ctx.config.audio.align == "off":
        return {r["source_id"]: (None, 'audio.align is "off"') for r in transcribed}
    # One answer per language tag, not per source: a corpus has a few tags and
    # 100,000 sources.
    tags = file_languages(ctx, transcribed)
    by_tag: dict[str, tuple[str | None, str]] = {}
    for tag in set(tags.values()):
        voice = speech_voice(canonical_tag(tag))
        by_tag[tag] = (voice, "" if voice else f"espeak-ng, the speech engine the alignment uses, has no "
                                               f"voice for its language {tag!r}")
    return {source_id: by_tag[tag] for source_id, tag in tags.items()}


def alignment_summary(rows: list[dict[str, Any]], sources: list[dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """Per long transcribed source cut by alignment (source path -> figures): its clips, its
    transcribed clips, the share of its duration in transcribed clips and the share of its
    transcript's characters (sentences joined by one space) placed in them.

    Examples
    --------
    >>> rows = [{"source_id": "a", "clip_id": "a_00000000", "duration_s": 6.0, "aligned_transcript": "One."},
    ...         {"source_id": "a", "clip_id": "a_00006000", "duration_s": 4.0, "aligned_transcript": None}]
    >>> alignment_summary(rows, [{"source_id": "a", "source_path": "s/a.wav", "transcript": "One. Two.",
    ...                           "duration_s": 12.0}])
    {'s/a.wav': {'clips': 2, 'transcribed_clips': 1, 'audio_share_transcribed': 0.5, 'transcript_share_placed': 0.4444}}
    """
    from pipeline.text.sentences import split_sentences

    by_source: dict[str, list[dict[str, Any]]] = {}
    for r in rows:
        if r["clip_id"] != r["source_id"]:
            by_source.setdefault(r["source_id"], []).append(r)
    out: dict[str, dict[str, Any]] = {}
    for source in sources:
        clips = by_source.get(source["source_id"])
        if source["transcript"] is None or not clips:
            continue
        placed = [c for c in clips if c["aligned_transcript"] is not None]
        whole = " ".join(split_sentences(source["transcript"]))
        seconds = sum(c["duration_s"] for c in placed)
        out[source["source_path"]] = {
            "clips": len(clips), "transcribed_clips": len(placed),
            "audio_share_transcribed": round(seconds / source["duration_s"], 4) if source["duration_s"] else 0.0,
            "transcript_share_placed": round(len(" ".join(c["aligned_transcript"] for c in placed)) / len(whole), 4)
            if whole else 0.0,
        }
    return dict(sorted(out.items()))
