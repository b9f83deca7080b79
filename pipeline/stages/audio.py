"""Audio stage: decode, downmix, resample, trim to speech, cut long recordings,
normalise loudness, gate on quality, and write 16-bit clips.

Each accepted ingest row goes through ``condition_file`` (one process per file):

1. one streaming pass over the source (``pipeline.signal.decode``): soundfile blocks are
   checked for NaN/inf, counted for clipping and DC, fed to a long-term PSD for the
   bandwidth, downmixed and resampled to the output rate into a spool (in memory,
   on disk past 32 MiB), and resampled to 16 kHz for webrtcvad (``pipeline.signal.vad``);
2. the frame decisions are smoothed and trimmed; a trimmed span longer than
   ``audio.max_clip_s`` is cut at pauses (``pipeline.signal.segment``) or, when the file has
   a transcript, rejected;
3. each clip is read back from the spool, measured (BS.1770-4 loudness, peak, WADA
   SNR), gained to the target under the peak ceiling, rounded to 16 bits, measured
   again and written atomically.

Memory therefore depends on the longest clip (and the spool's 32 MiB), not on the
length of the recording. Raw files are only ever opened for reading.
"""

from __future__ import annotations

import contextlib
import functools
import io
import math
import os
import posixpath
import threading
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from pipeline.core import names
from pipeline.core.codeversion import code_version
from pipeline.core.config import AudioConfig
from pipeline.core.errors import ParameterError
from pipeline.core.fsio import (
    remove_stale_temporaries,
    sha256_bytes,
    sync_file_system,
    write_bytes_atomic,
)
from pipeline.core.manifest import ManifestBuilder
from pipeline.core.names import stage_manifest
from pipeline.core.parallel import each_result
from pipeline.core.stage import Output, Stage, StageContext, StageResult, reject
from pipeline.signal.decode import (
    PCM16_SCALE,
    Spool,
    StreamResampler,
    check_channel,
    downmix,
    float_to_pcm16,
    read_blocks,
)
from pipeline.signal.segment import segment_id, split_frames
from pipeline.signal.vad import (
    ANALYSIS_SAMPLE_RATE,
    VoiceActivityStream,
    ms_to_frames,
    smooth_decisions,
    speech_seconds,
    trim_frames,
)
from pipeline.stages.audio_cache import OutcomeCache, file_listing, source_keys

if TYPE_CHECKING:
    import soundfile

NAME = "audio"

OUTPUT_FORMATS = {"flac": "FLAC", "wav": "WAV"}
AUDIO_DIR = "audio"
TMP_DIR = "tmp"


@dataclass(frozen=True)
class AudioJob:
    """Everything one worker needs for one source file (small and picklable)."""

    row: dict[str, Any]  # the ingest row
    source: str  # absolute path of the raw file (read only)
    out: str  # absolute OUT folder; clips go to OUT/audio/<speaker>/
    tmp: str  # folder for the spool file
    config: AudioConfig
    # For a transcribed source: the espeak-ng voice that aligns a long transcript
    # (pipeline.stages.alignment), or None and why not.
    voice: str | None = None
    no_voice: str = ""
    # Whether each clip is flushed to disk before its rename. ``run`` writes them without
    # and flushes OUT's file system instead: once before the manifest names them on a
    # local run, and on a cluster once per batch on each worker, after the batch's clips
    # and before its results travel (a worker may write through another host's cache,
    # which the driver cannot flush).
    durable: bool = True


@dataclass
class FileOutcome:
    """What one source turned into: manifest rows, reject rows, and the files written.

    ``written`` maps each row's ``audio_path`` to ``[size, mtime_ns, inode, mode]`` of
    the file, so a cache hit can confirm the file is still the one this result wrote
    (and the snapshot knows the file without a ``stat``).
    """

    rows: list[dict[str, Any]] = field(default_factory=list)
    rejects: list[dict[str, Any]] = field(default_factory=list)
    written: dict[str, list[int]] = field(default_factory=dict)


class LongTermPsd:
    """Welch PSD of a stream, block by block (``bandwidth.WelchStream``, equal bit for
    bit to ``bandwidth.long_term_psd`` of the whole signal), and the bandwidth it shows."""

    def __init__(self, *, sample_rate: int) -> None:
        from pipeline.signal.bandwidth import WelchStream

        self.sample_rate = sample_rate
        self._stream = WelchStream(sample_rate=sample_rate)

    def push(self, samples: np.ndarray) -> None:
        self._stream.push(samples)

    def bandwidth_hz(self) -> float | None:
        from pipeline.signal.bandwidth import bandwidth_from_psd

        freqs, psd = self._stream.result()
        if freqs.size == 0:
            return None
        value = bandwidth_from_psd(freqs, psd)
        return value if math.isfinite(value) else None


# The largest sample magnitude taken as audio. Float formats put full scale at 1.0
# (PCM formats cannot exceed it). A float recording can go above it by the headroom of
# whatever mixed or amplified it, but sustained overshoot counts as clipping anyway
# (flagged past audio.max_clipped_fraction, rejected past audio.unusable_clipped_fraction);
# an isolated sample 24 dB over full scale (x16) is beyond any gain staging (a
# judgement, not a standard) and is damaged bytes: read as float32 they decode as
# magnitudes anywhere up to 3.4e38, whose squares overflow the loudness and SNR sums.
# Such a file is rejected here, before any arithmetic. The bound also keeps one stray
# sample from lifting a 400 ms BS.1770 block above the manifest's 10 LUFS maximum
# (16**2 spread over 3,200 samples at 8 kHz is -11 dB).
MAX_SAMPLE_MAGNITUDE = 16.0


@dataclass
class SourceScan:
    """Results of the streaming pass over one source."""

    sample_rate: int
    frames: int = 0
    clipped: int = 0
    counted: int = 0
    dc_sum: float = 0.0
    # The first frame holding a sample that is NaN, infinite or beyond
    # MAX_SAMPLE_MAGNITUDE, and that sample's value.
    bad_sample_at: int | None = None
    bad_sample: float = 0.0
    out_samples: int = 0
    decisions: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))
    energy_db: np.ndarray = field(default_factory=lambda: np.zeros(0))
    bandwidth_hz: float | None = None

    @property
    def clipped_fraction(self) -> float:
        """The share of the samples counted that reach the clip level."""
        return self.clipped / self.counted if self.counted else 0.0


def scan_source(path: str | soundfile.SoundFile, *, cfg: AudioConfig, spool: Spool, sample_rate: int) -> SourceScan:
    """Decode ``path`` once, block by block, filling ``spool`` with the output-rate mono.

    Parameters
    ----------
    path : the source file (opened for reading only), or a ``soundfile.SoundFile`` of it
        open at its start (read to its end, left open).
    cfg : the audio section (channel, rates, VAD settings, clip level).
    spool : receives the downmixed stream resampled to ``cfg.sample_rate``.
    sample_rate : the source's rate in Hz.

    Returns
    -------
    SourceScan with the clipping and DC sums, the VAD frames at 16 kHz and the
    source bandwidth. Decoding stops at the first block holding a NaN, infinite or
    out-of-range sample (beyond ``MAX_SAMPLE_MAGNITUDE``); ``bad_sample_at`` is then
    the frame index of the first one and ``bad_sample`` its value. ``frames`` counts
    the frames decoded, which a damaged file can hold fewer of than its header says.

    Examples
    --------
    >>> import tempfile, soundfile
    >>> from pipeline.core.config import load_config
    >>> folder = tempfile.mkdtemp()
    >>> tone = 0.5 * np.sin(2 * np.pi * 440 * np.arange(22050) / 22050)
    >>> soundfile.write(f"{folder}/take.flac", tone, 22050)
    >>> with Spool(folder=folder) as spool:
    ...     scan = scan_source(f"{folder}/take.flac", cfg=load_config(None).audio, spool=spool, sample_rate=22050)
    >>> scan.frames, scan.clipped_fraction, scan.bad_sample_at
    (22050, 0.0, None)
    >>> import shutil; shutil.rmtree(folder)
    """
    scan = SourceScan(sample_rate=sample_rate)
    out_rs = StreamResampler(in_rate=sample_rate, out_rate=cfg.sample_rate, quality=cfg.resample_quality)
    vad_rs = (None if cfg.sample_rate == ANALYSIS_SAMPLE_RATE else
              StreamResampler(in_rate=sample_rate, out_rate=ANALYSIS_SAMPLE_RATE, quality=cfg.resample_quality))
    vad = VoiceActivityStream(sample_rate=ANALYSIS_SAMPLE_RATE, frame_ms=cfg.vad_frame_ms,
                              aggressiveness=cfg.vad_aggressiveness)
    # Bandwidth is measured on the stream at the output rate: what matters is what the
    # corpus will hold (telephone audio upsampled into it shows as ~4 kHz), and it is
    # cheaper than at a 44.1 or 48 kHz source rate.
    psd = LongTermPsd(sample_rate=cfg.sample_rate) if cfg.quality_measures else None

    def feed(mono: np.ndarray, *, last: bool) -> None:
        resampled = out_rs.process(mono, last=last)
        spool.append(resampled)
        if psd is not None:
            psd.push(resampled)
        scan.out_samples += len(resampled)
        vad.push(resampled if vad_rs is None else vad_rs.process(mono, last=last))

    with contextlib.closing(read_blocks(path)) as blocks:  # closes the file on an early return
        for block in blocks:
            mono = _count_block(scan, block, cfg=cfg)
            if mono is None:
                return scan
            feed(mono, last=False)
    feed(np.zeros(0, dtype=np.float32), last=True)
    analysis = vad.result()
    scan.decisions, scan.energy_db = analysis.decisions, analysis.energy_db
    scan.bandwidth_hz = psd.bandwidth_hz() if psd is not None else None
    return scan


def _count_block(scan: SourceScan, block: np.ndarray, *, cfg: AudioConfig) -> np.ndarray | None:
    """Count one decoded block into ``scan`` (clipping, DC, frames); its downmix, or
    None when it holds a NaN, infinite or out-of-range sample (then recorded in ``scan``)."""
    # The block's extremes first: NaN makes them NaN and fails both tests, so one pass
    # each decides, for nearly every block, that all is in range and nothing clips.
    top, bottom = float(block.max(initial=-np.inf)), float(block.min(initial=np.inf))
    if not (top <= MAX_SAMPLE_MAGNITUDE and bottom >= -MAX_SAMPLE_MAGNITUDE):
        magnitude = np.abs(block)
        # False for NaN as well as for values out of range: one test for both.
        within = magnitude <= MAX_SAMPLE_MAGNITUDE
        frame = int(np.flatnonzero(~within.all(axis=1))[0])
        scan.bad_sample_at = scan.frames + frame
        scan.bad_sample = float(block[frame][~within[frame]][0])
        return None
    used = block if cfg.channel == "average" else block[:, int(cfg.channel)]
    if max(top, -bottom) >= cfg.clip_level:
        scan.clipped += int(np.count_nonzero(np.abs(used) >= cfg.clip_level))
    scan.counted += used.size
    mono = downmix(block, channel=cfg.channel)
    scan.dc_sum += float(mono.sum(dtype=np.float64))
    scan.frames += len(mono)
    return mono


def _frame_to_sample(frame: int, *, frame_ms: int, sample_rate: int) -> int:
    return (frame * frame_ms * sample_rate + 500) // 1000


def _pcm16_peak_dbfs(pcm: np.ndarray) -> float:
    """Sample peak of int16 samples in dBFS, as libsndfile reads them (x / 32768)."""
    if pcm.size == 0:
        return -math.inf
    peak = max(int(pcm.max()), -int(pcm.min()))
    return 20.0 * math.log10(peak / PCM16_SCALE) if peak else -math.inf


def _finite_or_none(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None


def _plural(n: int, word: str) -> str:
    return f"{n} {word}{'' if n == 1 else 's'}"


def condition_file(job: AudioJob) -> FileOutcome:
    """Turn one ingest row into clips and/or rejects; never raises for a bad file.

    This is the per-file function the stage maps over its sources (it runs in a
    worker process). Any exception (an unreadable or corrupt file, a decoder error)
    becomes an ``undecodable`` reject carrying the error text.

    Parameters
    ----------
    job : the ingest row, the absolute source path, OUT, the spool folder, the config.

    Returns
    -------
    FileOutcome: audio manifest rows (schemas/audio.schema.json), reject rows
    (schemas/rejected.schema.json) and the stat of each file written.

    Examples
    --------
    A file that is not audio becomes one reject:

    >>> import tempfile
    >>> from pipeline.core.config import load_config
    >>> folder = tempfile.mkdtemp()
    >>> _ = open(f"{folder}/take.wav", "wb").write(b"not audio")
    >>> row = {"source_path": "ana/take.wav", "source_id": "take-0a1b2c3d4e"}
    >>> outcome = condition_file(AudioJob(row, f"{folder}/take.wav", folder, folder, load_config(None).audio))
    >>> outcome.rows, [r["reason"] for r in outcome.rejects]
    ([], ['undecodable'])
    >>> import shutil; shutil.rmtree(folder)
    """
    rel = job.row["source_path"]
    try:
        return _condition(job)
    except Exception as exc:  # one bad file must never stop the run
        return FileOutcome(rejects=[reject(NAME, rel, "undecodable",
                                           f"{rel}: could not be decoded: {type(exc).__name__}: {exc}")])


def _condition(job: AudioJob) -> FileOutcome:
    import soundfile as sf

    cfg, row = job.config, job.row
    rel, source_id = row["source_path"], row["source_id"]
    # One open for the header and the samples (sf.info would open the file a second time).
    with sf.SoundFile(job.source) as fh:
        rate, channels, frames, container = int(fh.samplerate), int(fh.channels), int(fh.frames), fh.format
        try:
            check_channel(channel=cfg.channel, channels=channels)
        except ParameterError:
            return FileOutcome(rejects=[reject(NAME, rel, "undecodable",
                                               f"{rel}: audio.channel is {cfg.channel} but the file has "
                                               f"{_plural(channels, 'channel')}; expected \"average\" or an "
                                               f"index below {channels}")])
        if rate < cfg.sample_rate and cfg.upsampled == "reject":
            return FileOutcome(rejects=[reject(NAME, rel, "upsampled",
                                               f"{rel}: sample rate {rate} Hz is below audio.sample_rate "
                                               f"({cfg.sample_rate} Hz) and audio.upsampled is \"reject\"")])
        with Spool(folder=job.tmp, label=source_id) as spool:
            scan = scan_source(fh, cfg=cfg, spool=spool, sample_rate=rate)
            fh.close()
            declared = frames if _length_is_exact(job.source, container) else None
            return _cut_and_write(job, scan, spool, declared_frames=declared)


def crashed_outcome(job: AudioJob, how: str) -> FileOutcome:
    """The reject for a source whose worker process died outright while conditioning
    it, twice, the second time alone (``how``: see ``pool.describe_exit``); a crash in
    a C library cannot be caught as an exception."""
    rel = job.row["source_path"]
    return FileOutcome(rejects=[reject(NAME, rel, "decoder_crashed",
                                       f"{rel}: the worker process conditioning it died ({how}), also when it "
                                       "ran alone; expected a file the audio libraries can decode without crashing")])


def _length_is_exact(path: str, container: str) -> bool:
    """Whether the header's frame count is a promise a shorter decode breaks: always,
    except for an MP3 without a frame that records it (see pipeline.signal.declared)."""
    if container != "MP3":
        return True
    from pipeline.signal.declared import mp3_length_is_exact

    with open(path, "rb") as fh:
        return mp3_length_is_exact(fh)


def _cut_and_write(job: AudioJob, scan: SourceScan, spool: Spool, *, declared_frames: int | None = None) -> FileOutcome:
    """Reject, or cut and write the clips of, a scanned source; ``declared_frames`` is the
    header's frame count when a shorter decode means the file was cut short."""
    rejected = _source_reject(job, scan, declared_frames=declared_frames)
    if rejected is not None:
        return FileOutcome(rejects=[rejected])
    speech = _find_speech(job, scan, spool)
    if isinstance(speech, dict):
        return FileOutcome(rejects=[speech])
    outcome = FileOutcome(rejects=list(speech.notes))
    shared = _shared_fields(job, scan)
    for index, (span, clip_id) in enumerate(speech.plan):
        samples = speech.samples(span)
        clip = spool.read(start=samples[0], stop=samples[1])
        made = _write_clip(job, clip, _placed(speech, shared, index=index, span=span, clip_id=clip_id,
                                              samples=samples, clip_len=len(clip)))
        if isinstance(made, ClipRejected):
            outcome.rejects.append(made.row)
        else:
            outcome.rows.append(made.row)
            outcome.written[made.row["audio_path"]] = made.stat
    return outcome


def _source_reject(job: AudioJob, scan: SourceScan, *, declared_frames: int | None) -> dict[str, Any] | None:
    """The reject of a whole source for damaged samples, a cut-short file, heavy
    clipping or too little audio; None when the source may be cut into clips."""
    cfg, rel = job.config, job.row["source_path"]
    if scan.bad_sample_at is not None:
        at, value = scan.bad_sample_at, scan.bad_sample
        when = f"frame {at} (at {at / scan.sample_rate:.3f} s)"
        if not math.isfinite(value):
            return reject(NAME, rel, "non_finite_samples",
                          f"{rel}: {when} holds a NaN or infinite sample ({value}); expected finite samples")
        return reject(NAME, rel, "out_of_range_samples",
                      f"{rel}: {when} holds the sample value {value:.6g}; expected "
                      f"magnitudes up to {MAX_SAMPLE_MAGNITUDE:g} (full scale is 1.0), "
                      "so the file is damaged rather than loud")
    if declared_frames is not None and scan.frames < declared_frames:
        return reject(NAME, rel, "truncated",
                      f"{rel}: the header declares {declared_frames} frames but "
                      f"only {scan.frames} could be decoded; expected the whole "
                      "recording (the file was probably cut short)")
    # Mild clipping (above audio.max_clipped_fraction) is a quality gate of the split
    # stage, which flags the clip and by default keeps its transcript; only audio too
    # clipped to be speech any more is rejected here.
    if scan.clipped_fraction > cfg.unusable_clipped_fraction:
        return reject(NAME, rel, "clipped",
                      f"{rel}: {100 * scan.clipped_fraction:.3f}% of samples reach |x| >= "
                      f"{cfg.clip_level} (audio.clip_level); at most "
                      f"{100 * cfg.unusable_clipped_fraction:.3f}% expected of usable audio "
                      "(audio.unusable_clipped_fraction)")
    if scan.out_samples / cfg.sample_rate < cfg.min_duration_s:
        # No clip can come out of it, so say so rather than judging its speech.
        return reject(NAME, rel, "too_short",
                      f"{rel} lasts {scan.out_samples / cfg.sample_rate:.2f} s; at least "
                      f"{cfg.min_duration_s} s expected (audio.min_duration_s)")
    return None


@dataclass(frozen=True)
class SpeechPlan:
    """Where a source's speech is, and the clips it is cut into.

    ``plan`` holds one ``((first frame, stop frame), clip_id)`` per clip; frames are
    VAD frames of ``frame_ms``, ``speech`` the smoothed frame decisions.
    """

    speech: np.ndarray
    ratio: float
    plan: list[tuple[tuple[int, int], str]]
    frame_ms: int
    sample_rate: int
    out_samples: int
    # A long transcribed source cut by aligning its transcript: each transcribed clip's
    # text and confidence, and the reject rows about the transcript.
    texts: dict[str, tuple[str, float]] | None = None
    notes: tuple[dict[str, Any], ...] = ()

    def samples(self, span: tuple[int, int]) -> tuple[int, int]:
        """A frame span as output-rate samples; the last frame runs to the end of the stream."""
        start = _frame_to_sample(span[0], frame_ms=self.frame_ms, sample_rate=self.sample_rate)
        stop = (self.out_samples if span[1] >= len(self.speech) else
                min(self.out_samples, _frame_to_sample(span[1], frame_ms=self.frame_ms,
                                                       sample_rate=self.sample_rate)))
        return start, stop


def _find_speech(job: AudioJob, scan: SourceScan, spool: Spool) -> SpeechPlan | dict[str, Any]:
    """Smooth and trim the VAD frames and plan the clips: one, or pieces cut at pauses
    of an untranscribed span longer than ``audio.max_clip_s``; else a reject row."""
    cfg, row = job.config, job.row
    rel, source_id = row["source_path"], row["source_id"]
    frame_ms = cfg.vad_frame_ms
    speech = smooth_decisions(scan.decisions, frame_ms=frame_ms, min_speech_ms=cfg.min_speech_ms,
                              min_pause_ms=cfg.min_pause_ms, hangover_ms=cfg.hangover_ms)
    n_frames = len(speech)
    ratio = float(np.count_nonzero(speech)) / n_frames if n_frames else 0.0
    region = trim_frames(speech, pad_frames=ms_to_frames(cfg.pad_ms, frame_ms=frame_ms))
    if region is None or ratio < cfg.min_speech_ratio:
        return reject(NAME, rel, "no_speech",
                      f"{rel}: voice activity in {100 * ratio:.1f}% of "
                      f"{_plural(n_frames, f'{frame_ms} ms frame')}; at least "
                      f"{100 * cfg.min_speech_ratio:.1f}% expected (audio.min_speech_ratio)")
    found = SpeechPlan(speech, ratio, [(region, source_id)], frame_ms, cfg.sample_rate, scan.out_samples)
    r0, r1 = found.samples(region)
    span_s = (r1 - r0) / cfg.sample_rate
    if span_s <= cfg.max_clip_s:
        return found
    if row["transcript"] is not None and job.voice is None:
        return reject(NAME, rel, "too_long_transcribed",
                      f"{rel}: speech spans {span_s:.1f} s, longer than "
                      f"audio.max_clip_s ({cfg.max_clip_s} s); a transcribed file is "
                      f"cut only by aligning its transcript, and {job.no_voice}")
    if row["transcript"] is not None:
        from pipeline.stages.alignment import align_long_transcribed

        aligned = align_long_transcribed(job, scan, spool, speech, region)
        return SpeechPlan(speech, ratio, aligned.plan, frame_ms, cfg.sample_rate, scan.out_samples,
                          texts=aligned.texts, notes=tuple(aligned.notes))
    spans = split_frames(speech, scan.energy_db, frame_ms=frame_ms, segment_min_s=cfg.segment_min_s,
                         segment_max_s=cfg.segment_max_s, pad_ms=cfg.pad_ms, start=region[0], stop=region[1])
    plan = [(span, segment_id(source_id, start_ms=span[0] * frame_ms)) for span in spans]
    return SpeechPlan(speech, ratio, plan, frame_ms, cfg.sample_rate, scan.out_samples)


def _shared_fields(job: AudioJob, scan: SourceScan) -> dict[str, Any]:
    """The manifest fields every clip of a source shares."""
    row, rate = job.row, job.config.sample_rate
    return {
        "source_id": row["source_id"],
        "source_path": row["source_path"],
        "speaker": row["speaker"],
        "sample_rate": rate,
        "source_sample_rate": scan.sample_rate,
        "upsampled_from": scan.sample_rate if scan.sample_rate < rate else None,
        "clipped_fraction": scan.clipped_fraction,
        "dc_offset": scan.dc_sum / scan.frames if scan.frames else 0.0,
        "bandwidth_hz": scan.bandwidth_hz,
        "transcribed": row["transcript"] is not None,
        "aligned_transcript": None,
        "align_confidence": None,
    }


def _placed(speech: SpeechPlan, shared: dict[str, Any], *, index: int, span: tuple[int, int], clip_id: str,
            samples: tuple[int, int], clip_len: int) -> dict[str, Any]:
    """The fields that place one clip in its source: id, position and speech measures."""
    rate, frame_ms = speech.sample_rate, speech.frame_ms
    start, stop = samples
    ratio = (speech.ratio if len(speech.plan) == 1 else
             float(np.count_nonzero(speech.speech[span[0]:span[1]])) / (span[1] - span[0]))
    aligned = {} if speech.texts is None else {
        "transcribed": clip_id in speech.texts,
        "aligned_transcript": speech.texts[clip_id][0] if clip_id in speech.texts else None,
        "align_confidence": speech.texts[clip_id][1] if clip_id in speech.texts else None,
    }
    return {
        **shared,
        **aligned,
        "clip_id": clip_id,
        "segment_index": index,
        "source_start_s": start / rate,
        "source_end_s": stop / rate,
        "speech_s": min(speech_seconds(speech.speech, frame_ms=frame_ms, start=span[0], stop=span[1]),
                        clip_len / rate),
        "speech_ratio": ratio,
    }


@dataclass(frozen=True)
class ClipWritten:
    """A clip written to OUT: its manifest row and ``[size, mtime_ns, inode, mode]`` of the file."""

    row: dict[str, Any]
    stat: list[int]


@dataclass(frozen=True)
class ClipRejected:
    """A clip set aside: its reject row."""

    row: dict[str, Any]


def _write_clip(job: AudioJob, clip: np.ndarray, placed: dict[str, Any]) -> ClipWritten | ClipRejected:
    """Gate, normalise, encode and write one clip."""
    rejected = _clip_reject(job.config, clip, placed)
    if rejected is not None:
        return ClipRejected(rejected)
    from pipeline.signal import loudness

    cfg, rate = job.config, job.config.sample_rate
    loudness_in = loudness.integrated_loudness(clip, sample_rate=rate)
    if not math.isfinite(loudness_in):
        rel, clip_id = placed["source_path"], placed["clip_id"]
        return ClipRejected(reject(NAME, rel, "loudness_unmeasurable",
                                   f"{_where(placed)}: integrated loudness (ITU-R BS.1770-4) is not measurable: "
                                   "every 400 ms block is below the -70 LUFS absolute gate; expected audible "
                                   "sound", clip_id))
    gain_db, shortfall_db = loudness.normalisation_gain(
        loudness_lufs=loudness_in, peak_dbfs=_peak_dbfs(clip, cfg), target_lufs=cfg.target_lufs,
        ceiling_dbfs=cfg.peak_ceiling_dbfs)
    # A sample-peak ceiling is also enforced on the integers, which rounding could
    # otherwise lift by half a step; a true-peak ceiling only needs full scale kept.
    limit = 1.0 if cfg.true_peak else min(1.0, 10 ** (cfg.peak_ceiling_dbfs / 20))
    # The gain in float64, in place in float_to_pcm16's one working copy.
    pcm = float_to_pcm16(clip, peak_limit=limit, gain_db=gain_db)
    # Times 2**-15, exactly the division by 32768, in place.
    written = pcm.astype(np.float32)
    written *= np.float32(1.0 / PCM16_SCALE)
    # BS.1770 loudness is homogeneous: a gain g moves every block, and so the relative
    # gate, by 20 log10 g. Only the fixed -70 LUFS absolute gate could react, and it
    # cannot once the clip is louder than before, so the written clip's loudness is the
    # measured input plus the gain (16-bit rounding adds < 0.01 LU; the tests re-measure
    # written files). Measuring again would cost as much as the first measurement.
    loudness_out = loudness_in + gain_db if gain_db >= 0 else loudness.integrated_loudness(written, sample_rate=rate)
    audio_path, data, stat = _encode_and_write(job, pcm, placed)
    row = {
        **placed,
        "audio_path": audio_path,
        "audio_sha256": sha256_bytes(data),
        "num_samples": len(pcm),
        "duration_s": len(pcm) / rate,
        "loudness_in_lufs": loudness_in,
        "loudness_lufs": loudness_out if math.isfinite(loudness_out) else loudness_in + gain_db,
        "gain_db": gain_db,
        "peak_limited_db": max(0.0, shortfall_db),
        # The sample peak of the integers is exact and cheaper than of their float copy.
        "peak_dbfs": _peak_dbfs(written, cfg) if cfg.true_peak else _pcm16_peak_dbfs(pcm),
        **_quality_measures(cfg, clip, written),
    }
    return ClipWritten(row, stat)


def _where(placed: dict[str, Any]) -> str:
    """How a message names a clip: the source alone when the clip is the whole source."""
    rel, clip_id = placed["source_path"], placed["clip_id"]
    return f"{rel}: clip {clip_id}" if clip_id != placed["source_id"] else rel


def _clip_reject(cfg: AudioConfig, clip: np.ndarray, placed: dict[str, Any]) -> dict[str, Any] | None:
    """The reject of a clip too short or with too little speech; None when it may be written."""
    rel, clip_id, where = placed["source_path"], placed["clip_id"], _where(placed)
    duration = len(clip) / cfg.sample_rate
    if duration < cfg.min_duration_s:
        return reject(NAME, rel, "too_short", f"{where} lasts {duration:.2f} s after trimming; at least "
                      f"{cfg.min_duration_s} s expected (audio.min_duration_s)", clip_id)
    if placed["speech_ratio"] < cfg.min_speech_ratio:
        return reject(NAME, rel, "no_speech", f"{where}: voice activity in {100 * placed['speech_ratio']:.1f}% "
                      f"of its frames; at least {100 * cfg.min_speech_ratio:.1f}% expected "
                      "(audio.min_speech_ratio)", clip_id)
    return None


def _peak_dbfs(samples: np.ndarray, cfg: AudioConfig) -> float:
    """The peak the ceiling applies to: true peak or sample peak, as configured."""
    from pipeline.signal import loudness

    if cfg.true_peak:
        return loudness.true_peak_dbfs(samples, sample_rate=cfg.sample_rate)
    return loudness.sample_peak_dbfs(samples)


def _quality_measures(cfg: AudioConfig, clip: np.ndarray, written: np.ndarray) -> dict[str, Any]:
    """SNR of the clip as cut and fingerprint of the clip as written (when measured)."""
    from pipeline.signal.fingerprint import encode_fingerprint, fingerprint
    from pipeline.signal.snr import wada_snr_db

    if not cfg.quality_measures:
        return {"snr_db": None, "fingerprint": ""}
    return {"snr_db": _finite_or_none(wada_snr_db(clip)),
            "fingerprint": encode_fingerprint(fingerprint(written, sample_rate=cfg.sample_rate))}


def _encode_and_write(job: AudioJob, pcm: np.ndarray, placed: dict[str, Any]) -> tuple[str, bytes, list[int]]:
    """Encode 16-bit samples and write them atomically under OUT/audio/<speaker>/;
    the path from OUT, the bytes and ``[size, mtime_ns, inode, mode]`` of the file."""
    import soundfile as sf

    cfg = job.config
    audio_path = f"{AUDIO_DIR}/{placed['speaker']}/{placed['clip_id']}.{cfg.format}"
    target = Path(job.out) / audio_path
    # Encoded in memory, so the hash is taken from the bytes rather than a re-read.
    encoded = io.BytesIO()
    sf.write(encoded, pcm, cfg.sample_rate, format=OUTPUT_FORMATS[cfg.format], subtype="PCM_16")
    data = encoded.getvalue()
    st = write_bytes_atomic(target, data, durable=job.durable)
    return audio_path, data, [st.st_size, st.st_mtime_ns, st.st_ino, st.st_mode]


def written_files(out: Path, table: Any) -> Any:
    """The clip files the audio manifest names, its ``audio_path`` column (see
    pipeline.core.stage): no Python string per clip (a list of the 101,000 of a
    100,000-source rebuild cost 0.09 to 0.11 s of the runner's records)."""
    return table.column("audio_path")


def remove_orphans(listed: Any, keep: Any, *, base: Path) -> int:
    """Delete the files of ``listed`` not in ``keep``, and the folders they leave empty.

    Parameters
    ----------
    listed : pyarrow.Array of str
        '/'-separated paths relative to ``base`` of the files found under OUT/audio
        (:func:`pipeline.stages.audio_cache.file_listing`, taken before the stage's
        workers ended).
    keep : pyarrow.Array of str
        The paths that stay (the audio manifest's ``audio_path``, or those of its rows
        ``listed`` may hold besides the ones already left out of it).
    base : Path
        The folder both are relative to (OUT).

    Returns
    -------
    int
        How many files were deleted.

    Examples
    --------
    >>> import tempfile
    >>> import pyarrow as pa
    >>> out = Path(tempfile.mkdtemp())
    >>> for name in ("ana/take-0a1b2c3d4e.flac", "ana/gone-5f6a7b8c9d.flac", "bo/gone-1a2b3c4d5e.flac"):
    ...     (out / "audio" / name).parent.mkdir(parents=True, exist_ok=True)
    ...     _ = (out / "audio" / name).write_bytes(b"")
    >>> listed = pa.array(["audio/ana/take-0a1b2c3d4e.flac", "audio/ana/gone-5f6a7b8c9d.flac",
    ...                    "audio/bo/gone-1a2b3c4d5e.flac"])
    >>> remove_orphans(listed, pa.array(["audio/ana/take-0a1b2c3d4e.flac"]), base=out)
    2
    >>> sorted(str(p.relative_to(out)) for p in (out / "audio").rglob("*"))
    ['audio/ana', 'audio/ana/take-0a1b2c3d4e.flac']
    >>> import shutil; shutil.rmtree(out)
    """
    import pyarrow.compute as pc  # here: the workers never need it

    orphans = listed.filter(pc.invert(pc.is_in(listed, value_set=keep))).to_pylist()
    root = os.fspath(base)
    removed = 0
    folders: set[str] = set()
    for rel in orphans:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(os.path.join(root, rel))
            removed += 1
        folders.add(posixpath.dirname(rel))
    # Deepest first, each folder then its parents up to (not including) OUT/audio: a
    # folder goes only when its last file did (rmdir refuses one that is not empty).
    for folder in sorted(folders, key=lambda f: -f.count("/")):
        while folder.count("/") >= 1:
            try:
                os.rmdir(os.path.join(root, folder))
            except OSError:
                break
            folder = posixpath.dirname(folder)
    return removed


def warm_up(cfg: AudioConfig) -> None:
    """Import the per-file libraries and build their tables once, in this process.

    Worker processes are forked from here, so they start with all of it in memory
    instead of each paying about 3 s of imports and table building per process.
    """
    import _webrtcvad  # noqa: F401  (webrtcvad's extension: see pipeline.signal.vad)
    import soundfile  # noqa: F401
    import soxr  # noqa: F401

    # bandwidth: each file's LongTermPsd imports it; imported here, no worker does.
    from pipeline.signal import bandwidth, fingerprint, loudness, snr  # noqa: F401

    loudness.k_weighting_sos(sample_rate=cfg.sample_rate)
    if cfg.quality_measures:
        snr.wada_snr_db(np.linspace(-1.0, 1.0, 1024, dtype=np.float32))
        fingerprint.fingerprint(np.zeros(cfg.sample_rate, dtype=np.float32), sample_rate=cfg.sample_rate)


def prepare_driver(config: Any) -> None:
    """Stage hook (pipeline.core.stage): the warm-up, for the runner to do while an earlier
    stage waits for its workers."""
    warm_up(config.audio)


def _clean_up(ctx: StageContext, out: Path, unnamed: Any, fresh: list[str]) -> int:
    """Remove the clip files no row names (``unnamed``: those of OUT/audio, listed as the
    stage began its reuse check, that no reused row names, less ``fresh``: this run's
    clips) and spool debris; how many clip files went. A file written since the listing
    is a row's clip: this run's workers write nothing else there but temporaries of an
    atomic write cut short: a worker stopped when its pool broke leaves one, removed
    before the work goes on (each_result's on_break); a killed run's are removed by the
    next run first."""
    import pyarrow as pa  # here: the workers never need it

    removed = remove_orphans(unnamed, pa.array(fresh, pa.string()), base=out)
    if removed:
        # Counted as files, not clips: a killed run's temporaries there go too.
        ctx.log.info("audio: removed %s under OUT/%s that no row refers to", _plural(removed, "file"), AUDIO_DIR)
    # A worker stopped mid-file (the neighbour of a crash) leaves its spool file behind;
    # no worker runs any more, so whatever is left is debris.
    remove_stale_temporaries(out / TMP_DIR)
    with contextlib.suppress(OSError):
        (out / TMP_DIR).rmdir()
    return removed


def _summary(table: Any, rejects: list[dict[str, Any]], *, sources: int) -> dict[str, Any]:
    """Counts of the audio manifest and rejects for the report."""
    import pyarrow.compute as pc  # here: the workers never need it

    from pipeline.core.columns import distinct_count

    source_ids = table.column("source_id")
    segmented = pc.not_equal(table.column("clip_id"), source_ids)
    upsampled = pc.is_valid(table.column("upsampled_from"))
    return {
        "sources": sources,
        "sources_with_clips": distinct_count(source_ids),
        "sources_segmented": distinct_count(pc.filter(source_ids, segmented)),
        "clips": table.num_rows,
        # Summed in clip order in Python, as before the rows became columns.
        "hours": sum(table.column("duration_s").to_pylist()) / 3600,
        "upsampled_sources": distinct_count(pc.filter(source_ids, upsampled)),
        "peak_limited_clips": len(pc.filter(source_ids, pc.greater(table.column("peak_limited_db"), 0.0))),
        "rejects": len(rejects),
        "rejects_by_reason": dict(sorted(Counter(r["reason"] for r in rejects).items())),
    }


def _real_paths(ctx: StageContext, out: Path) -> dict[str, str]:
    """In a pseudonymised build, the RAW-relative path of each source reference, read
    from the private mapping the ingest stage wrote; else an empty dict."""
    if not ctx.config.privacy.pseudonymise:
        return {}
    from pipeline.stages.privacy import read_mapping

    return {ref: rel for rel, ref in read_mapping(out / names.PRIVATE_MAPPING)["source"].items()}


def _scrub_rejects(rejects: list[dict[str, Any]], real: dict[str, str], *, raw: Path) -> list[dict[str, Any]]:
    """The rejects with every RAW name in their sentences (a decoder's message may
    quote the file's full path) replaced by the file's reference or ``[withheld]``."""
    from pipeline.stages.privacy import name_pattern, real_names, scrub

    sources = {str(raw / rel): ref for ref, rel in real.items()} | {rel: ref for ref, rel in real.items()}
    pattern = name_pattern(real_names((), real.values()))
    return [{**r, "detail": scrub(r["detail"], sources=sources, pattern=pattern)} for r in rejects]


_VOICE_COLUMNS = ["source_id", "source_path", "transcript", "transcript_origin", "metadata_line"]


def _voices(ctx: StageContext, rows: Any) -> dict[str, tuple[str | None, str]]:
    """``alignment_voices`` of the transcribed rows of table ``rows`` (few: the long
    sources, or those to condition), without a Python row per other source."""
    import pyarrow.compute as pc  # here: the workers never need it

    from pipeline.stages.alignment import alignment_voices

    rows = rows.filter(pc.is_valid(rows.column("transcript")))
    return alignment_voices(ctx, rows.select(_VOICE_COLUMNS).to_pylist()) if rows.num_rows else {}


def _long_sources(long: Any, voices: dict[str, tuple[str | None, str]]) -> dict[str, tuple[str, str]]:
    """source_id -> (transcript, voice) of the transcribed sources an alignment may cut
    (``long``: those longer than ``audio.max_clip_s``) that have a voice. Their transcript
    and voice decide how they are cut (pipeline.stages.alignment), so both are in their
    cache key; a short source's transcript text does not reach its clips."""
    return {sid: (text, voices[sid][0]) for sid, text in zip(long.column("source_id").to_pylist(),
                                                             long.column("transcript").to_pylist(), strict=True)
            if voices.get(sid, (None, ""))[0] is not None}


def _aligned_sources(table: Any, transcribed: Any) -> dict[str, dict[str, Any]]:
    """``alignment_summary`` of the clips cut from a source (clip_id not its source_id)
    and the transcribed sources they come from: Python sees only those rows."""
    import pyarrow.compute as pc  # here: the workers never need it

    from pipeline.stages.alignment import alignment_summary

    cut = table.filter(pc.not_equal(table.column("clip_id"), table.column("source_id")))
    sources = transcribed.filter(pc.is_in(transcribed.column("source_id"), value_set=cut.column("source_id")))
    return alignment_summary(cut.select(["source_id", "clip_id", "duration_s", "aligned_transcript"]).to_pylist(),
                             sources.select(["source_id", "source_path", "transcript", "duration_s"]).to_pylist())


@dataclass
class _Conditioning:
    """What turns sources (rows of the ingest table, by index) into worker jobs and
    their outcomes into the stage's rows, cache entries and rejects: the stage runs it
    for the sources with no stored outcome, then for those whose clip files were not
    intact (few, usually none)."""

    ctx: StageContext
    ingest: Any
    long: Any  # the long transcribed ingest rows, whose voices ``voices`` holds
    voices: dict[str, tuple[str | None, str]]
    keys: Any  # the cache key of each ingest row (audio_cache.source_keys)
    cache: OutcomeCache
    builder: ManifestBuilder
    real: dict[str, str]  # a pseudonymised build's RAW path of each source reference (_real_paths)
    rejects_at: dict[int, list[dict[str, Any]]] = field(default_factory=dict)
    fresh_paths: list[str] = field(default_factory=list)  # the audio_path of each fresh clip row
    # The reused clip rows, as the cache holds them (OutcomeCache.reuse); the fresh ones
    # go into ``builder`` as they arrive.
    reused: Any = None

    def jobs(self, todo: list[int]) -> list[AudioJob]:
        """One job per source index of ``todo``, its voice looked up first when it is a
        transcribed source that is not long."""
        import pyarrow as pa  # here: the workers never need it
        import pyarrow.compute as pc

        ctx, cfg = self.ctx, self.ctx.config.audio
        out, raw = Path(os.path.abspath(ctx.out)), Path(os.path.abspath(ctx.raw))
        chosen = self.ingest.take(pa.array(todo, pa.int64()))
        self.voices.update(_voices(ctx, chosen.filter(pc.invert(pc.is_in(chosen.column("source_id"),
                                                                          value_set=self.long.column("source_id"))))))
        return [AudioJob(row, str(raw / self.real.get(row["source_path"], row["source_path"])), str(out),
                         str(out / TMP_DIR), cfg, *self.voices.get(row["source_id"], (None, "")),
                         durable=False) for row in chosen.to_pylist()]

    def run(self, todo: list[int], *, meanwhile: Callable[[], None] | None) -> bool:
        """Condition the sources ``todo`` on the workers (``each_result``, which calls
        ``meanwhile`` while they run); whether there was a pool to call it for."""
        if not todo:
            return False
        jobs = self.jobs(todo)
        warm_up(self.ctx.config.audio)
        called = []

        def waiting() -> None:
            called.append(True)
            if meanwhile is not None:
                meanwhile()

        def arrived(j: int, outcome: FileOutcome) -> None:
            # A decoder error may be passing (a file still being copied), and a crash may
            # be the library's fault (fixed by an upgrade): neither is remembered.
            if not any(r["reason"] in ("undecodable", "decoder_crashed") for r in outcome.rejects):
                self.cache.add(self.keys[todo[j]].as_py(), outcome.rows, outcome.rejects, outcome.written)
            self.builder.extend(outcome.rows)
            self.fresh_paths.extend(row["audio_path"] for row in outcome.rows)
            if outcome.rejects:
                self.rejects_at[todo[j]] = outcome.rejects

        out = Path(os.path.abspath(self.ctx.out))
        each_result(condition_file, jobs, arrived, workers=self.ctx.workers, scheduler=self.ctx.scheduler,
                    desc="audio", progress=self.ctx.progress,
                    costs=[job.row["num_frames"] * job.row["channels"] for job in jobs],
                    meanwhile=waiting, on_crash=lambda j, how: crashed_outcome(jobs[j], how),
                    after_batch=functools.partial(sync_file_system, str(out)),
                    # The pool's other workers, stopped mid-file when one died, may have left an
                    # atomic write's temporary beside a clip; their files run again, so it is debris.
                    on_break=functools.partial(remove_stale_temporaries, out / AUDIO_DIR))
        return bool(called)


def _reuse_check(work: _Conditioning) -> list[int]:
    """List OUT/audio and put the stored outcomes whose clip files are intact into the
    manifest (``OutcomeCache.reuse``); the indices of the sources to condition again."""
    out = Path(os.path.abspath(work.ctx.out))
    # A clip of another inode (a copied or moved OUT) is hashed here, in the driver: a
    # copy of 100,000 sources costs 2.5 CPU s of hashing (audio_cache.same_bytes).
    work.reused, stale, cached_rejects = work.cache.reuse(listing=file_listing(out / AUDIO_DIR, base=out), base=out)
    work.rejects_at.update(cached_rejects)
    if work.cache.rechecked[0]:
        work.ctx.log.info("audio: %d clip files of unchanged size and time but a new inode (OUT moved or "
                          "copied?) hashed again: %d hold the bytes recorded for them", *work.cache.rechecked)
    return stale


def _condition_all(work: _Conditioning, unknown: list[int]) -> list[int]:
    """Condition the sources ``unknown`` (no stored outcome) and those the reuse check
    finds with clip files not intact; the indices of both, sorted.

    The first start on the workers before OUT/audio is listed: the listing and the
    reuse check (about 0.4 CPU s for 100,000 sources) run while the workers do, then
    the runner's other work (``ctx.meanwhile``), which waits for a pool otherwise."""
    others = [work.ctx.meanwhile]
    stale: list[list[int]] = []

    def meanwhile() -> None:
        stale.append(_reuse_check(work))
        later = others.pop()
        if later is not None:
            later()

    if not work.run(unknown, meanwhile=meanwhile):
        stale.append(_reuse_check(work))
    # A clip file changed or gone since it was written: its source runs again, in a
    # pool of its own (the runner's work, if still waiting, meanwhile).
    work.run(stale[0], meanwhile=others.pop() if others else None)
    return sorted(unknown + stale[0])


def _arrived(work: _Conditioning) -> Any:
    """The manifest's rows as they came, the reused (as the cache holds them: their
    chunks as mapped, no copy) then the fresh, in the order of ``OutcomeCache.file_stats``.
    Clip ids are unique, so the order :func:`_sorted_by_clip` gives depends on them alone.
    The rows are copied once, by that sort's take: joining them into one chunk first (as
    ``ManifestBuilder.table`` does) cost a second copy of the 60 MB of 100,000 clips,
    whose fresh pages cost 0.1 to 0.2 s of system time in a rebuild."""
    import pyarrow as pa  # here: the workers never need it

    fresh = work.builder.table()
    return fresh if work.reused is None else pa.concat_tables([work.reused, fresh])


def _sorted_by_clip(table: Any) -> tuple[Any, Any]:
    """The manifest's rows (``table``, as they came: the reused, then the fresh, in
    chunks) sorted by ``clip_id`` (a stable sort and one take, as ``Table.sort_by``
    does) in one chunk (Parquet's bytes depend on the chunks), and the order taken (for
    :func:`_stats_in_order`)."""
    import pyarrow.compute as pc  # here: the workers never need it

    order = pc.sort_indices(table, sort_keys=[("clip_id", "ascending")])
    return table.take(order).combine_chunks(), order


def _stats_in_order(stats: Any, paths: Any, order: Any) -> Any:
    """The stat of each clip file (``stats``: OutcomeCache.file_stats, one row per clip
    row as the rows came, whose ``audio_path`` is ``paths``) in the manifest's order
    (``order``: :func:`_sorted_by_clip`'s), so that the runner's records take them whole
    instead of looking each path up (see ``outputs_record.stat_table``). Stats in
    another order (not expected) are left as they are: the runner looks them up.

    Examples
    --------
    >>> import pyarrow as pa
    >>> rows, order = _sorted_by_clip(pa.table({"clip_id": ["b", "a", "c"], "audio_path": ["b.f", "a.f", "c.f"]}))
    >>> stats = pa.table({"path": ["b.f", "a.f", "c.f"], "st_size": [2, 1, 3]})
    >>> _stats_in_order(stats, pa.array(["b.f", "a.f", "c.f"]), order).column("st_size").to_pylist()
    [1, 2, 3]
    >>> _stats_in_order(stats, pa.array(["a.f", "b.f", "c.f"]), order).column("st_size").to_pylist()
    [2, 1, 3]
    """
    paths = paths.combine_chunks() if hasattr(paths, "combine_chunks") else paths
    if stats.num_rows != len(paths) or not stats.column("path").combine_chunks().equals(paths):
        return stats
    return stats.take(order).combine_chunks()


def _in_background(work: Callable[[], None]) -> Callable[[], None]:
    """Start ``work`` in a thread; the function that waits for it to end (and raises
    what it raised). For work that waits on the disk rather than the processor (OUT's
    flush, the cache's write and its digest's fsync: 0.1 to 0.25 s of wall time for 0.02
    CPU s at 100,000 sources), while the stage sorts its rows and counts them."""
    failed: list[BaseException] = []

    def guarded() -> None:
        try:
            work()
        except BaseException as exc:  # raised in the stage's thread, by join
            failed.append(exc)

    thread = threading.Thread(target=guarded, name="loam-audio-write")
    thread.start()

    def join() -> None:
        thread.join()
        if failed:
            raise failed[0]
    return join


def run(ctx: StageContext) -> StageResult:
    """Condition every ingest row (cached per file), then drop clip files no row names.

    Returns the ``stages/audio.parquet`` table sorted by ``clip_id``, the rejects in
    source order, and a summary of counts for the report.
    """
    cfg = ctx.config.audio
    out = Path(os.path.abspath(ctx.out))
    raw = Path(os.path.abspath(ctx.raw))
    ingest = ctx.inputs["ingest"]
    code = code_version(NAME, cache_dir=ctx.cache_dir if ctx.use_cache else None)
    import pyarrow.compute as pc  # here: the workers never need it

    transcribed = ingest.filter(pc.is_valid(ingest.column("transcript")))
    long = transcribed.filter(pc.fill_null(pc.greater(transcribed.column("duration_s"), cfg.max_clip_s), False))
    # The voice of each long source (its cache key holds it), then of each source to condition.
    voices = _voices(ctx, long)
    keys = source_keys(ingest, long=_long_sources(long, voices))
    cache = OutcomeCache(ctx.cache_dir, section=ctx.config.section(NAME), code=code, enabled=ctx.use_cache)
    # Rows go straight into Arrow batches as each outcome arrives (reused ones as
    # columns); no list of every outcome is kept. Rejects are few, kept in source order.
    work = _Conditioning(ctx, ingest, long, voices, keys, cache, ManifestBuilder(NAME), _real_paths(ctx, out))
    todo = _condition_all(work, cache.stored(keys))
    # The clips were written without an fsync each: one flush makes them durable before
    # the manifest that names them is written (reused ones too, which a run stopped
    # before its flush may have left in the cache). On a cluster each worker has also
    # flushed its own after every batch.
    def save_and_flush() -> None:
        cache.save()  # first, so that the flush covers it too (a torn cache is only a miss)
        sync_file_system(out)

    written = _in_background(save_and_flush)
    ctx.log.info("audio: %d files processed, %d reused from cache", len(todo), len(keys) - len(todo))

    arrived = _arrived(work)
    table, order = _sorted_by_clip(arrived)
    rejects = [r for i in sorted(work.rejects_at) for r in work.rejects_at[i]]
    if work.real:
        rejects = _scrub_rejects(rejects, work.real, raw=raw)
    removed = _clean_up(ctx, out, cache.unnamed(), work.fresh_paths)
    summary = _summary(table, rejects, sources=len(keys))
    summary["aligned_sources"] = _aligned_sources(table, transcribed)
    for path, figures in summary["aligned_sources"].items():
        ctx.log.info("audio: %s aligned to its transcript: %.0f%% of its audio in %d transcribed clips, "
                     "%.0f%% of its transcript placed", path, 100 * figures["audio_share_transcribed"],
                     figures["transcribed_clips"], 100 * figures["transcript_share_placed"])
    # These depend on what earlier runs left in the cache and under audio/: the log's.
    run_stats = {"sources_processed": len(todo), "sources_reused": len(keys) - len(todo),
                 "orphans_removed": removed}
    written()
    # After the save: file_stats writes the outcomes still pending, as the save does.
    file_stats = _stats_in_order(cache.file_stats(), arrived.column("audio_path"), order)
    return StageResult(manifests={stage_manifest(NAME): (NAME, table)}, rejects=rejects, summary=summary,
                       run_stats=run_stats, file_stats=file_stats, listed_folder=AUDIO_DIR)


STAGE = Stage(
    name=NAME,
    inputs=("ingest",),
    outputs=(Output(names.stage_manifest(NAME), schema=NAME),),
    config_sections=("audio", "text", "ingest"),  # text, ingest: each transcript's language, for its voice
    run=run,
    written_files=written_files,
    prepare_driver=prepare_driver,
    # _clean_up removes every file of OUT/audio listed as the stage began that no row
    # names: a killed run's temporaries there too.
    cleans_folder=AUDIO_DIR,
)
