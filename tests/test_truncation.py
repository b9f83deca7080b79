"""Files cut short and samples no recording can hold: rejected with their own reason,
a detail naming the numbers, and no numpy warning on the way."""

from __future__ import annotations

import io
import struct
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import soundfile as sf

from pipeline.core.config import build_config
from pipeline.signal.declared import DataExtent, mp3_length_is_exact, wav_data_extent
from pipeline.signal.decode import BLOCK_SAMPLES, read_blocks
from pipeline.stages import audio_file
from pipeline.stages.ingest_probe import ProbeJob, probe_file
from tests.conftest import speechlike

SR = 16000


def encoded(x: np.ndarray, rate: int, fmt: str, subtype: str | None = None) -> bytes:
    buf = io.BytesIO()
    sf.write(buf, x, rate, format=fmt, subtype=subtype)
    return buf.getvalue()


def put(folder: Path, name: str, data: bytes) -> Path:
    path = folder / "spk" / name
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)
    return path


def probe(path: Path) -> dict[str, Any]:
    return probe_file(ProbeJob(str(path), f"spk/{path.name}"))


def condition(path: Path, out: Path) -> audio_file.FileOutcome:
    row = probe(path)
    assert "error" not in row, row
    row.update(source_id="take-0123456789", source_path=f"spk/{path.name}", speaker="spk", transcript=None)
    cfg = build_config({}).audio
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # an overflow warning would fail the test
        return audio_file.condition_file(audio_file.AudioJob(row, str(path), str(out), str(out / "tmp"), cfg))


def test_wav_cut_mid_transfer_is_truncated_with_declared_and_present_frames(tmp_path: Path) -> None:
    # The case reported: a header declaring 103,435 frames over 82,749 bytes of data.
    data = encoded(speechlike(103435 / SR, SR, seed=1), SR, "WAV", "PCM_16")
    assert struct.unpack("<I", data[40:44])[0] == 103435 * 2  # 16-bit mono: 2 bytes a frame
    path = put(tmp_path, "cut.wav", data[: 44 + 82749])
    reason, detail = probe(path)["error"]
    assert reason == "truncated"
    assert "declares 103435 frames" in detail and "holds 41374" in detail and detail.startswith("spk/cut.wav")


@pytest.mark.parametrize("declared", [0, 0xFFFFFFFF])
def test_unknown_data_size_of_a_streamed_wav_is_not_truncation(tmp_path: Path, declared: int) -> None:
    data = bytearray(encoded(speechlike(1.0, SR, seed=2), SR, "WAV", "PCM_16"))
    data[40:44] = struct.pack("<I", declared)
    row = probe(put(tmp_path, "streamed.wav", bytes(data)))
    assert row.get("error", ("",))[0] != "truncated"


def test_rifx_and_chunks_before_data_are_walked() -> None:
    body = b"fmt " + struct.pack(">I", 3) + b"abc\0" + b"data" + struct.pack(">I", 100) + bytes(40)
    head = b"RIFX" + struct.pack(">I", 4 + len(body)) + b"WAVE"
    assert wav_data_extent(io.BytesIO(head + body)) == DataExtent(declared_bytes=100, present_bytes=40)
    assert wav_data_extent(io.BytesIO(b"fLaC" + bytes(60))) is None


def test_complete_files_of_every_container_are_not_truncated(tmp_path: Path) -> None:
    x = speechlike(1.3, 22050, seed=3, channels=2)
    for fmt, subtype in (("WAV", "PCM_16"), ("WAV", "FLOAT"), ("FLAC", None), ("OGG", "VORBIS"),
                         ("MP3", "MPEG_LAYER_III")):
        path = put(tmp_path, f"whole-{subtype}.{fmt.lower()}", encoded(x, 22050, fmt, subtype))
        outcome = condition(path, tmp_path / "out")
        assert not [r for r in outcome.rejects if r["reason"] == "truncated"], (fmt, outcome.rejects)
        assert outcome.rows, (fmt, outcome.rejects)


def test_mp3_cut_short_decodes_fewer_frames_than_declared(tmp_path: Path) -> None:
    data = encoded(speechlike(2.0, SR, seed=4), SR, "MP3", "MPEG_LAYER_III")
    path = put(tmp_path, "cut.mp3", data[: len(data) * 9 // 10])
    (rej,) = condition(path, tmp_path / "out").rejects
    assert rej["reason"] == "truncated"
    # libsndfile takes the length from the Xing header, written for the whole file.
    assert "declares 32000 frames" in rej["detail"]


def flac_claiming(frames: int) -> bytes:
    """A FLAC file whose STREAMINFO total-samples field (36 bits, FLAC format
    specification) is overwritten with ``frames``."""
    data = bytearray(encoded(speechlike(1.0, SR, seed=5), SR, "FLAC"))
    bits = int.from_bytes(data[18:26], "big")
    bits = (bits & ~((1 << 36) - 1)) | frames
    data[18:26] = bits.to_bytes(8, "big")
    return bytes(data)


def test_header_claiming_2_to_the_32_frames_decodes_only_what_is_there(tmp_path: Path) -> None:
    path = put(tmp_path, "claims.flac", flac_claiming(1 << 32))
    assert sf.info(str(path)).frames == 1 << 32
    decoded = 0
    # libsndfile fails at the end of the real stream (soundfile's position update after
    # the last short read); before that, only the frames present come out.
    with pytest.raises(sf.LibsndfileError):
        for block in read_blocks(path):
            decoded += len(block)
    assert decoded <= SR
    (rej,) = condition(path, tmp_path / "out").rejects
    assert rej["reason"] == "undecodable"
    assert not (tmp_path / "out" / "audio").exists()


def test_blocks_stay_small_whatever_the_channel_count(tmp_path: Path) -> None:
    path = put(tmp_path, "many.wav", encoded(np.zeros((300, 1024), np.float32), SR, "WAV", "PCM_16"))
    sizes = [b.size for b in read_blocks(path)]
    assert sum(sizes) == 300 * 1024 and max(sizes) <= BLOCK_SAMPLES


@pytest.mark.parametrize("value", [9e29, -3.5e4, 16.5])
def test_sample_beyond_the_bound_is_rejected_naming_frame_and_value(tmp_path: Path, value: float) -> None:
    x = speechlike(1.5, SR, seed=6).astype(np.float32)
    x[20000] = value
    path = put(tmp_path, "huge.wav", encoded(x, SR, "WAV", "FLOAT"))
    (rej,) = condition(path, tmp_path / "out").rejects
    assert rej["reason"] == "out_of_range_samples"
    assert "frame 20000 (at 1.250 s)" in rej["detail"] and f"{np.float32(value):.6g}" in rej["detail"]


def test_loud_float_file_within_the_bound_is_kept(tmp_path: Path) -> None:
    # One overshoot of +23.5 dB: within the bound, and too rare to count as clipping.
    x = speechlike(1.5, SR, seed=7).astype(np.float32)
    x[20000] = 15.0
    outcome = condition(put(tmp_path, "hot.wav", encoded(x, SR, "WAV", "FLOAT")), tmp_path / "out")
    assert outcome.rows and not outcome.rejects
    assert all(r["loudness_in_lufs"] <= 10 for r in outcome.rows)  # schemas/audio.schema.json maximum


@pytest.mark.parametrize("rate", [1, 3999, 768001, 2**31 - 1])
def test_implausible_sample_rate_is_rejected_at_probe(tmp_path: Path, rate: int) -> None:
    data = bytearray(encoded(speechlike(1.0, SR, seed=8), SR, "WAV", "PCM_16"))
    data[24:28] = struct.pack("<I", rate)  # WAVE fmt chunk: sample rate at byte 24
    reason, detail = probe(put(tmp_path, "rate.wav", bytes(data)))["error"]
    assert reason == "unsupported_sample_rate" and f"{rate} Hz" in detail


def test_mp3_without_a_length_frame_is_not_judged_by_its_estimate(tmp_path: Path) -> None:
    data = encoded(speechlike(2.0, SR, seed=4), SR, "MP3", "MPEG_LAYER_III")
    assert mp3_length_is_exact(io.BytesIO(data))
    # The Xing/Info tag renamed: libsndfile then estimates the length from size and bitrate.
    at = data.index(b"Info") if b"Info" in data[:200] else data.index(b"Xing")
    blind = data[:at] + b"Nope" + data[at + 4:]
    assert not mp3_length_is_exact(io.BytesIO(blind))
    path = put(tmp_path, "blind.mp3", blind[: len(blind) * 9 // 10])
    outcome = condition(path, tmp_path / "out")
    assert not [r for r in outcome.rejects if r["reason"] == "truncated"], outcome.rejects


def test_wada_snr_of_subnormal_samples_warns_nothing() -> None:
    from pipeline.signal.snr import wada_snr_db

    x = speechlike(1.0, SR, seed=8).astype(np.float32) * 16
    x[::97] = np.float32(1e-45)  # the smallest subnormal float32 (IEEE 754 binary32)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        value = wada_snr_db(x)
    assert np.isfinite(value)
