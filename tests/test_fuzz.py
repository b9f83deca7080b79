"""Fuzzing: a dump of damaged WAV, FLAC, Ogg Vorbis and MP3 files, prepared as a user's
damaged archive would be.

A plain seeded generator (numpy's PCG64, seed ``FUZZ_SEED``) writes small fixtures
of every supported container and corrupts them in the ways damaged archives show:
bits flipped in the header and in the body, files cut short, garbage appended,
headers zeroed, chunk sizes set huge, sample-rate and channel fields set to 0 or to
huge values, data chunks pointing past the end, headers claiming 2**32 frames or
more, Ogg pages cut mid-packet, MP3 frames with broken side information, and float
WAVs holding huge sample values. ``LOAM_FUZZ_FILES`` sets how many (300 by default;
``make fuzz`` runs 3,000).

One ``loam prepare`` runs over the whole dump in its own process, and must: exit 0;
account for every file (in a manifest or in ``rejected.parquet``); write only
schema-valid manifests; write nothing outside OUT (RAW and the temporary folder are
compared before and after); leave no process behind; and stay under
``PEAK_RSS_LIMIT_BYTES`` of resident memory in every process it started.

The counts per mutation kind and per reject reason are printed (``make fuzz`` shows
them) and written to ``OUT/logs/fuzz-counts.json`` in the test's temporary folder.
"""

from __future__ import annotations

import io
import json
import os
import re
import struct
import subprocess
import sys
import uuid
from collections import Counter
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import soundfile as sf

from demo_corpus.generate import set_ogg_serial
from pipeline.core.manifest import check_table, read_metadata
from tests.conftest import speechlike, tree_hash

FUZZ_SEED = 20261202
FUZZ_FILES = int(os.environ.get("LOAM_FUZZ_FILES", "300"))
# Generous: a clean prepare of a small dump peaks near 200 MB per process; a header
# that made Loam allocate what it claims (2**32 frames of float32 is 16 GB) would not
# fit. An invariant of the design, not a timing.
PEAK_RSS_LIMIT_BYTES = 1 << 30
RUN_TIMEOUT_S = 1800

# (container, subtype, extension) of every supported input container.
CONTAINERS = {
    "wav16": ("WAV", "PCM_16", "wav"),
    "wavfloat": ("WAV", "FLOAT", "wav"),
    "flac": ("FLAC", "PCM_16", "flac"),
    "ogg": ("OGG", "VORBIS", "ogg"),
    "mp3": ("MP3", "MPEG_LAYER_III", "mp3"),
}
# Rates and channel counts of the undamaged fixtures; every container takes them all,
# each with VARIANTS different signals (fewer byte-identical damaged files).
SHAPES = ((8000, 1), (16000, 1), (22050, 2), (44100, 1), (48000, 2))
VARIANTS = 3


def base_fixtures() -> dict[str, list[tuple[int, int, bytes]]]:
    """Undamaged files per container: (rate, channels, bytes) of 1.2 s of speech-like
    sound for each shape and variant."""
    bases: dict[str, list[tuple[int, int, bytes]]] = {}
    for key, (fmt, subtype, _) in CONTAINERS.items():
        bases[key] = []
        for i, (rate, channels) in enumerate(SHAPES):
            for variant in range(VARIANTS):
                buf = io.BytesIO()
                x = speechlike(1.2, rate, seed=100 * variant + i, channels=channels)
                sf.write(buf, x, rate, format=fmt, subtype=subtype)
                bases[key].append((rate, channels, reproducible(buf.getvalue(), fmt)))
    return bases


def reproducible(data: bytes, fmt: str) -> bytes:
    """The same bytes on every run: libsndfile stamps a float WAV's PEAK chunk with
    the time, and libogg gives each stream a random serial number."""
    out = bytearray(data)
    if fmt == "WAV" and b"PEAK" in riff_chunks(data):
        at = riff_chunks(data)[b"PEAK"][0] + 4  # the chunk's data: version, then timestamp
        out[at + 4:at + 8] = bytes(4)
    if fmt == "OGG":
        # The serial reads "loam"; the generator's helper also recomputes each page's CRC.
        out = bytearray(set_ogg_serial(bytes(out), serial=int.from_bytes(b"loam", "little")))
    return bytes(out)


# --------------------------------------------------------------------------- container layouts


def riff_chunks(data: bytes) -> dict[bytes, tuple[int, int]]:
    """Chunk id -> (offset of its size field, declared size) of a RIFF WAVE file
    (Microsoft/IBM RIFF: 4-byte id, 4-byte little-endian size, data padded to even)."""
    chunks: dict[bytes, tuple[int, int]] = {}
    offset = 12
    while offset + 8 <= len(data):
        size = struct.unpack_from("<I", data, offset + 4)[0]
        chunks.setdefault(data[offset:offset + 4], (offset + 4, size))
        offset += 8 + size + (size & 1)
    return chunks


def ogg_pages(data: bytes) -> list[tuple[int, int]]:
    """(start, end) of each Ogg page (RFC 3533: a 27-byte header whose byte 26 counts
    the lacing values that follow; the body is their sum)."""
    pages = []
    start = 0
    while start + 27 <= len(data) and data[start:start + 4] == b"OggS":
        segments = data[start + 26]
        body = sum(data[start + 27:start + 27 + segments])
        end = start + 27 + segments + body
        pages.append((start, end))
        start = end
    return pages


# MPEG audio Layer III (ISO/IEC 11172-3 and 13818-3): bitrates in kbit/s by index, and
# sample rates by index, for MPEG-1 and MPEG-2/2.5.
_MP3_KBPS = {1: (0, 32, 40, 48, 56, 64, 80, 96, 112, 128, 160, 192, 224, 256, 320),
             2: (0, 8, 16, 24, 32, 40, 48, 56, 64, 80, 96, 112, 128, 144, 160)}
_MP3_RATES = {3: (44100, 48000, 32000), 2: (22050, 24000, 16000), 0: (11025, 12000, 8000)}


def mp3_frames(data: bytes) -> list[tuple[int, int, int]]:
    """(start, length, end of the side information) of each MPEG Layer III frame.

    The header is 4 bytes (sync, version, layer, CRC flag, bitrate, rate, padding,
    mode); a 2-byte CRC may follow; the side information is 32 or 17 bytes (MPEG-1
    stereo or mono) and 17 or 9 (MPEG-2/2.5); a frame holds 144 (MPEG-1) or 72
    (MPEG-2/2.5) x bitrate / rate bytes plus padding.
    """
    frames = []
    pos = 0
    while pos + 4 <= len(data):
        b1, b2, b3 = data[pos + 1], data[pos + 2], data[pos + 3]
        version, layer = (b1 >> 3) & 3, (b1 >> 1) & 3
        bitrate, rate_index = b2 >> 4, (b2 >> 2) & 3
        if data[pos] != 0xFF or b1 & 0xE0 != 0xE0 or version == 1 or layer != 1 or bitrate in (0, 15) or rate_index == 3:
            pos += 1
            continue
        mpeg1 = version == 3
        kbps = _MP3_KBPS[1 if mpeg1 else 2][bitrate]
        length = (144 if mpeg1 else 72) * kbps * 1000 // _MP3_RATES[version][rate_index] + ((b2 >> 1) & 1)
        mono = (b3 >> 6) == 3
        side = (17 if mono else 32) if mpeg1 else (9 if mono else 17)
        crc = 0 if b1 & 1 else 2  # protection bit 0: a CRC follows the header
        frames.append((pos, length, pos + 4 + crc + side))
        pos += max(length, 4)
    return frames


# --------------------------------------------------------------------------- mutations

Rng = np.random.Generator


def flip_bits(data: bytes, rng: Rng, lo: int, hi: int, count: int) -> bytes:
    out = bytearray(data)
    hi = min(hi, len(out))
    if hi <= lo:
        return bytes(out)
    for _ in range(count):
        out[int(rng.integers(lo, hi))] ^= 1 << int(rng.integers(0, 8))
    return bytes(out)


def bitflip_header(data: bytes, rng: Rng, key: str) -> bytes:
    return flip_bits(data, rng, 0, 64, int(rng.integers(1, 9)))


def bitflip_body(data: bytes, rng: Rng, key: str) -> bytes:
    return flip_bits(data, rng, 64, len(data), int(rng.integers(1, 33)))


def truncate(data: bytes, rng: Rng, key: str) -> bytes:
    return data[: int(rng.integers(1, len(data)))]


def append_garbage(data: bytes, rng: Rng, key: str) -> bytes:
    return data + rng.integers(0, 256, int(rng.integers(1, 4097)), dtype=np.uint8).tobytes()


def zero_header(data: bytes, rng: Rng, key: str) -> bytes:
    n = int(rng.integers(4, 65))
    return bytes(n) + data[n:]


HUGE_SIZES = (0xFFFFFFFF, 0xFFFFFFF0, 0x7FFFFFFF, 0x80000000)


def chunk_size_huge(data: bytes, rng: Rng, key: str) -> bytes:
    out = bytearray(data)
    if key.startswith("wav"):
        chunks = riff_chunks(data)
        fields = [4] + [at for at, _ in chunks.values()]
        at = fields[int(rng.integers(0, len(fields)))]
        out[at:at + 4] = struct.pack("<I", HUGE_SIZES[int(rng.integers(0, len(HUGE_SIZES)))])
    else:  # FLAC: the first metadata block's 24-bit length
        out[5:8] = b"\xff\xff\xff"
    return bytes(out)


def _flac_streaminfo(data: bytes, *, rate: int | None = None, channels: int | None = None,
                     frames: int | None = None) -> bytes:
    """Rewrite STREAMINFO's packed fields (FLAC format: 20-bit rate, 3-bit channels-1,
    5-bit bits-1, 36-bit total samples, at byte 18 of the file)."""
    out = bytearray(data)
    bits = int.from_bytes(out[18:26], "big")
    if rate is not None:
        bits = (bits & ~(((1 << 20) - 1) << 44)) | (rate << 44)
    if channels is not None:
        bits = (bits & ~(7 << 41)) | ((channels - 1) << 41)
    if frames is not None:
        bits = (bits & ~((1 << 36) - 1)) | frames
    out[18:26] = bits.to_bytes(8, "big")
    return bytes(out)


def sample_rate_field(data: bytes, rng: Rng, key: str) -> bytes:
    if key == "flac":
        return _flac_streaminfo(data, rate=int(rng.choice([0, 1, 1000, 655350, (1 << 20) - 1])))
    out = bytearray(data)
    at = riff_chunks(data)[b"fmt "][0] + 8  # the rate follows the format tag and channels
    out[at:at + 4] = struct.pack("<I", int(rng.choice([0, 1, 1000, 800000, 0x7FFFFFFF, 0xFFFFFFFF])))
    return bytes(out)


def channels_field(data: bytes, rng: Rng, key: str) -> bytes:
    if key == "flac":
        return _flac_streaminfo(data, channels=int(rng.choice([3, 6, 8])))
    out = bytearray(data)
    at = riff_chunks(data)[b"fmt "][0] + 6
    out[at:at + 2] = struct.pack("<H", int(rng.choice([0, 3, 1024, 1025, 0xFFFF])))
    return bytes(out)


def data_size_past_end(data: bytes, rng: Rng, key: str) -> bytes:
    out = bytearray(data)
    at, size = riff_chunks(data)[b"data"]
    out[at:at + 4] = struct.pack("<I", size + int(rng.integers(1, 1 << 20)))
    return bytes(out)


def claims_2_32_frames(data: bytes, rng: Rng, key: str) -> bytes:
    if key == "flac":
        return _flac_streaminfo(data, frames=int(rng.choice([1 << 32, (1 << 36) - 1])))
    out = bytearray(data)
    at = riff_chunks(data)[b"data"][0]
    out[at:at + 4] = struct.pack("<I", 0xFFFFFFFE)  # 2**32 - 2 bytes: 2**31 16-bit frames
    return bytes(out)


def ogg_cut_mid_packet(data: bytes, rng: Rng, key: str) -> bytes:
    pages = [p for p in ogg_pages(data) if p[1] - p[0] > 64][2:] or ogg_pages(data)
    start, end = pages[int(rng.integers(0, len(pages)))]
    body = start + 27 + data[start + 26]
    return data[: int(rng.integers(body + 1, max(body + 2, end)))]


def mp3_side_info(data: bytes, rng: Rng, key: str) -> bytes:
    out = bytearray(data)
    frames = mp3_frames(data)[1:] or mp3_frames(data)  # the first is the Xing/Info frame
    for index in rng.choice(len(frames), size=min(len(frames), int(rng.integers(1, 6))), replace=False):
        start, _, side_end = frames[int(index)]
        side_start = start + 4 + (0 if data[start + 1] & 1 else 2)
        for at in range(side_start, min(side_end, len(out))):
            out[at] = int(rng.integers(0, 256))
    return bytes(out)


HUGE_FLOATS = (1e30, -3.4e38, 9e29, 1e20, -65504.0, 17.0, float("inf"), float("nan"))


def float_huge(data: bytes, rng: Rng, key: str) -> bytes:
    out = bytearray(data)
    at, size = riff_chunks(data)[b"data"]
    first, count = at + 4, size // 4
    for _ in range(int(rng.integers(1, 11))):
        pos = first + 4 * int(rng.integers(0, count))
        out[pos:pos + 4] = struct.pack("<f", HUGE_FLOATS[int(rng.integers(0, len(HUGE_FLOATS)))])
    return bytes(out)


def intact(data: bytes, rng: Rng, key: str) -> bytes:
    return data


ALL = tuple(CONTAINERS)
# Mutation kind -> (function, containers it applies to).
MUTATIONS: dict[str, tuple[Callable[[bytes, Rng, str], bytes], tuple[str, ...]]] = {
    "intact": (intact, ALL),
    "bitflip_header": (bitflip_header, ALL),
    "bitflip_body": (bitflip_body, ALL),
    "truncate": (truncate, ALL),
    "append_garbage": (append_garbage, ALL),
    "zero_header": (zero_header, ALL),
    "chunk_size_huge": (chunk_size_huge, ("wav16", "wavfloat", "flac")),
    "sample_rate_field": (sample_rate_field, ("wav16", "wavfloat", "flac")),
    "channels_field": (channels_field, ("wav16", "wavfloat", "flac")),
    "data_size_past_end": (data_size_past_end, ("wav16", "wavfloat")),
    "claims_2_32_frames": (claims_2_32_frames, ("wav16", "flac")),
    "ogg_cut_mid_packet": (ogg_cut_mid_packet, ("ogg",)),
    "mp3_side_info": (mp3_side_info, ("mp3",)),
    "float_huge": (float_huge, ("wavfloat",)),
}


def write_fuzz_dump(raw: Path, *, files: int, seed: int = FUZZ_SEED) -> dict[str, str]:
    """Write ``files`` damaged files under ``raw``; returns relative path -> mutation kind."""
    rng = np.random.default_rng(seed)
    bases = base_fixtures()
    kinds = list(MUTATIONS)
    made: dict[str, str] = {}
    for i in range(files):
        kind = kinds[i % len(kinds)]  # every kind equally often
        func, keys = MUTATIONS[kind]
        key = keys[int(rng.integers(0, len(keys)))]
        base = bases[key][int(rng.integers(0, len(bases[key])))][2]
        rel = f"spk{i % 7}/{kind}-{key}-{i:05d}.{CONTAINERS[key][2]}"
        (raw / rel).parent.mkdir(parents=True, exist_ok=True)
        (raw / rel).write_bytes(func(base, rng, key))
        made[rel] = kind
    return made


# --------------------------------------------------------------------------- the run


def run_prepare(raw: Path, out: Path, tmp: Path, log: Path) -> tuple[int, int, str]:
    """``loam prepare`` in a fresh process under a wrapper that reports the peak RSS of
    its descendants (getrusage RUSAGE_CHILDREN counts every process waited for below
    it, workers included). Returns (exit code, peak RSS in bytes, the run's marker)."""
    marker = uuid.uuid4().hex
    wrapper = (
        "import resource, subprocess, sys\n"
        "rc = subprocess.call(sys.argv[1:], stdout=sys.stderr)\n"
        "print(rc, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)\n"
    )
    env = {**os.environ, "TMPDIR": str(tmp), "LOAM_FUZZ_MARKER": marker}
    command = [sys.executable, "-c", wrapper, sys.executable, "-m", "pipeline", "prepare", str(raw), str(out),
               "--workers", "2", "--no-progress"]
    with open(log, "wb") as fh:
        done = subprocess.run(command, env=env, stdout=subprocess.PIPE, stderr=fh, timeout=RUN_TIMEOUT_S, check=True)
    rc, max_rss_kb = (int(v) for v in done.stdout.decode().split()[-2:])
    return rc, max_rss_kb * 1024, marker  # ru_maxrss is in kilobytes on Linux (getrusage(2))


def processes_with(marker: str) -> list[int]:
    """Process ids whose environment carries ``marker`` (every descendant inherits it)."""
    found = []
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                if f"LOAM_FUZZ_MARKER={marker}".encode() in (entry / "environ").read_bytes().split(b"\0"):
                    found.append(int(entry.name))
            except OSError:
                continue
    return found


def listing(folder: Path, *, skip: Path) -> set[str]:
    return {p.relative_to(folder).as_posix() for p in folder.rglob("*") if skip not in (p, *p.parents)}


def check_outcome(out: Path, made: dict[str, str]) -> dict[str, str]:
    """Every file accounted for and every manifest schema-valid; returns each file's
    outcome: "accepted", or its reject reasons joined by "+"."""
    for path in sorted([*(out / "manifests").glob("*.parquet"), *(out / "stages").glob("*.parquet")]):
        schema = read_metadata(path)["schema"]
        assert check_table(schema, pq.read_table(path), where=str(path)) == [], path
    rejects = pq.read_table(out / "manifests" / "rejected.parquet").to_pylist()
    ingest = set(pq.read_table(out / "stages" / "ingest.parquet").column("source_path").to_pylist())
    audio = set(pq.read_table(out / "stages" / "audio.parquet").column("source_path").to_pylist())
    rejected = {stage: {r["source_path"] for r in rejects if r["stage"] == stage} for stage in ("ingest", "audio")}
    assert set(made) == ingest | rejected["ingest"], "files neither ingested nor rejected at ingest"
    assert not ingest & rejected["ingest"]
    assert ingest == audio | rejected["audio"], "ingested sources with no clip and no audio reject"
    reasons: dict[str, set[str]] = {}
    for r in rejects:
        if r["stage"] in ("ingest", "audio"):
            reasons.setdefault(r["source_path"], set()).add(r["reason"])
    return {rel: "accepted" if rel in audio else "+".join(sorted(reasons[rel])) for rel in made}


def tally(made: dict[str, str], outcome: dict[str, str]) -> dict[str, dict[str, int]]:
    """Mutation kind -> outcome -> files, and "all" -> outcome -> files."""
    table: dict[str, Counter[str]] = {}
    for rel, kind in made.items():
        table.setdefault(kind, Counter())[outcome[rel]] += 1
        table.setdefault("all", Counter())[outcome[rel]] += 1
    return {kind: dict(sorted(counts.items())) for kind, counts in sorted(table.items())}


def test_a_damaged_dump_prepares_cleanly(tmp_path: Path) -> None:
    raw, out, tmp = tmp_path / "raw", tmp_path / "out", tmp_path / "tmp"
    tmp.mkdir()
    made = write_fuzz_dump(raw, files=FUZZ_FILES)
    raw_before, parent_before = tree_hash(raw), listing(tmp_path, skip=out)
    rc, peak_rss, marker = run_prepare(raw, out, tmp, tmp_path / "prepare.stderr")
    stderr = (tmp_path / "prepare.stderr").read_text(encoding="utf-8", errors="replace")
    assert rc == 0, stderr[-3000:]
    assert processes_with(marker) == [], "processes of the run are still alive"
    assert tree_hash(raw) == raw_before, "RAW changed"
    assert listing(tmp_path, skip=out) == parent_before | {"prepare.stderr"}, "written outside OUT"
    # No Python traceback and no Python warning (numpy's "RuntimeWarning: overflow"):
    # the decoders' own notes (mpg123's "Warning: Xing stream size ...") are theirs.
    noise = [line for line in stderr.splitlines() if "Traceback" in line or re.search(r"[a-z]Warning: ", line)]
    assert not noise, "\n".join(noise[:20])
    outcome = check_outcome(out, made)
    counts = {"files": len(made), "seed": FUZZ_SEED, "peak_rss_mb": round(peak_rss / 2**20, 1),
              "mutations": dict(sorted(Counter(made.values()).items())), "outcomes": tally(made, outcome)}
    (out / "logs" / "fuzz-counts.json").write_text(json.dumps(counts, indent=2) + "\n", encoding="utf-8")
    print(json.dumps(counts, indent=2))
    assert peak_rss < PEAK_RSS_LIMIT_BYTES, f"peak RSS {peak_rss / 2**20:.0f} MB"
    # The undamaged fixtures come through (or are a copy of one that did): the damage
    # around them costs them nothing.
    assert {outcome[rel] for rel, kind in made.items() if kind == "intact"} <= {"accepted", "duplicate_content"}


def test_generator_is_seeded(tmp_path: Path) -> None:
    """The same seed writes the same dump byte for byte, and the fixtures it starts from
    are sound: libsndfile reads each undamaged one whole (the Ogg pages re-stamped with
    a fixed serial number and their checksums redone)."""
    first = write_fuzz_dump(tmp_path / "a", files=len(MUTATIONS) * 2, seed=7)
    second = write_fuzz_dump(tmp_path / "b", files=len(MUTATIONS) * 2, seed=7)
    assert first == second and tree_hash(tmp_path / "a") == tree_hash(tmp_path / "b")
    for key, files in base_fixtures().items():
        for rate, channels, data in files:
            samples, read_rate = sf.read(io.BytesIO(data), dtype="float32", always_2d=True)
            assert (read_rate, samples.shape, key) == (rate, (int(1.2 * rate), channels), key)


def test_headers_claiming_the_most_cost_no_memory(tmp_path: Path) -> None:
    """The largest claims the formats can make, side by side with one sound file: a
    FLAC claiming 2**36 - 1 frames (its field's maximum), a WAV whose data chunk
    claims 2**32 - 2 bytes, and a WAV claiming 1,024 channels (libsndfile's maximum).
    Loam must not allocate what they claim."""
    raw, out, tmp = tmp_path / "raw", tmp_path / "out", tmp_path / "tmp"
    tmp.mkdir()
    (raw / "spk").mkdir(parents=True)
    bases = base_fixtures()
    flac, wav = bases["flac"][VARIANTS][2], bases["wav16"][VARIANTS][2]  # 16 kHz mono
    at = riff_chunks(wav)[b"fmt "][0] + 6
    files = {
        "flac_2_36.flac": _flac_streaminfo(flac, frames=(1 << 36) - 1),
        "wav_2_32.wav": wav[:riff_chunks(wav)[b"data"][0]] + struct.pack("<I", 0xFFFFFFFE)
        + wav[riff_chunks(wav)[b"data"][0] + 4:],
        "wav_1024.wav": wav[:at] + struct.pack("<H", 1024) + wav[at + 2:],
        "sound.wav": bases["wav16"][2 * VARIANTS][2],  # 22.05 kHz stereo
    }
    for name, data in files.items():
        (raw / "spk" / name).write_bytes(data)
    rc, peak_rss, marker = run_prepare(raw, out, tmp, tmp_path / "prepare.stderr")
    assert rc == 0 and processes_with(marker) == []
    outcome = check_outcome(out, {f"spk/{name}": "claim" for name in files})
    print(json.dumps({"peak_rss_mb": round(peak_rss / 2**20, 1), "outcomes": outcome}, indent=2))
    assert peak_rss < PEAK_RSS_LIMIT_BYTES, f"peak RSS {peak_rss / 2**20:.0f} MB"
    assert outcome["spk/sound.wav"] == "accepted"
    assert outcome["spk/wav_2_32.wav"] == "truncated"
