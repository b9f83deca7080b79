"""Tests of the band-energy fingerprint after Haitsma and Kalker and the near-duplicate
search in pipeline.signal.added_search.

References used: the bit rule of Haitsma and Kalker (ISMIR 2002) on Welch-averaged band
energies (Welch 1967), recomputed with scipy.signal's window and numpy's FFT, Python's
struct and base64 modules, espeak-ng speech (the committed demo corpus and tests/fixtures/speech/), soxr for resampling and
soundfile's codecs for lossy copies.
"""

from __future__ import annotations

import base64
import io
import struct

import numpy as np
import pytest
import scipy.signal
import soundfile as sf
import soxr

from pipeline.core.errors import ParameterError
from pipeline.signal import added_search, fingerprint
from tests.conftest import DEMO, FIXTURES, speech_only

# The default of quality.near_duplicate_min_similarity in schemas/config.schema.json.
CONFIG_MIN_SIMILARITY = 0.85
# Distinct utterances cut from the demo corpus (see distinct_clips).
DISTINCT_CLIPS = 100
DISTINCT_CLIP_S = 2.0


# ---------------------------------------------------------------------------------------
# Fingerprints
# ---------------------------------------------------------------------------------------


def test_fingerprint_length_dtype_and_short_input() -> None:
    # Analytic frame count: at 5000 Hz, short frames of 512 samples every 116 (the
    # module's documented hop, 23.2 ms) give 1 + (n - 512) // 116 frames; each band
    # energy sums 13 of them, so 12 fewer averaged frames, and one sub-fingerprint per
    # averaged frame after the first.
    rng = np.random.default_rng(0)
    x = rng.normal(size=5000 * 3)
    fp = fingerprint.fingerprint(x, sample_rate=5000)
    assert fp.dtype == np.uint32
    assert fp.size == (5000 * 3 - 512) // 116 - 12
    # 512 + 12 * 116 = 1904 samples make one averaged frame, so no sub-fingerprint yet.
    assert fingerprint.fingerprint(x[:1904], sample_rate=5000).size == 0
    assert fingerprint.fingerprint(x[:1904 + 116], sample_rate=5000).size == 1
    assert fingerprint.fingerprint(np.zeros(0), sample_rate=16000).size == 0
    with pytest.raises(ParameterError, match="sample_rate"):
        fingerprint.fingerprint(x, sample_rate=0)


def test_fingerprint_bits_follow_haitsma_kalker_rule_on_welch_band_energies() -> None:
    # Reference: the bit rule of Haitsma and Kalker (ISMIR 2002) on band energies that
    # are Welch averages (Welch 1967) of Hann-windowed periodograms, recomputed here
    # with scipy.signal's window, numpy's FFT and plain loops over frames and bands.
    rng = np.random.default_rng(1)
    x = rng.normal(size=5000 * 2) * np.linspace(0.2, 1.0, 5000 * 2)
    fp = fingerprint.fingerprint(x, sample_rate=5000)
    window = scipy.signal.get_window("hann", 512)
    freqs = np.fft.rfftfreq(512, d=1 / 5000)
    edges = np.geomspace(300.0, 2000.0, 34)
    periodograms = []
    for start in range(0, x.size - 512 + 1, 116):
        power = np.abs(np.fft.rfft(x[start : start + 512] * window)) ** 2
        periodograms.append([power[(freqs >= lo) & (freqs < hi)].sum()
                             for lo, hi in zip(edges[:-1], edges[1:], strict=True)])
    p = np.array(periodograms)
    # 13 periodograms per energy, weighted by a 13-point Hann window without its zeros.
    weights = scipy.signal.get_window("hann", 15, fftbins=False)[1:-1]
    e = np.array([(weights[:, None] * p[n : n + 13]).sum(axis=0) for n in range(len(p) - 12)])
    assert fp.size == len(e) - 1
    for n in range(1, e.shape[0]):
        expected = 0
        for m in range(32):
            bit = (e[n, m] - e[n, m + 1]) - (e[n - 1, m] - e[n - 1, m + 1]) > 0
            expected = (expected << 1) | int(bit)
        # float32 inside the module may flip a bit whose difference is near zero.
        assert bin(int(fp[n - 1]) ^ expected).count("1") <= 1


def test_fingerprint_of_silence_is_zero() -> None:
    # Documented: band energies are floored, so digital silence gives the code 0.
    assert not fingerprint.fingerprint(np.zeros(16000), sample_rate=16000).any()


def test_encode_decode_round_trip_against_struct_and_base64() -> None:
    # Reference: Python's struct ("<I", little-endian uint32) and base64 modules.
    fp = np.array([0, 1, 0xDEADBEEF, 0xFFFFFFFF, 12345], dtype=np.uint32)
    text = fingerprint.encode_fingerprint(fp)
    assert text == base64.b64encode(struct.pack("<5I", *fp.tolist())).decode("ascii")
    back = fingerprint.decode_fingerprint(text)
    assert back.dtype == np.uint32 and back.tolist() == fp.tolist()
    assert fingerprint.decode_fingerprint(fingerprint.encode_fingerprint(np.zeros(0, np.uint32))).size == 0
    with pytest.raises(ParameterError):
        fingerprint.decode_fingerprint("not base64!")
    with pytest.raises(ParameterError):
        fingerprint.decode_fingerprint(base64.b64encode(b"abc").decode())


def test_similarity_analytic_cases() -> None:
    # Analytic: bit error rate of known flips; the complement disagrees in every bit.
    rng = np.random.default_rng(2)
    fp = rng.integers(1, 2**32, size=400, dtype=np.uint32)
    assert fingerprint.fingerprint_similarity(fp, fp) == 1.0
    assert fingerprint.fingerprint_similarity(fp, ~fp, max_offset_frames=0) == 0.0
    flipped = fp.copy()
    flipped[:100] ^= np.uint32(0b111)  # 300 of 12800 bits
    assert fingerprint.fingerprint_similarity(fp, flipped, max_offset_frames=0) == pytest.approx(1 - 300 / 12800)
    # A shift within max_offset_frames is found, one beyond it is not.
    assert fingerprint.fingerprint_similarity(fp, fp[5:], max_offset_frames=5) == 1.0
    assert fingerprint.fingerprint_similarity(fp[5:], fp, max_offset_frames=5) == 1.0
    assert fingerprint.fingerprint_similarity(fp, fp[6:], max_offset_frames=5) < 0.6


def _similarity_one_offset_at_a_time(a: np.ndarray, b: np.ndarray, max_offset_frames: int,
                                     min_overlap_frames: int) -> float:
    """The definition in fingerprint_similarity's docstring, as a plain loop over offsets."""
    need = min(min_overlap_frames, a.size, b.size)
    best = 0.0
    for offset in range(-max_offset_frames, max_offset_frames + 1):
        pairs = [(int(a[i]), int(b[i + offset])) for i in range(a.size) if 0 <= i + offset < b.size]
        informative = [(x, y) for x, y in pairs if x | y]
        if need == 0 or len(pairs) < need or len(informative) < need:
            continue
        errors = sum(bin(x ^ y).count("1") for x, y in informative)
        best = max(best, 1.0 - errors / (32.0 * len(informative)))
    return best


def test_similarity_equals_the_loop_over_offsets() -> None:
    # Random fixtures: lengths from 0 to 60, a third of them sharing a run of frames,
    # a third of the sub-fingerprints 0 (silence), offsets and overlaps small and large.
    rng = np.random.default_rng(11)
    for trial in range(400):
        la, lb = (int(n) for n in rng.integers(0, 60, 2))
        a = rng.integers(0, 2**32, la, dtype=np.uint32)
        b = rng.integers(0, 2**32, lb, dtype=np.uint32)
        a[rng.random(la) < 0.3] = 0
        b[rng.random(lb) < 0.3] = 0
        if trial % 3 == 0 and la:
            b = np.concatenate([a[int(rng.integers(0, la)):], b])[:lb]
        for k, m in [(8, 32), (0, 1), (3, 5), (20, 10)]:
            expected = _similarity_one_offset_at_a_time(a, b, k, m)
            assert fingerprint.fingerprint_similarity(a, b, max_offset_frames=k, min_overlap_frames=m) == expected


def test_similarity_short_overlaps_and_silence() -> None:
    rng = np.random.default_rng(3)
    fp = rng.integers(1, 2**32, size=30, dtype=np.uint32)
    # Shorter than min_overlap_frames: compared over the full overlap only.
    assert fingerprint.fingerprint_similarity(fp, fp) == 1.0
    assert fingerprint.fingerprint_similarity(fp, fp[:10]) == 1.0
    assert fingerprint.fingerprint_similarity(fp, np.zeros(0, np.uint32)) == 0.0
    # Positions where both are silence (0) carry no evidence and are skipped.
    silent = np.zeros(200, dtype=np.uint32)
    assert fingerprint.fingerprint_similarity(silent, silent) == 0.0
    other = rng.integers(1, 2**32, size=100, dtype=np.uint32)
    a = np.concatenate([silent, fp, other])
    b = np.concatenate([silent, fp, ~other])
    assert fingerprint.fingerprint_similarity(a, b, max_offset_frames=0) == pytest.approx(30 / 130)
    with pytest.raises(ParameterError, match="max_offset_frames"):
        fingerprint.fingerprint_similarity(fp, fp, max_offset_frames=-1)


def encode_mp3(samples: np.ndarray, sample_rate: int) -> np.ndarray:
    """MP3 round trip through libsndfile (MP3 since 1.1.0; the soundfile wheels bundle it)."""
    assert "MP3" in sf.available_formats(), (
        f"libsndfile {sf.__libsndfile_version__} cannot write MP3; soundfile's wheels bundle a libsndfile "
        "that can (>= 1.1.0)")
    buf = io.BytesIO()
    sf.write(buf, samples, sample_rate, format="MP3", subtype="MPEG_LAYER_III")
    buf.seek(0)
    return sf.read(buf, dtype="float64")[0]


@pytest.fixture(scope="module")
def distinct_clips() -> list[tuple[np.ndarray, int]]:
    """100 different stretches of speech: consecutive 2 s windows of the demo corpus's
    recordings (six voices, 8 to 48 kHz, each file once: the byte-identical copy
    wren_10.flac is left out), within each file's loud part."""
    clips: list[tuple[np.ndarray, int]] = []
    for path in sorted(DEMO.glob("*/*")):
        if path.suffix not in (".wav", ".flac", ".ogg") or path.name == "wren_10.flac" or path.stat().st_size < 1000:
            continue
        mono, rate = speech_only(path, threshold_db=-40.0)
        width = int(DISTINCT_CLIP_S * rate)
        clips += [(mono[i:i + width], rate) for i in range(0, len(mono) - width + 1, width)]
    assert len(clips) >= DISTINCT_CLIPS
    return clips[:DISTINCT_CLIPS]


def test_near_duplicates_survive_resampling_codecs_and_gain(distinct_clips: list[tuple[np.ndarray, int]]) -> None:
    # Reference: the transformations themselves (soxr resampling, libsndfile Vorbis and
    # MP3, a -6 dB gain); the threshold is the configuration default.
    speech, rate = speech_only(FIXTURES / "speech/salt.flac")  # not in the demo corpus
    original = soxr.resample(speech, rate, 44100)
    at_16k = soxr.resample(soxr.resample(original, 44100, 22050), 22050, 16000)
    buf = io.BytesIO()
    sf.write(buf, at_16k, 16000, format="OGG", subtype="VORBIS")
    buf.seek(0)
    vorbis = sf.read(buf, dtype="float64")[0]
    variants = {
        "resampled 44.1 -> 22.05 -> 16 kHz": (at_16k, 16000),
        "Vorbis at 16 kHz": (vorbis, 16000),
        "MP3 at 16 kHz": (encode_mp3(at_16k, 16000), 16000),
        "-6 dB": (original * 10 ** (-6 / 20), 44100),
    }
    reference = fingerprint.fingerprint(original, sample_rate=44100)
    corpus = [reference] + [fingerprint.fingerprint(x, sample_rate=r) for x, r in variants.values()]
    corpus += [fingerprint.fingerprint(x, sample_rate=r) for x, r in distinct_clips[:20]]
    for name, fp in zip(variants, corpus[1:5], strict=True):
        assert fingerprint.fingerprint_similarity(reference, fp) >= 0.95, name
    pairs = added_search.find_near_duplicates(corpus, min_similarity=CONFIG_MIN_SIMILARITY)
    # Exactly the five versions of the clip pair up with each other, nothing else.
    assert [(i, j) for i, j, _ in pairs] == [(i, j) for i in range(5) for j in range(i + 1, 5)]
    assert all(sim >= CONFIG_MIN_SIMILARITY for _, _, sim in pairs)


def test_copies_trimmed_later_and_mp3_coded_are_found(distinct_clips: list[tuple[np.ndarray, int]]) -> None:
    # Reference: the transformations themselves. A copy that starts 300 ms later (trimmed
    # differently) and is then MP3 coded, of 20 different clips at 16 kHz: every pair is
    # reported at the configuration default. 300 ms is 12.9 hops, inside the 16 the
    # comparison tries. Measured lowest similarity 0.91 (bench/bench_fingerprint.py
    # prints the table, 3 s clips); 0.88 leaves room for another MP3 encoder build.
    for clip, rate in distinct_clips[:20]:
        at_16k = soxr.resample(clip, rate, 16000)
        copy = encode_mp3(at_16k[int(0.3 * 16000):], 16000)
        a = fingerprint.fingerprint(at_16k, sample_rate=16000)
        b = fingerprint.fingerprint(copy, sample_rate=16000)
        assert fingerprint.fingerprint_similarity(a, b) >= 0.88
        assert [(i, j) for i, j, _ in added_search.find_near_duplicates([a, b], min_similarity=CONFIG_MIN_SIMILARITY)] == [(0, 1)]


def test_distinct_clips_give_no_pair(distinct_clips: list[tuple[np.ndarray, int]]) -> None:
    # Reference: 100 different utterances (random word strings, 5 voices); any pair found
    # is false. Measured over all 4950 pairs: highest similarity 0.66, median 0.54.
    fps = [fingerprint.fingerprint(x, sample_rate=r) for x, r in distinct_clips]
    assert added_search.find_near_duplicates(fps, min_similarity=CONFIG_MIN_SIMILARITY) == []
    # The empty result must not come from the index skipping pairs: brute force over
    # about 700 of the pairs, without the index, stays below the threshold as well.
    best = max(
        fingerprint.fingerprint_similarity(fps[i], fps[j]) for i in range(0, 100, 7) for j in range(i + 1, 100)
    )
    assert best < CONFIG_MIN_SIMILARITY


def test_near_duplicate_pairs_sorted_and_key_cap() -> None:
    # Analytic cases on random sub-fingerprints (uniform bits, so unrelated pairs score ~0.5).
    rng = np.random.default_rng(4)
    base = [rng.integers(1, 2**32, size=150, dtype=np.uint32) for _ in range(6)]
    corpus = [base[0], base[1], base[2], base[1].copy(), base[0][3:], base[3]]
    pairs = added_search.find_near_duplicates(corpus, min_similarity=0.9)
    assert pairs == [(0, 4, 1.0), (1, 3, 1.0)]
    # Documented cap: a key held by more than max_clips_per_key clips yields no candidates.
    copies = [base[5]] * 10
    assert added_search.find_near_duplicates(copies, min_similarity=0.9, max_clips_per_key=9) == []
    assert len(added_search.find_near_duplicates(copies, min_similarity=0.9, max_clips_per_key=10)) == 45
    assert added_search.find_near_duplicates([np.zeros(0, np.uint32)] * 3, min_similarity=0.9) == []
    with pytest.raises(ParameterError, match="min_similarity"):
        added_search.find_near_duplicates(corpus, min_similarity=0.0)


def _candidate_pairs_per_clip(fps: list[np.ndarray], *, max_clips_per_key: int, min_shared_keys: int) -> set:
    """The candidate search as first written, one ``np.unique`` per clip: the reference
    for the sharded search over all clips at once."""
    keys_per_clip = [np.unique(fp[fp != 0]) for fp in fps]
    sizes = np.array([k.size for k in keys_per_clip], dtype=np.int64)
    if sizes.sum() == 0:
        return set()
    keys = np.concatenate(keys_per_clip).astype(np.int64)
    clips = np.repeat(np.arange(len(fps), dtype=np.int64), sizes)
    order = np.lexsort((clips, keys))
    keys, clips = keys[order], clips[order]
    shared: dict = {}
    for key in np.unique(keys):
        members = clips[keys == key]
        if 2 <= members.size <= max_clips_per_key:
            for a in range(members.size):
                for b in range(a + 1, members.size):
                    pair = (int(members[a]), int(members[b]))
                    shared[pair] = shared.get(pair, 0) + 1
    return {pair for pair, n in shared.items() if n >= min_shared_keys}


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_sharded_candidate_search_agrees_with_one_sort_per_clip(seed: int) -> None:
    """Clips drawn from a small key alphabet (so keys are shared, some by more clips than
    the cap), with repeated keys inside a clip, zeros (never keys), empty clips, and
    keys in every top-bit shard."""
    rng = np.random.default_rng(seed)
    alphabet = np.concatenate([[0], rng.integers(1, 2**32, size=60, dtype=np.uint32),
                               (np.arange(16, dtype=np.uint32) << np.uint32(28)) | np.uint32(5)])
    fps = [alphabet[rng.integers(0, alphabet.size, size=int(rng.integers(0, 12)))] for _ in range(40)]
    offsets = np.r_[0, np.cumsum([fp.size for fp in fps])]
    for cap, shared in ((4, 1), (6, 2), (64, 2)):
        codes = fingerprint._candidate_pairs(np.concatenate(fps), offsets, max_clips_per_key=cap,
                                             min_shared_keys=shared)
        found = {divmod(int(c), len(fps)) for c in codes}
        assert found == _candidate_pairs_per_clip(fps, max_clips_per_key=cap, min_shared_keys=shared)
        assert codes.tolist() == sorted(codes.tolist())


def test_decoding_many_fingerprints_at_once_equals_decoding_each() -> None:
    rng = np.random.default_rng(3)
    fps = [rng.integers(0, 2**32, size=n, dtype=np.uint32) for n in (0, 1, 2, 3, 5, 0, 64, 7)]
    texts = [fingerprint.encode_fingerprint(fp) for fp in fps]
    chars = np.frombuffer("".join(texts).encode("ascii"), np.uint8)
    offsets = np.r_[0, np.cumsum([len(t) for t in texts])]
    values, out = fingerprint.decode_fingerprints(chars, offsets)
    assert [values[out[k]:out[k + 1]].tolist() for k in range(len(fps))] == [fp.tolist() for fp in fps]
    # A slice of a larger buffer, as an Arrow column's offsets may start past 0.
    values, out = fingerprint.decode_fingerprints(np.r_[np.uint8(65), chars], offsets + 1)
    assert values.tolist() == np.concatenate(fps).tolist()
    # Stray character, not base64, 3 bytes, padding inside, a text of 5 bytes after one of 3.
    for bad in ("AQAAAP==x", "AQ!AAA==", "YWJj", "AQ==AQAAAA==", "AQAAAAE="):
        broken = [*texts[:2], bad]
        with pytest.raises(ParameterError):
            fingerprint.decode_fingerprints(np.frombuffer("".join(broken).encode(), np.uint8),
                                            np.r_[0, np.cumsum([len(t) for t in broken])])
