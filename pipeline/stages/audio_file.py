"""The audio stage's work on one source file: decode, downmix, resample, trim to speech,
cut long recordings, normalise loudness, measure quality, and write 16-bit clips.

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

This module holds the per-file work alone, apart from the stage's driver
(``pipeline.stages.audio``): the audio stage's outcome cache
(``pipeline.stages.audio_cache``) is scoped by the code this module reaches, so an
edit of the driver (how the stage lists, reuses, sorts and records) leaves every
conditioned file in use.
"""

from __future__ import annotations

import contextlib
import io
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from pipeline.core.config import AudioConfig
from pipeline.core.errors import ParameterError
from pipeline.core.fsio import (
    sha256_bytes,
    write_bytes_atomic,
)
from pipeline.core.stage import reject
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

if TYPE_CHECKING:
    import soundfile

NAME = "audio"

OUTPUT_FORMATS = {"flac": "FLAC", "wav": "WAV"}
AUDIO_DIR = "audio"


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
