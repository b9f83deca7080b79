"""Voice activity: webrtcvad's documented limits, no-speech signals, the detector's
start-up, trimming synthetic speech (espeak-ng, from the committed demo corpus), and the
smoothing rules of pipeline.signal.vad. tests/test_trimming.py checks trimming on a whole set."""

from __future__ import annotations

import numpy as np
import pytest
import soundfile as sf
import soxr
import webrtcvad

from pipeline.core.errors import ParameterError
from pipeline.signal.vad import (
    LEAD_IN_MS,
    NOISE_FLATNESS,
    VAD_FRAME_MS,
    VAD_SAMPLE_RATES,
    VoiceActivityStream,
    frame_decisions,
    frame_length,
    majority3,
    smooth_decisions,
    spectral_flatness,
    trim_frames,
    trim_span,
)
from tests.conftest import DEMO

RATE = 16000
DEFAULTS = {"min_speech_ms": 90, "min_pause_ms": 150, "hangover_ms": 90}  # schemas/config.schema.json defaults


def demo_speech(rel: str) -> tuple[np.ndarray, int]:
    """A clean clip of the demo corpus (espeak-ng speech, digitally silent edges), mono."""
    samples, rate = sf.read(DEMO / rel, dtype="float32", always_2d=True)
    return samples.mean(axis=1), rate


def speech_ratio(samples: np.ndarray, *, sample_rate: int = RATE, aggressiveness: int = 2) -> float:
    analysis = frame_decisions(samples, sample_rate=sample_rate, frame_ms=30, aggressiveness=aggressiveness)
    return float(smooth_decisions(analysis.decisions, frame_ms=30, **DEFAULTS).mean())


@pytest.mark.parametrize("sample_rate", VAD_SAMPLE_RATES)
@pytest.mark.parametrize("frame_ms", VAD_FRAME_MS)
def test_frames_are_the_sizes_webrtcvad_accepts(sample_rate: int, frame_ms: int):
    # webrtcvad documentation: 16-bit mono PCM, 8/16/32/48 kHz, 10/20/30 ms frames;
    # webrtcvad.valid_rate_and_frame_length is its own check of exactly that.
    n = frame_length(sample_rate=sample_rate, frame_ms=frame_ms)
    assert webrtcvad.valid_rate_and_frame_length(sample_rate, n)
    noise = np.random.default_rng(0).standard_normal(sample_rate // 2) * 0.01
    stream = VoiceActivityStream(sample_rate=sample_rate, frame_ms=frame_ms, aggressiveness=1)
    stream.push(noise)  # webrtcvad raises on a frame it does not accept
    assert len(stream.result().decisions) == len(noise) // n


@pytest.mark.parametrize(("sample_rate", "frame_ms"), [(44100, 30), (22050, 20), (11025, 10), (16000, 15)])
def test_unsupported_rates_and_frames_are_refused_like_webrtcvad(sample_rate: int, frame_ms: int):
    assert not webrtcvad.valid_rate_and_frame_length(sample_rate, sample_rate * frame_ms // 1000)
    with pytest.raises(ParameterError, match=r"(sample_rate|frame_ms)="):
        frame_length(sample_rate=sample_rate, frame_ms=frame_ms)


def test_digital_silence_is_no_speech():
    analysis = frame_decisions(np.zeros(3 * RATE), sample_rate=RATE, frame_ms=30, aggressiveness=0)
    assert not analysis.decisions.any()
    speech = smooth_decisions(analysis.decisions, frame_ms=30, **DEFAULTS)
    assert trim_span(speech, frame_ms=30, pad_ms=150, duration_s=3.0) is None


@pytest.mark.parametrize("rms", [0.02, 0.1, 0.3])
def test_white_noise_is_no_speech(rms: float):
    noise = np.random.default_rng(int(rms * 100)).standard_normal(4 * RATE) * rms
    # webrtcvad on its own takes loud white noise for speech, which is why the
    # flatness veto exists; below the 5 % default min_speech_ratio counts as none.
    assert speech_ratio(noise) < 0.05


def test_white_noise_flatness_is_near_its_analytic_value():
    # Exponentially distributed periodogram bins: geometric / arithmetic mean = exp(-gamma).
    frames = np.random.default_rng(5).standard_normal((400, 480))
    flat = spectral_flatness(frames)
    assert abs(np.median(flat) - np.exp(-0.5772156649)) < 0.03
    assert np.mean(flat >= NOISE_FLATNESS) > 0.95
    assert spectral_flatness(np.zeros((1, 480)))[0] == 0.0


def test_trim_keeps_all_speech_and_drops_most_silence():
    # "My grandmother wrote every recipe on a card." (demo_corpus/generate.py), 16 kHz WAV.
    voice, rate = demo_speech("wren/wren_08.wav")
    voice = soxr.resample(voice, rate, RATE)
    active = np.flatnonzero(np.abs(voice) > 1e-3)
    lead_s, tail_s = 1.0, 1.5
    signal = np.concatenate([np.zeros(int(lead_s * RATE)), voice, np.zeros(int(tail_s * RATE))])
    # A -65 dBFS noise floor, as in a quiet room, instead of exact zeros.
    signal += np.random.default_rng(1).standard_normal(len(signal)) * 10 ** (-65 / 20)
    speech_start = lead_s + active[0] / RATE
    speech_end = lead_s + (active[-1] + 1) / RATE

    analysis = frame_decisions(signal, sample_rate=RATE, frame_ms=30, aggressiveness=2)
    speech = smooth_decisions(analysis.decisions, frame_ms=30, **DEFAULTS)
    span = trim_span(speech, frame_ms=30, pad_ms=150, duration_s=len(signal) / RATE)
    assert span is not None
    start, end = span
    assert start <= speech_start and end >= speech_end  # all speech kept
    # At most the pad (plus hangover after) and two frames of slack stay on either side.
    assert speech_start - start <= 0.15 + 0.06
    assert end - speech_end <= 0.15 + 0.09 + 0.06
    assert (speech_start - start) + (end - speech_end) < 0.25 * (lead_s + tail_s)


def band_limited_noise(level_dbfs: float, *, source_rate: int, seconds: float, seed: int) -> np.ndarray:
    """White noise at ``source_rate``, resampled to 16 kHz as the audio stage does."""
    noise = np.random.default_rng(seed).standard_normal(int(seconds * source_rate)) * 10 ** (level_dbfs / 20)
    return soxr.resample(noise, source_rate, RATE)


@pytest.mark.parametrize(("source_rate", "level_dbfs"),
                         [(8000, -70), (8000, -60), (8000, -50), (44100, -60), (44100, -50)])
def test_the_detector_start_up_is_not_speech(level_dbfs: int, source_rate: int):
    # webrtcvad calls the first frames of a stream speech while its noise model
    # settles; white noise from an 8 or 44.1 kHz source, resampled, is not flat enough
    # for the noise veto, so without a lead-in that start-up survives min_speech_ms.
    noise = band_limited_noise(level_dbfs, source_rate=source_rate, seconds=2.0, seed=level_dbfs + 100)
    bare = VoiceActivityStream(sample_rate=RATE, frame_ms=30, aggressiveness=2, lead_in_ms=0)
    bare.push(noise)
    startup = smooth_decisions(bare.result().decisions, frame_ms=30, **DEFAULTS)
    assert startup[:6].any()  # the fault the lead-in exists for is real
    primed = frame_decisions(noise, sample_rate=RATE, frame_ms=30, aggressiveness=2)
    assert not smooth_decisions(primed.decisions, frame_ms=30, **DEFAULTS).any()


def test_speech_at_the_very_start_is_still_speech():
    # The lead-in mirrors the first LEAD_IN_MS, so speech that starts at sample 0 looks
    # continuous to the detector and its first frames stay speech.
    voice, rate = demo_speech("wren/wren_08.wav")
    active = np.flatnonzero(np.abs(voice) > 1e-3)
    voice = voice[active[0]:]
    speech = smooth_decisions(frame_decisions(voice, sample_rate=rate, frame_ms=30, aggressiveness=2).decisions,
                              frame_ms=30, **DEFAULTS)
    assert speech[:2].all()


@pytest.mark.parametrize("seconds", [0.0, 0.05, LEAD_IN_MS / 1000 - 0.01, LEAD_IN_MS / 1000, 0.5])
def test_signals_near_the_lead_in_length_give_every_frame(seconds: float):
    signal = band_limited_noise(-40, source_rate=8000, seconds=seconds, seed=3)
    stream = VoiceActivityStream(sample_rate=RATE, frame_ms=10, aggressiveness=2)
    for piece in np.array_split(signal, 7):
        stream.push(piece)
    result = stream.result()
    assert len(result.decisions) == len(result.energy_db) == len(signal) // 160
    np.testing.assert_array_equal(result.decisions, frame_decisions(signal, sample_rate=RATE, frame_ms=10,
                                                                    aggressiveness=2).decisions)


def test_streaming_decisions_equal_one_shot():
    rng = np.random.default_rng(2)
    signal = np.concatenate([np.zeros(4000), np.sin(np.arange(12000) * 0.2) * 0.3, rng.standard_normal(5000) * 1e-3])
    whole = frame_decisions(signal, sample_rate=RATE, frame_ms=20, aggressiveness=2)
    stream = VoiceActivityStream(sample_rate=RATE, frame_ms=20, aggressiveness=2)
    for piece in np.array_split(signal, [1, 333, 334, 9000, 15000]):
        stream.push(piece)
    pieces = stream.result()
    np.testing.assert_array_equal(pieces.decisions, whole.decisions)
    np.testing.assert_allclose(pieces.energy_db, whole.energy_db)


def test_a_stream_longer_than_a_batch_gives_webrtcvads_own_decisions():
    # Reference: webrtcvad's public Vad.is_speech on each frame's bytes, one instance
    # primed with the mirrored lead-in (as VoiceActivityStream documents), on a stream
    # longer than one batch of analysis and pushed in pieces that cut frames and batches
    # anywhere. The noise veto is off (max_flatness=1): this checks the framing.
    voice, rate = demo_speech("wren/wren_08.wav")
    voice = soxr.resample(voice, rate, RATE)
    rng = np.random.default_rng(8)
    signal = np.concatenate([voice, np.zeros(RATE // 3), voice] * 7).astype(np.float32)
    signal += (rng.standard_normal(signal.size) * 10 ** (-60 / 20)).astype(np.float32)
    assert signal.size > 1 << 19  # more than one batch
    stream = VoiceActivityStream(sample_rate=RATE, frame_ms=30, aggressiveness=2, max_flatness=1.0)
    for piece in np.split(signal, np.sort(rng.integers(0, signal.size, size=25))):
        stream.push(piece)
    got = stream.result()
    n = 480
    pcm = np.clip(np.rint(signal * 32768.0), -32768, 32767).astype("<i2")
    reference = webrtcvad.Vad(2)
    lead = pcm[: LEAD_IN_MS * RATE // 1000][::-1]
    for i in range(0, lead.size - n + 1, n):
        reference.is_speech(lead[i:i + n].tobytes(), RATE)
    expected = [reference.is_speech(pcm[i:i + n].tobytes(), RATE) for i in range(0, pcm.size - n + 1, n)]
    assert got.decisions.tolist() == expected
    assert got.energy_db.tobytes() == frame_decisions(signal, sample_rate=RATE, frame_ms=30, aggressiveness=2,
                                                      max_flatness=1.0).energy_db.tobytes()


def _pattern() -> np.ndarray:
    # Runs of 12 speech, 8 pause, 20 speech, 3 pause, 6 speech, 15 pause, 10 speech.
    parts = [(1, 12), (0, 8), (1, 20), (0, 3), (1, 6), (0, 15), (1, 10), (0, 6)]
    return np.concatenate([np.full(n, bool(v)) for v, n in parts])


@pytest.mark.parametrize("settings", [DEFAULTS, {"min_speech_ms": 0, "min_pause_ms": 0, "hangover_ms": 0}])
def test_a_single_frame_flip_does_not_move_a_boundary(settings: dict[str, int]):
    decisions = _pattern()
    base = smooth_decisions(decisions, frame_ms=30, **settings)
    # Frame b is a boundary when frame b - 1 differs from it. A flip at i leaves the
    # three-frame vote unchanged when frames i - 2 .. i + 2 agree, i.e. when no
    # boundary lies in i - 1 .. i + 2; flips closer than that are the boundary itself.
    # The two ends of the signal count as boundaries.
    changes = np.flatnonzero(np.diff(decisions.astype(np.int8))) + 1
    boundaries = np.concatenate([[0], changes, [len(decisions)]])
    tested = 0
    for i in range(len(decisions)):
        if np.any((boundaries >= i - 1) & (boundaries <= i + 2)):
            continue
        tested += 1
        flipped = decisions.copy()
        flipped[i] = not flipped[i]
        np.testing.assert_array_equal(smooth_decisions(flipped, frame_ms=30, **settings), base,
                                      err_msg=f"flipping frame {i} changed the result")
    assert tested >= 45  # most of the 80 frames


def test_smoothing_bridges_short_pauses_and_drops_short_bursts():
    # Worked by hand from the rules in smooth_decisions' docstring, 10 ms frames:
    # the 3-frame pause (< 50 ms) is bridged, the 8-frame one is kept, the 3-frame
    # burst (< 40 ms) is dropped, and the runs get 2 frames (20 ms) of hangover.
    d = np.zeros(40, dtype=bool)
    d[2:10] = True
    d[13:20] = True
    d[28:31] = True
    out = smooth_decisions(d, frame_ms=10, min_speech_ms=40, min_pause_ms=50, hangover_ms=20)
    expected = np.zeros(40, dtype=bool)
    expected[2:22] = True
    np.testing.assert_array_equal(out, expected)


def test_majority_vote_removes_lone_frames_only():
    d = np.array([0, 0, 1, 0, 0, 1, 1, 0, 1, 1, 1], dtype=bool)
    np.testing.assert_array_equal(majority3(d), np.array([0, 0, 0, 0, 0, 1, 1, 1, 1, 1, 1], dtype=bool))


def test_padding_never_passes_the_file_edges():
    speech = np.zeros(20, dtype=bool)
    speech[[0, 19]] = True
    assert trim_frames(speech, pad_frames=5) == (0, 20)
    assert trim_span(speech, frame_ms=30, pad_ms=150, duration_s=0.61) == (0.0, 0.61)
    middle = np.zeros(20, dtype=bool)
    middle[8:10] = True
    assert trim_frames(middle, pad_frames=3, start=7, stop=11) == (7, 11)
    assert trim_span(middle, frame_ms=30, pad_ms=60, duration_s=0.61) == pytest.approx((0.18, 0.36))


def test_bad_parameters_name_themselves():
    with pytest.raises(ParameterError, match="aggressiveness=4"):
        VoiceActivityStream(sample_rate=RATE, frame_ms=30, aggressiveness=4)
    with pytest.raises(ParameterError, match="lead_in_ms=-1"):
        VoiceActivityStream(sample_rate=RATE, frame_ms=30, aggressiveness=2, lead_in_ms=-1)
    with pytest.raises(ParameterError, match="hangover_ms=-1"):
        smooth_decisions(np.zeros(3, bool), frame_ms=30, min_speech_ms=0, min_pause_ms=0, hangover_ms=-1)
