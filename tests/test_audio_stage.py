"""The audio stage end to end on a small generated raw folder.

Speech is committed espeak-ng speech (tests/fixtures/speech/ and two clean demo corpus
clips, at 22.05 kHz and cut to their speech); every other fault (NaN, clipping, silence,
a long transcribed take, a long untranscribed session) is made from it with numpy.
Written clips are re-read with soundfile and re-measured with pyloudnorm."""

from __future__ import annotations

import hashlib
import logging
import os
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyloudnorm
import pytest
import scipy.signal
import soundfile as sf
import soxr

from pipeline.core.config import build_config
from pipeline.core.manifest import table_from_rows, validate_table
from pipeline.core.stage import StageContext
from pipeline.signal.bandwidth import effective_bandwidth_hz
from pipeline.signal.fingerprint import encode_fingerprint, fingerprint
from pipeline.stages import audio, audio_file
from tests.conftest import DEMO, DEMO_CLEAN, FIXTURE_SPEECH, FIXTURES, speech_only

VOICES = {FIXTURES / "speech" / f"{name}.flac": text for name, text in FIXTURE_SPEECH.items()}
VOICES.update({DEMO / rel: DEMO_CLEAN[rel] for rel in ("plover/plover_08.flac", "wren/wren_08.wav")})
LINES = list(VOICES.values())
SPEECH_RATE = 22050  # what espeak-ng writes


@pytest.fixture(scope="module")
def voices() -> list[np.ndarray]:
    out = []
    for path in VOICES:
        samples, rate = speech_only(path)
        out.append(samples if rate == SPEECH_RATE else soxr.resample(samples, rate, SPEECH_RATE))
    return out


def at_rate(x: np.ndarray, rate: int) -> np.ndarray:
    return x if rate == SPEECH_RATE else soxr.resample(x, SPEECH_RATE, rate)


def silence(seconds: float, rate: int) -> np.ndarray:
    return np.zeros(int(seconds * rate))


def session(voices: list[np.ndarray], *, seconds: float, rate: int, pauses: list[float]) -> np.ndarray:
    """Sentences in turn with the given pauses between them, cut or padded to ``seconds``."""
    parts, total, i = [silence(0.5, rate)], 0.5, 0
    while total < seconds:
        voice = at_rate(voices[i % len(voices)], rate)
        pause = silence(pauses[i % len(pauses)], rate)
        parts += [voice, pause]
        total += (len(voice) + len(pause)) / rate
        i += 1
    x = np.concatenate(parts)[: int(seconds * rate)]
    return x


@pytest.fixture(scope="module")
def raw(voices: list[np.ndarray], tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("raw")
    for speaker in ("ana", "ben", "cara"):
        (root / speaker).mkdir()
    a = at_rate(voices[0], 44100)
    stereo = np.concatenate([silence(1.0, 44100), a, silence(0.8, 44100)])
    sf.write(root / "ana/stereo44.wav", np.stack([stereo, 0.6 * stereo], axis=1), 44100, subtype="PCM_16")
    sf.write(root / "ana/take22.flac", np.concatenate([voices[1], silence(0.5, SPEECH_RATE)]), SPEECH_RATE,
             subtype="PCM_16")
    (root / "ana/take22.txt").write_text(LINES[1] + "\n", encoding="utf-8")
    sf.write(root / "ana/phone8k.wav", 0.3 * at_rate(voices[2], 8000), 8000, subtype="PCM_16")
    broken = at_rate(voices[3], 16000).astype(np.float32)
    broken[5000] = np.nan
    sf.write(root / "ben/broken_float.wav", broken, 16000, subtype="FLOAT")
    loud = at_rate(voices[4], 16000)
    sf.write(root / "ben/hot.wav", np.clip(6 * loud / np.abs(loud).max(), -1, 1), 16000, subtype="PCM_16")
    sf.write(root / "ben/quiet.wav", silence(2.0, 16000), 16000, subtype="PCM_16")
    sf.write(root / "cara/read25.ogg", session(voices, seconds=25, rate=16000, pauses=[0.3]), 16000)
    (root / "cara/read25.txt").write_text(" ".join(LINES) + "\n", encoding="utf-8")
    sf.write(root / "cara/session60.flac", 0.5 * session(voices, seconds=60, rate=48000, pauses=[0.7, 1.6, 0.4, 1.1]),
             48000, subtype="PCM_24")
    return root


def ingest_table(raw: Path) -> pa.Table:
    """Ingest rows made here from soundfile.info and hashlib (the contract in
    schemas/ingest.schema.json), so this test does not depend on the ingest stage."""
    rows = []
    for path in sorted(raw.rglob("*")):
        if path.suffix not in (".wav", ".flac", ".ogg"):
            continue
        info = sf.info(path)
        digest = hashlib.sha256(path.read_bytes()).hexdigest()
        sidecar = path.with_suffix(".txt")
        transcript = sidecar.read_text(encoding="utf-8").strip() if sidecar.exists() else None
        rows.append({
            "source_id": f"{path.stem.replace('_', '-')}-{digest[:10]}",
            "source_path": path.relative_to(raw).as_posix(),
            "speaker": path.parent.name,
            "format": info.format, "subtype": info.subtype, "channels": info.channels,
            "sample_rate": info.samplerate, "num_frames": info.frames, "duration_s": info.duration,
            "size_bytes": path.stat().st_size, "sha256": digest, "transcript": transcript,
            "transcript_origin": "sidecar" if transcript is not None else None, "metadata_line": None,
        })
    table = table_from_rows("ingest", rows)
    validate_table("ingest", table, where="test ingest")
    return table


def run_stage(raw: Path, out: Path, *, workers: int = 1, overrides: dict[str, Any] | None = None):
    # Alignment off: read25 is rejected with its transcript, as without a voice for its
    # language (tests/test_alignment.py checks what alignment does with such a source).
    cfg = build_config({}, overrides={"audio.align": "off", **(overrides or {})})
    ctx = StageContext(raw=raw, out=out, config=cfg, inputs={"ingest": ingest_table(raw)}, workers=workers,
                       log=logging.getLogger("loam.test"))
    return audio.run(ctx)


@pytest.fixture(scope="module")
def first_run(raw: Path, tmp_path_factory: pytest.TempPathFactory):
    out = tmp_path_factory.mktemp("out")
    result = run_stage(raw, out)
    return out, result


def rows_of(result) -> list[dict[str, Any]]:
    return result.manifests["stages/audio.parquet"][1].to_pylist()


def test_rows_and_rejects(first_run, raw: Path):
    out, result = first_run
    table = result.manifests["stages/audio.parquet"][1]
    validate_table("audio", table, where="audio")  # schemas/audio.schema.json
    validate_table("rejected", result.rejects_table(), where="rejects")
    rows = rows_of(result)
    assert [r["clip_id"] for r in rows] == sorted(r["clip_id"] for r in rows)
    reasons = {r["source_path"]: r["reason"] for r in result.rejects}
    assert reasons == {
        "ben/broken_float.wav": "non_finite_samples",
        "ben/quiet.wav": "no_speech",
        "cara/read25.ogg": "too_long_transcribed",
    }
    assert all(r["stage"] == "audio" and r["detail"].startswith(r["source_path"]) for r in result.rejects)
    by_path: dict[str, list[dict[str, Any]]] = {}
    for r in rows:
        by_path.setdefault(r["source_path"], []).append(r)
    # ben/hot.wav (speech overdriven by 15.6 dB) has about a quarter of its samples on the
    # rails, short of the unusable level: kept, its clipped share measured.
    assert set(by_path) == {"ana/stereo44.wav", "ana/take22.flac", "ana/phone8k.wav", "ben/hot.wav",
                            "cara/session60.flac"}
    single = {p: rs[0] for p, rs in by_path.items() if len(rs) == 1}
    assert set(single) == {"ana/stereo44.wav", "ana/take22.flac", "ana/phone8k.wav", "ben/hot.wav"}
    for r in single.values():
        assert r["clip_id"] == r["source_id"] and r["segment_index"] == 0
    assert single["ana/phone8k.wav"]["upsampled_from"] == 8000
    assert single["ana/stereo44.wav"]["upsampled_from"] is None
    assert single["ana/stereo44.wav"]["source_sample_rate"] == 44100
    assert [r["transcribed"] for r in rows] == [r["source_path"] == "ana/take22.flac" for r in rows]
    # 1 s of leading silence is trimmed to about the 150 ms pad.
    assert 0.75 <= single["ana/stereo44.wav"]["source_start_s"] <= 0.9
    assert all(r["speech_ratio"] >= 0.05 and 0 < r["speech_s"] <= r["duration_s"] for r in rows)
    assert all(r["snr_db"] is not None for r in rows)
    assert all(r["clipped_fraction"] == 0 for r in rows if r["source_path"] != "ben/hot.wav")
    # The share of samples at |x| >= audio.clip_level (0.999), counted by numpy on the file
    # as soundfile reads it: above audio.max_clipped_fraction (0.001), below
    # audio.unusable_clipped_fraction (0.5).
    hot, _ = sf.read(raw / "ben/hot.wav", dtype="float32")
    assert single["ben/hot.wav"]["clipped_fraction"] == pytest.approx(np.mean(np.abs(hot) >= 0.999), abs=1e-12)
    assert 0.001 < single["ben/hot.wav"]["clipped_fraction"] < 0.5
    assert (out / "tmp").exists() is False
    assert not list(out.rglob(".loam-*"))


def test_long_session_is_cut_into_ordered_segments(first_run):
    _, result = first_run
    segments = [r for r in rows_of(result) if r["source_path"] == "cara/session60.flac"]
    assert len(segments) >= 4
    segments.sort(key=lambda r: r["source_start_s"])
    assert [r["segment_index"] for r in segments] == list(range(len(segments)))
    cfg = build_config({}).audio
    for r in segments:
        assert r["clip_id"] == f"{r['source_id']}_{round(r['source_start_s'] * 1000):08d}"
        assert r["duration_s"] <= cfg.segment_max_s
        assert 0 <= r["source_start_s"] < r["source_end_s"] <= 60
    for left, right in zip(segments, segments[1:], strict=False):
        assert left["source_end_s"] <= right["source_start_s"]


def test_written_files_match_their_rows(first_run, raw: Path):
    out, result = first_run
    written = sorted(p.relative_to(out).as_posix() for p in (out / "audio").rglob("*") if p.is_file())
    rows = rows_of(result)
    assert written == sorted(r["audio_path"] for r in rows)
    for r in rows:
        path = out / r["audio_path"]
        assert hashlib.sha256(path.read_bytes()).hexdigest() == r["audio_sha256"]  # hashlib reference
        info = sf.info(path)
        assert (info.format, info.subtype, info.samplerate, info.channels) == ("FLAC", "PCM_16", 16000, 1)
        assert info.frames == r["num_samples"]
        samples, _ = sf.read(path, dtype="float64")
        # Fingerprint of the clip as written (after Haitsma-Kalker, pipeline.signal.fingerprint).
        assert encode_fingerprint(fingerprint(samples, sample_rate=16000)) == r["fingerprint"]


def test_peak_ceiling_and_loudness_of_written_files(first_run):
    out, result = first_run
    checked = 0
    for r in rows_of(result):
        samples, rate = sf.read(out / r["audio_path"], dtype="float64")
        peak_db = 20 * np.log10(np.max(np.abs(samples)))
        assert peak_db <= -1.0 + 1e-9  # audio.peak_ceiling_dbfs default, sample peak
        assert peak_db == pytest.approx(r["peak_dbfs"], abs=1e-6)
        if r["peak_limited_db"] == 0:
            # pyloudnorm 0.2 (BS.1770-4 meter) within 0.2 LU of audio.target_lufs (-23).
            assert pyloudnorm.Meter(rate).integrated_loudness(samples) == pytest.approx(-23.0, abs=0.2)
            checked += 1
        assert r["loudness_lufs"] == pytest.approx(-23.0 - r["peak_limited_db"], abs=0.05)
    assert checked >= 4


def test_source_measures_match_direct_computation(first_run, raw: Path):
    _, result = first_run
    row = next(r for r in rows_of(result) if r["source_path"] == "ana/stereo44.wav")
    block, rate = sf.read(raw / "ana/stereo44.wav", dtype="float32", always_2d=True)
    mono = block.mean(axis=1)
    # The blockwise PSD of the stream at the output rate must give what
    # bandwidth.effective_bandwidth_hz gives on the whole file resampled in one go.
    import soxr

    at_output = soxr.resample(mono, rate, 16000, quality="HQ")
    assert row["bandwidth_hz"] == pytest.approx(effective_bandwidth_hz(at_output, sample_rate=16000), rel=0.02)
    assert row["dc_offset"] == pytest.approx(float(np.mean(mono, dtype=np.float64)), abs=1e-7)


def test_second_run_reuses_the_cache_and_clears_orphans(first_run, raw: Path, monkeypatch, caplog):
    out, result = first_run
    stale = out / "audio" / "ana" / "old-clip-0000000000.flac"
    stale.write_bytes(b"left over from an earlier configuration")

    def no_decoding(job):
        raise AssertionError(f"decoded {job.row['source_path']} despite a cache hit")

    monkeypatch.setattr(audio, "condition_file", no_decoding)
    with caplog.at_level(logging.INFO, logger="loam.test"):
        again = run_stage(raw, out)
    assert "0 files processed, 8 reused from cache" in caplog.text
    assert again.run_stats["sources_reused"] == 8
    assert again.summary == result.summary  # the summary holds no run history
    assert rows_of(again) == rows_of(result)
    assert again.rejects == result.rejects
    assert not stale.exists()


def test_fresh_run_with_two_workers_gives_identical_bytes(first_run, raw: Path, tmp_path: Path):
    out, result = first_run
    other = run_stage(raw, tmp_path / "out2", workers=2)
    assert rows_of(other) == rows_of(result)
    assert other.rejects == result.rejects
    for r in rows_of(other):
        assert (tmp_path / "out2" / r["audio_path"]).read_bytes() == (out / r["audio_path"]).read_bytes()


def test_local_run_flushes_its_clips_once_before_returning(raw: Path, tmp_path: Path, monkeypatch):
    # The clips skip their own fsync and the file system is flushed once, after the
    # last clip is written and before the runner can write the manifest naming them
    # (on a cluster each worker also flushes after every batch: tests/test_parallel.py).
    flushes: list[tuple[str, list[str]]] = []
    jobs: list[audio_file.AudioJob] = []
    each_result = audio.each_result

    def recording_each_result(func, items, *args, **kwargs):
        jobs.extend(items)
        return each_result(func, items, *args, **kwargs)

    monkeypatch.setattr(audio, "each_result", recording_each_result)
    monkeypatch.setattr(audio, "sync_file_system", lambda path: flushes.append(
        (str(path), sorted(p.relative_to(path).as_posix() for p in Path(path, "audio").rglob("*.flac")))))
    result = run_stage(raw, tmp_path / "out")
    assert jobs and not any(job.durable for job in jobs)
    assert flushes == [(str(tmp_path / "out"), sorted(r["audio_path"] for r in rows_of(result)))]


def job_for(raw: Path, out: Path, rel: str, **overrides: Any) -> audio_file.AudioJob:
    table = ingest_table(raw)
    row = next(r for r in table.to_pylist() if r["source_path"] == rel)
    cfg = build_config({}, overrides={f"audio.{k}": v for k, v in overrides.items()}).audio
    return audio_file.AudioJob(row, str(raw / rel), str(out), str(out / "tmp"), cfg)


@pytest.mark.parametrize("true_peak", [False, True])
def test_peak_limited_clip_stays_under_the_ceiling(raw: Path, tmp_path: Path, true_peak: bool):
    job = job_for(raw, tmp_path, "ana/stereo44.wav", target_lufs=-8.0, true_peak=true_peak)
    outcome = audio_file.condition_file(job)
    (row,) = outcome.rows
    assert row["peak_limited_db"] > 1.0
    samples, rate = sf.read(tmp_path / row["audio_path"], dtype="float64")
    if true_peak:
        # BS.1770-4 Annex 2 style check with scipy: 12x oversampling of 16 kHz (192 kHz).
        peak = np.max(np.abs(scipy.signal.resample_poly(samples, 12, 1)))
        assert 20 * np.log10(peak) <= -1.0 + 0.05
    else:
        assert 20 * np.log10(np.max(np.abs(samples))) <= -1.0
    # Gain fell short by peak_limited_db: pyloudnorm 0.2 confirms the loudness reached.
    measured = pyloudnorm.Meter(rate).integrated_loudness(samples)
    assert measured == pytest.approx(-8.0 - row["peak_limited_db"], abs=0.2)


def test_unusable_inputs_become_rejects(raw: Path, tmp_path: Path):
    garbage = tmp_path / "garbage"
    garbage.mkdir()
    (garbage / "ana").mkdir()
    shutil.copy(raw / "ana/phone8k.wav", garbage / "ana/phone8k.wav")
    job = job_for(garbage, tmp_path, "ana/phone8k.wav")
    (garbage / "ana/phone8k.wav").write_bytes(b"RIFF0000WAVEnot really audio")
    (rej,) = audio_file.condition_file(job).rejects
    assert rej["reason"] == "undecodable" and "Error" in rej["detail"]

    short = tmp_path / "short"
    (short / "ana").mkdir(parents=True)
    sf.write(short / "ana/blip.wav", 0.3 * np.sin(np.arange(3200) * 0.3), 16000, subtype="PCM_16")
    (rej,) = audio_file.condition_file(job_for(short, tmp_path, "ana/blip.wav")).rejects
    assert rej["reason"] == "too_short" and "0.20 s" in rej["detail"]  # 3200 samples at 16 kHz

    (rej,) = audio_file.condition_file(job_for(raw, tmp_path, "ana/stereo44.wav", channel=3)).rejects
    assert rej["reason"] == "undecodable" and "audio.channel is 3 but the file has 2 channels" in rej["detail"]
    (rej,) = audio_file.condition_file(job_for(raw, tmp_path, "ana/phone8k.wav", upsampled="reject")).rejects
    assert rej["reason"] == "upsampled" and "8000 Hz" in rej["detail"]

    # Clipped beyond audio.unusable_clipped_fraction: speech overdriven by 60 dB is
    # nearly a square wave (most samples on the rails), rejected by default.
    railed = tmp_path / "railed"
    (railed / "ben").mkdir(parents=True)
    hot, rate = sf.read(raw / "ben/hot.wav", dtype="float64")
    sf.write(railed / "ben/rail.wav", np.clip(1000 * hot, -1, 1), rate, subtype="PCM_16")
    (rej,) = audio_file.condition_file(job_for(railed, tmp_path, "ben/rail.wav")).rejects
    assert rej["reason"] == "clipped" and "(audio.unusable_clipped_fraction)" in rej["detail"]
    # ben/hot.wav is kept by default, and rejected when its share is declared unusable.
    (rej,) = audio_file.condition_file(job_for(raw, tmp_path, "ben/hot.wav", unusable_clipped_fraction=0.01)).rejects
    assert rej["reason"] == "clipped" and "at most 1.000%" in rej["detail"]


def test_picking_one_channel_and_wav_output(raw: Path, tmp_path: Path):
    outcome = audio_file.condition_file(job_for(raw, tmp_path, "ana/stereo44.wav", channel=1, format="wav"))
    (row,) = outcome.rows
    assert row["audio_path"].endswith(".wav")
    info = sf.info(tmp_path / row["audio_path"])
    assert (info.format, info.subtype) == ("WAV", "PCM_16")
    block, _ = sf.read(raw / "ana/stereo44.wav", dtype="float32", always_2d=True)
    assert row["dc_offset"] == pytest.approx(float(np.mean(block[:, 1], dtype=np.float64)), abs=1e-7)


def test_pcm16_peak_equals_the_float_sample_peak():
    from pipeline.signal.loudness import sample_peak_dbfs

    rng = np.random.default_rng(2)
    for pcm in (rng.integers(-32768, 32768, 999).astype(np.int16), np.array([-32768, 5], dtype=np.int16),
                np.array([3, -7, 0], dtype=np.int16), np.zeros(4, dtype=np.int16)):
        assert audio_file._pcm16_peak_dbfs(pcm) == sample_peak_dbfs(pcm.astype(np.float32) / np.float32(32768))


def test_a_touched_clip_file_reconditions_its_source_only(first_run, raw: Path, tmp_path: Path):
    _, result = first_run
    copy = tmp_path / "out"
    run_stage(raw, copy)
    row = rows_of(result)[0]
    clip = copy / row["audio_path"]
    data = clip.read_bytes()
    clip.unlink()
    clip.write_bytes(data)  # the same bytes in a new file: not the file the cache recorded
    again = run_stage(raw, copy)
    assert again.run_stats["sources_processed"] == 1
    assert rows_of(again) == rows_of(result)
    assert again.rejects == result.rejects


def test_an_interrupted_run_keeps_the_outcomes_written_in_parts(raw: Path, tmp_path: Path, monkeypatch):
    from pipeline.stages import audio_cache

    out = tmp_path / "out"
    monkeypatch.setattr(audio_cache, "PART_ROWS", 1)
    # As if the run were killed after its last outcome: parts written, the table never saved.
    monkeypatch.setattr(audio_cache.OutcomeCache, "save", lambda self: self._flush())
    first = run_stage(raw, out)
    assert not (out / "cache" / "audio" / "outcomes.arrow").exists()
    assert list((out / "cache" / "audio").glob("outcomes.part-*.arrow"))
    monkeypatch.undo()

    def no_decoding(job):
        raise AssertionError(f"decoded {job.row['source_path']} despite its outcome in a part")

    monkeypatch.setattr(audio, "condition_file", no_decoding)
    again = run_stage(raw, out)
    assert rows_of(again) == rows_of(first)
    assert again.rejects == first.rejects
    # The parts became one table.
    assert sorted(p.name for p in (out / "cache" / "audio").iterdir()) == ["outcomes.arrow", "outcomes.arrow.sha256"]


def test_a_rebuild_that_reused_everything_adds_its_outcomes_as_a_part(first_run, raw: Path, tmp_path: Path):
    # A rebuild with one new source leaves the stored table alone (no rewrite of every
    # outcome) and keeps the new outcome in a part; the next run reuses it from there, and
    # a part's outcome whose clip is gone since is a miss like any other.
    out, result = first_run
    some = tmp_path / "some"
    shutil.copytree(raw, some, copy_function=os.link)
    (some / "ana" / "stereo44.wav").unlink()  # the new source of the rebuild below
    copy = tmp_path / "out"
    run_stage(some, copy)
    table = copy / "cache" / "audio" / "outcomes.arrow"
    stored = table.stat().st_ino
    os.link(raw / "ana" / "stereo44.wav", some / "ana" / "stereo44.wav")
    grown = run_stage(some, copy)
    assert grown.run_stats["sources_processed"] == 1
    assert table.stat().st_ino == stored
    assert len(list(table.parent.glob("outcomes.part-*.arrow"))) == 1
    assert rows_of(grown) == rows_of(run_stage(raw, tmp_path / "fresh"))
    again = run_stage(some, copy)
    assert again.run_stats["sources_processed"] == 0
    assert rows_of(again) == rows_of(grown)
    (clip,) = [r["audio_path"] for r in rows_of(grown) if r["source_path"] == "ana/stereo44.wav"]
    (copy / clip).unlink()
    stale = run_stage(some, copy)
    assert stale.run_stats["sources_processed"] == 1
    assert rows_of(stale) == rows_of(grown)


def _built_without_one_source(raw: Path, tmp_path: Path) -> tuple[Path, Path]:
    """A copy of RAW (hard links) and an OUT built from it while one source was missing;
    the source is back in the copy, so the next run of it has one new source."""
    some = tmp_path / "some"
    shutil.copytree(raw, some, copy_function=os.link)
    (some / "ana" / "stereo44.wav").unlink()
    copy = tmp_path / "out"
    run_stage(some, copy)
    os.link(raw / "ana" / "stereo44.wav", some / "ana" / "stereo44.wav")
    return some, copy


def test_new_sources_start_on_the_workers_before_the_clips_are_listed(first_run, raw: Path, tmp_path: Path,
                                                                     monkeypatch):
    # A source with no stored outcome is conditioned whatever OUT/audio holds, so its work
    # starts first and the listing and reuse check run while the workers do (with the
    # runner's other work after them, once); a source whose clip file changed is found by
    # that check and conditioned after it. The rows are those of a fresh run.
    out, result = first_run
    some, copy = _built_without_one_source(raw, tmp_path)
    touched = next(r for r in rows_of(result) if r["source_path"] != "ana/stereo44.wav")
    clip = copy / touched["audio_path"]
    data = clip.read_bytes()
    clip.unlink()
    clip.write_bytes(data)  # the same bytes in a new file: not the file the cache recorded
    events: list[Any] = []
    each_result, file_listing = audio.each_result, audio.file_listing

    def recording_each_result(func, items, on_result, **kwargs):
        events.append(("pool", sorted(job.row["source_path"] for job in items)))
        return each_result(func, items, on_result, **kwargs)

    def recording_listing(folder, *, base):
        events.append("listing")
        return file_listing(folder, base=base)

    monkeypatch.setattr(audio, "each_result", recording_each_result)
    monkeypatch.setattr(audio, "file_listing", recording_listing)
    cfg = build_config({}, overrides={"audio.align": "off"})
    ctx = StageContext(raw=some, out=copy, config=cfg, inputs={"ingest": ingest_table(some)}, workers=1,
                       log=logging.getLogger("loam.test"), meanwhile=lambda: events.append("meanwhile"))
    grown = audio.run(ctx)
    assert events == [("pool", ["ana/stereo44.wav"]), "listing", "meanwhile", ("pool", [touched["source_path"]])]
    assert grown.run_stats["sources_processed"] == 2
    assert rows_of(grown) == rows_of(result)
    assert grown.rejects == result.rejects


@pytest.mark.parametrize("damage", ["garbage", "one byte", "digest gone"])
def test_a_damaged_cache_is_only_a_miss(first_run, raw: Path, tmp_path: Path, damage: str):
    # The table is used as mapped, nothing decodes it: one changed byte of a value (the
    # last clip's fingerprint, near the end of the values) must be seen as well.
    out, result = first_run
    copy = tmp_path / "out"
    shutil.copytree(out, copy)
    table = copy / "cache" / "audio" / "outcomes.arrow"
    data = bytearray(table.read_bytes())
    if damage == "garbage":
        table.write_bytes(b"ARROW1 not a table")
    elif damage == "one byte":
        fingerprint = rows_of(result)[-1]["fingerprint"].encode()
        at = bytes(data).rindex(fingerprint[:16])
        data[at] = ord("A") if data[at] != ord("A") else ord("B")
        table.write_bytes(bytes(data))
    else:
        (copy / "cache" / "audio" / "outcomes.arrow.sha256").unlink()
    again = run_stage(raw, copy)
    assert again.run_stats["sources_processed"] == 8
    assert rows_of(again) == rows_of(result)
    assert again.rejects == result.rejects


def test_later_outcomes_of_a_source_replace_earlier_ones():
    import pyarrow as pa

    from pipeline.stages.audio_cache import _outcome_runs

    # a's outcome (two rows), b's, then a newer outcome of a (a part written later);
    # rows written by an older Loam without a key; c never stored.
    keys = pa.chunked_array([["a", "a"], ["b", "a", None, None]])
    wanted = ["a", "b", "c", ""]
    last_run, first, lengths = _outcome_runs(keys, pa.array(wanted))
    rows = {key: list(range(first[run], first[run] + lengths[run])) if run >= 0 else None
            for key, run in zip(wanted, last_run, strict=True)}
    assert rows == {"a": [3], "b": [2], "c": None, "": [4, 5]}


@pytest.mark.parametrize("seed", range(20))
def test_the_runs_found_are_those_a_row_by_row_reading_finds(seed: int):
    import pyarrow as pa

    from pipeline.stages.audio_cache import _outcome_runs

    # Reference: the stored rows read one by one, in order; a run is a stretch of one key,
    # and a key's outcome is the last run holding it (a later part replaces an earlier
    # outcome). Keys repeat in runs, come back after others, are missing (None) or
    # unwanted; the rows come in chunks as a mapped table's do.
    rng = np.random.default_rng(seed)
    keys = [None if rng.random() < 0.05 else f"k{rng.integers(12)}" for _ in range(rng.integers(1, 60))]
    keys = [k for k in keys for _ in range(rng.integers(1, 3))]
    wanted = [f"k{i}" for i in rng.permutation(15)] + ([""] if rng.random() < 0.5 else [])
    cuts = sorted(rng.choice(np.arange(1, len(keys)), size=min(3, len(keys) - 1), replace=False).tolist())
    bounds = [0, *cuts, len(keys)]
    chunked = pa.chunked_array([keys[a:b] for a, b in zip(bounds[:-1], bounds[1:], strict=True)], pa.string())
    starts = [i for i in range(len(keys)) if i == 0 or keys[i] != keys[i - 1]]
    last = {("" if keys[start] is None else keys[start]): run for run, start in enumerate(starts)}
    run, first, lengths = _outcome_runs(chunked, pa.array(wanted))
    assert first.tolist() == starts
    assert lengths.tolist() == np.diff([*starts, len(keys)]).tolist()
    assert run.tolist() == [last.get(key, -1) for key in wanted]


def test_the_listing_of_clips_is_the_lstat_of_each_file(tmp_path: Path, monkeypatch):
    # Reference: os.lstat of every file under the folder, nested folders included; a file
    # gone between the listing and its stat is left out, its neighbours kept.
    from pipeline.stages import audio_cache

    out = tmp_path / "out"
    for rel in ("audio/ana/a.flac", "audio/ana/b.flac", "audio/ben/c.flac", "audio/ben/deep/d.flac"):
        (out / rel).parent.mkdir(parents=True, exist_ok=True)
        (out / rel).write_bytes(rel.encode())
    (out / "audio" / "ana" / "link.flac").symlink_to(out / "audio" / "ana" / "a.flac")

    def expected() -> dict[str, tuple[int, int, int, int]]:
        return {str(p.relative_to(out)): (p.lstat().st_size, p.lstat().st_mtime_ns, p.lstat().st_ino,
                                          p.lstat().st_mode)
                for p in (out / "audio").rglob("*") if not p.is_dir() or p.is_symlink()}

    def listed() -> dict[str, tuple[int, int, int, int]]:
        table = audio_cache.file_listing(out / "audio", base=out).to_pydict()
        return {path: (table["st_size"][i], table["st_mtime_ns"][i], table["st_ino"][i], table["st_mode"][i])
                for i, path in enumerate(table["path"])}

    assert listed() == expected() and len(expected()) == 5
    stat = audio_cache._LSTAT

    def gone_meanwhile(entry: os.DirEntry[str]) -> os.stat_result:
        if entry.name == "b.flac":
            (out / "audio" / "ana" / "b.flac").unlink()
        return stat(entry)

    monkeypatch.setattr(audio_cache, "_LSTAT", gone_meanwhile)
    assert listed() == expected() and "audio/ana/b.flac" not in expected()


def test_the_cache_follows_the_config_the_code_and_each_source(first_run, raw: Path, tmp_path: Path, monkeypatch):
    # Each change reconditions what it reaches, and the rows are those of a run without
    # the cache: another audio config or code version, every source; a source whose
    # ingest row changes a field its clips carry (its speaker), that source alone.
    import pyarrow.compute as pc

    out, result = first_run
    copy = tmp_path / "out"
    shutil.copytree(out, copy)
    louder = run_stage(raw, copy, overrides={"audio.target_lufs": -20.0})
    assert louder.run_stats["sources_processed"] == 8
    assert rows_of(louder) == rows_of(run_stage(raw, tmp_path / "fresh", overrides={"audio.target_lufs": -20.0}))
    monkeypatch.setattr(audio, "outcome_code", lambda *args, **kwargs: "another version")
    assert run_stage(raw, copy).run_stats["sources_processed"] == 8
    assert rows_of(run_stage(raw, copy)) == rows_of(result)
    ingest = ingest_table(raw)
    moved = pc.equal(ingest.column("source_path"), "ana/take22.flac")
    ingest = ingest.set_column(ingest.schema.get_field_index("speaker"), "speaker",
                               pc.if_else(moved, "dora", ingest.column("speaker")))

    def run_with(where: Path):
        cfg = build_config({}, overrides={"audio.align": "off"})
        return audio.run(StageContext(raw=raw, out=where, config=cfg, inputs={"ingest": ingest}, workers=1,
                                      log=logging.getLogger("loam.test")))

    renamed = run_with(copy)
    assert renamed.run_stats["sources_processed"] == 1
    assert rows_of(renamed) == rows_of(run_with(tmp_path / "scratch"))
    assert "audio/dora/" in " ".join(r["audio_path"] for r in rows_of(renamed))


def digests(out: Path) -> dict[str, str]:
    """SHA-256 of every manifest and stage output under ``out``, by path, but the split
    summary: it counts the clips the split run added to the ledger, and a copied OUT
    reruns the split stage (its outputs have new inodes), which adds none."""
    files = [p for folder in ("manifests", "stages") for p in sorted((out / folder).rglob("*"))
             if p.is_file() and p.name != "split.summary.json"]
    return {str(p.relative_to(out)): hashlib.sha256(p.read_bytes()).hexdigest() for p in files}


def test_a_copied_out_keeps_every_clip_by_content(demo_build: Path, tmp_path: Path, monkeypatch, caplog):
    # cp -a of OUT: the same bytes and mtimes in new inodes. Each clip is hashed and kept
    # (its bytes are the audio_sha256 recorded for it), nothing is conditioned again, the
    # outputs are those of a rerun without the copy, and the next run finds the new
    # inodes recorded.
    from pipeline.core.config import load_config
    from pipeline.core.runner import Runner
    from pipeline.stages import STAGES

    def prepare(out: Path) -> None:
        Runner(DEMO, out, load_config(DEMO / "corpus.toml"), stages=STAGES, workers=2).prepare()

    # The same files (hard links: Loam replaces a file by rename, so the build stays as it
    # is) rerun in place: what the copy must give.
    same = tmp_path / "same"
    shutil.copytree(demo_build, same, copy_function=os.link)
    prepare(same)
    copy = tmp_path / "copy"
    shutil.copytree(demo_build, copy)  # copy2: sizes and mtimes kept, new inodes
    clips = pa.parquet.read_table(demo_build / "stages" / "audio.parquet").num_rows
    monkeypatch.setattr(logging.getLogger("loam"), "propagate", True)
    monkeypatch.setattr(audio, "condition_file", lambda job: pytest.fail(f"conditioned {job.row['source_path']}"))
    with caplog.at_level(logging.INFO, logger="loam"):
        prepare(copy)
    assert f"audio: {clips} clip files of unchanged size and time but a new inode" in caplog.text
    assert f"hashed again: {clips} hold the bytes recorded for them" in caplog.text
    assert "audio  this run: sources_processed=0" in caplog.text
    assert digests(copy) == digests(same)
    caplog.clear()
    with caplog.at_level(logging.INFO, logger="loam"):
        prepare(copy)
    assert "hashed again" not in caplog.text
    assert digests(copy) == digests(same)


def rechecked(caplog) -> tuple[int, int]:
    import re

    (found,) = re.findall(r"audio: (\d+) clip files .* hashed again: (\d+) hold", caplog.text)
    return int(found[0]), int(found[1])


@pytest.mark.parametrize("change", ["same size and time", "another size"])
def test_a_changed_clip_in_a_copied_out_reconditions_its_source(first_run, raw: Path, tmp_path: Path, caplog,
                                                              change: str):
    # Other bytes of the recorded size and mtime fail the hash; another size is not
    # hashed at all: either way that source alone is conditioned again.
    from tests.test_ingest_probe import replace_keeping_size_and_time

    out, result = first_run
    copy = tmp_path / "out"
    shutil.copytree(out, copy)
    rows = rows_of(result)
    single = [r for r in rows if sum(o["source_path"] == r["source_path"] for o in rows) == 1][0]
    clip = copy / single["audio_path"]
    data = bytearray(clip.read_bytes())
    data[-1] ^= 0x55
    if change == "same size and time":
        replace_keeping_size_and_time(clip, bytes(data))
    else:
        st = clip.stat()
        clip.write_bytes(bytes(data) + b"\0")
        os.utime(clip, ns=(st.st_atime_ns, st.st_mtime_ns))
    with caplog.at_level(logging.INFO, logger="loam.test"):
        again = run_stage(raw, copy)
    assert again.run_stats["sources_processed"] == 1
    hashed = len(rows) if change == "same size and time" else len(rows) - 1
    assert rechecked(caplog) == (hashed, len(rows) - 1)
    assert rows_of(again) == rows_of(result)
    assert again.rejects == result.rejects
    assert clip.read_bytes() != bytes(data)  # written again


def test_the_stats_of_the_clips_come_in_the_manifest_order(first_run, raw: Path, tmp_path: Path):
    # StageResult.file_stats holds one row per clip, in the manifest's row order, so the
    # runner's records take it whole (outputs_record.stat_table): a rebuild that reuses
    # the stored outcomes and adds a fresh one included. Reference: os.lstat of each clip.
    out, result = first_run
    some, copy = _built_without_one_source(raw, tmp_path)
    for folder, res in ((out, result), (copy, run_stage(some, copy))):
        table = res.manifests["stages/audio.parquet"][1]
        stats = res.file_stats
        assert stats.column("path").to_pylist() == table.column("audio_path").to_pylist()
        for row in stats.to_pylist():
            st = os.lstat(folder / row["path"])
            assert (row["st_size"], row["st_mtime_ns"], row["st_ino"], row["st_mode"]) == \
                (st.st_size, st.st_mtime_ns, st.st_ino, st.st_mode)
