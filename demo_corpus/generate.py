"""Generate Loam's demo corpus: the Tidewell Reach tide-book.

Scenario (invented): Tidewell Reach is a made-up estuary village with a reed marsh, a
lighthouse, net lofts and a ferry that stopped running long ago. Volunteers at the village
hall recorded six older residents for a community oral-history "tide-book". Each resident
is filed under a pseudonymous id taken from the marsh's wildlife and plants (heron, otter,
sedge, alder, plover, wren), never under a name. The volunteers used whatever they had: a
telephone line (8 kHz), a laptop (48 kHz), a handheld stereo recorder (44.1 kHz), exported
voice notes (Ogg Vorbis), so the dump mixes rates, channel counts and encodings. They typed
up about a third of the recordings, some as a text file beside the audio and some in a
shared spreadsheet (``metadata.csv``). A few files went wrong on the way, on purpose; the
README lists each one and what Loam should do with it.

Every voice is synthetic (espeak-ng); no real person's voice or name is in the corpus.

Run with ``/work/main/.venv/bin/python demo_corpus/generate.py``; it deletes and rewrites
only the files it generates (the speaker folders' audio and sidecars, and ``metadata.csv``),
then prints one line per audio file so the rate, format and level spread can be checked.
``--check`` prints the table without regenerating. Output is deterministic for a given
espeak-ng version and ``SEED``.
"""

from __future__ import annotations

import argparse
import csv
import io
import subprocess
import sys
import tempfile
import zlib
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import soundfile as sf
import soxr

SEED = 7
ROOT = Path(__file__).resolve().parent
SIZE_LIMIT_BYTES = 6_500_000
ESPEAK_RATE = 22050  # espeak-ng always writes 22.05 kHz 16-bit mono

PEAK_RANGE_DBFS = (-30.0, -3.0)
EDGE_SILENCE_S = (0.3, 1.5)
# Uncompressed files above this byte rate (every WAV but the 8 kHz ones) get the short
# end of the range, so the 44.1 kHz stereo and 24-bit WAVs fit the size budget.
HEAVY_BYTES_PER_S = 30_000
HEAVY_EDGE_SILENCE_S = (0.3, 0.5)
# libsndfile sets Vorbis quality to 1 - level (its default is quality 0.4); speech stays
# clear at quality 0.2 and the files shrink by about a sixth.
VORBIS_COMPRESSION_LEVEL = 0.8
SPEECH_S = (2.0, 6.0)
# Background noise sits this far below the clip's peak; a 48-58 dB gap keeps the
# estimated SNR well above any sensible quality threshold.
NOISE_BELOW_PEAK_DB = (48.0, 58.0)
# Every CLEAN_EVERY-th clip keeps digitally silent edges, so most files carry noise.
CLEAN_EVERY = 8

LONG_PAUSE_S = (0.3, 2.0)
LONG_DURATION_S = (80.0, 100.0)


@dataclass(frozen=True)
class Voice:
    """espeak-ng settings that make one speaker sound unlike the others."""

    voice: str
    pitch: int
    speed_wpm: int


@dataclass(frozen=True)
class Encoding:
    """How a clip is stored on disk."""

    extension: str
    subtype: str
    sample_rate: int
    channels: int

    def edge_silence_s(self) -> tuple[float, float]:
        """Range of the leading and trailing silence for a clip stored this way."""
        if self.extension != "wav":
            return EDGE_SILENCE_S
        bits = 24 if self.subtype == "PCM_24" else 16
        byte_rate = self.sample_rate * self.channels * bits // 8
        return HEAVY_EDGE_SILENCE_S if byte_rate > HEAVY_BYTES_PER_S else EDGE_SILENCE_S


@dataclass(frozen=True)
class Line:
    """One recording: what is said and how it reaches the dump.

    ``text`` is the transcript as a volunteer typed it. ``spoken`` is given to espeak-ng
    instead where espeak-ng's own reading of ``text`` differs from the usual English
    verbalisation (it reads "$5.20" as "dollar five point two zero"), so the audio says
    what a normaliser should produce. ``transcript`` is one of "none", "sidecar",
    "metadata" or "conflict" (a sidecar and a metadata row that disagree).
    """

    text: str
    encoding: Encoding
    transcript: str = "none"
    spoken: str = ""
    conflicting_text: str = ""


W16_08 = Encoding("wav", "PCM_16", 8000, 1)
W16_16 = Encoding("wav", "PCM_16", 16000, 1)
W16_22 = Encoding("wav", "PCM_16", 22050, 1)
W24_22 = Encoding("wav", "PCM_24", 22050, 1)
W24_16 = Encoding("wav", "PCM_24", 16000, 1)
W16_44S = Encoding("wav", "PCM_16", 44100, 2)
F16_22 = Encoding("flac", "PCM_16", 22050, 1)
F16_48 = Encoding("flac", "PCM_16", 48000, 1)
F16_44 = Encoding("flac", "PCM_16", 44100, 1)
F16_44S = Encoding("flac", "PCM_16", 44100, 2)
O_16 = Encoding("ogg", "VORBIS", 16000, 1)
O_22 = Encoding("ogg", "VORBIS", 22050, 1)
O_48 = Encoding("ogg", "VORBIS", 48000, 1)
O_44S = Encoding("ogg", "VORBIS", 44100, 2)

VOICES: dict[str, Voice] = {
    "heron": Voice("en-us+m3", 38, 150),
    "otter": Voice("en+f2", 50, 160),
    "sedge": Voice("en-gb-scotland+m1", 45, 140),
    "alder": Voice("en-029+f4", 70, 150),
    "plover": Voice("en-gb-x-rp+m5", 30, 170),
    "wren": Voice("en-us+f5", 80, 145),
}

LINES: dict[str, list[Line]] = {
    "heron": [
        Line(
            "The old ferry stopped running in 1998.",
            W16_22,
            "sidecar",
            spoken="The old ferry stopped running in nineteen ninety-eight.",
        ),
        Line("We waited for the Dr. at the slipway most winter mornings.", F16_48, "sidecar"),
        Line("The crossing took about 3 minutes on a calm day.", W16_16, "metadata"),
        Line(
            "My first boat had a blue hull, a leaking bow, and an engine that coughed "
            "all the way across.",
            O_22,
        ),
        Line("In fog we rang the bell every half minute.", F16_22),
        Line("The tide tables hung on a nail by the door.", W16_08),
        Line("Cattle crossed on a flat barge in the spring.", O_48),
        Line("Nobody ever paid the fare on a Sunday.", W16_44S),
    ],
    "otter": [
        Line("We mended 3 nets before the tide turned.", W24_16, "metadata"),
        Line(
            "The chapel on Anchor St. had a tin roof.",
            F16_22,
            "sidecar",
            spoken="The chapel on Anchor Street had a tin roof.",
        ),
        Line("The net loft smelled of tar and wet rope.", O_16, "metadata"),
        Line("My hands were always cut from the twine.", W16_08),
        Line("We sang while we worked, mostly old hymns.", O_48),
        Line(
            "The loft floor was swept twice a day, once at dawn and once when the boats came in.",
            O_22,
        ),
        Line("Herring came in silver heaps on the quay.", W16_16),
        Line("My aunt could tie a knot faster than anyone in the village.", O_44S),
    ],
    "sedge": [
        Line("About 40% of the reed beds flooded that winter.", W16_22, "sidecar"),
        Line("We cut the reeds with a short curved blade.", F16_44, "metadata"),
        Line(
            "The marsh path floods every spring.",
            W16_16,
            "conflict",
            conflicting_text="The marsh path floods every autumn.",
        ),
        Line("Bundles were stacked in sixes to dry.", O_16),
        Line(
            "Thatch from this marsh lasted forty years or more, if the roof was pitched "
            "steep enough.",
            W16_08,
        ),
        Line("The geese came back each year in the same week.", O_48),
        Line("We burned the stubble when the wind was right.", F16_48),
        Line("Eels hid under the cut reeds in the ditches.", O_44S),
    ],
    "alder": [
        Line(
            "A loaf and a jar of honey cost $5.20 back then.",
            F16_48,
            "sidecar",
            spoken="A loaf and a jar of honey cost five dollars twenty back then.",
        ),
        Line("The TFC ran two boats a day in summer.", W24_22, "metadata"),
        Line("School dinners were cooked in the village hall.", W16_08, "sidecar"),
        Line(
            "We made soup in a pot as big as a barrel, and there was never a drop left over.", O_22
        ),
        Line("The children queued in two long lines.", O_22),
        Line("Friday was always fish, whatever the weather.", F16_22),
        Line("The hall stove was lit at six every morning.", O_16),
        Line("We washed the plates in rainwater from the roof.", O_44S),
    ],
    "plover": [
        Line("My father kept the lamp on the 3rd floor of the tower.", F16_44S, "metadata"),
        Line("You could walk to Quillabrack at low water.", W16_22, "sidecar"),
        Line("The lens was cleaned every evening before dusk.", O_22, "metadata"),
        Line("Storm nights were long and loud out there.", W16_44S),
        Line("At night we counted the passing ships by their lights alone.", W16_08),
        Line("Gulls nested on the gallery rail every summer without fail.", O_16),
        Line("The keeper's log was written in green ink, one page for every night.", O_48),
        Line("Supplies came out by boat once a fortnight.", F16_22),
    ],
    "wren": [
        Line("The bakery opened at 10:30 on market days.", W24_16, "sidecar"),
        Line("We baked 12 dozen rolls for the summer fair.", F16_22, "metadata"),
        Line("The oven took an hour to heat through.", W16_08),
        Line("Flour came in sacks from the mill upriver, carried up the lane on a handcart.", O_16),
        Line("I burned my first loaf and cried all afternoon.", W16_08),
        Line("Saffron buns sold out before noon.", O_16),
        Line("The shop bell had a crack in it.", O_22),
        Line("My grandmother wrote every recipe on a card.", W16_16),
    ],
}

# One long, untranscribed walk through the marsh, to be cut into segments by Loam.
LONG_SPEAKER = "sedge"
LONG_STEM = "sedge_marsh_walk"
LONG_ENCODING = O_16
LONG_PEAK_DBFS = -9.0
LONG_SENTENCES = [
    "We're starting at the sluice gate by the old pump house.",
    "This is where the reed cutting began each December.",
    "The water here is brackish, half river and half sea.",
    "My uncle kept a punt tied to that post.",
    "You can still see the cut marks on the bank.",
    "Listen, that's a bittern booming out on the far side.",
    "In a hard frost we walked straight across the ice.",
    "Now it's mostly willow scrub and brambles.",
    "Over there was the drying ground for the bundles.",
    "We loaded the carts by hand, twenty bundles at a time.",
    "The horses knew the way home better than we did.",
    "Mind the boards here, they get slippery after rain.",
    "Every autumn the starlings come in great clouds.",
    "They settle in the reeds just before dark.",
    "Further on is the decoy pond, long since silted up.",
    "The sea wall was raised after the big flood.",
    "Before that the whole marsh went under most winters.",
    "We lost the barn and two of the boats one year.",
    "This stretch is where I saw my first seal.",
    "The bridge ahead was built by volunteers from the hall.",
    "From the top you can see the lighthouse and the ferry stage.",
    "Let's turn back before the tide comes over the path.",
]

# A second language: the resident filed as "egret" grew up on the East African coast and
# chose to speak Swahili. Transcripts are in the spreadsheet, whose "language" column
# marks them "sw" (the other rows leave it empty: the config's text.language, English).
# The clips have their own seed and levels, so adding them changed no other file.
SECOND_LANGUAGE = "sw"
SECOND_SPEAKER = "egret"
SECOND_VOICE = Voice("sw+m3", 42, 140)
SECOND_LINES = [
    (Line("Nina ng'ombe 12 shambani.", W16_16, "metadata"), -11.0),
    (Line("Nyumba yetu iko karibu na bahari.", F16_22, "metadata"), -16.0),
    (Line("Asubuhi tunakunywa chai ya moto.", O_22, "metadata"), -8.0),
]

# Deliberate faults; the README explains what Loam should do with each.
ZERO_BYTE = "plover/plover_09.wav"
TEXT_AS_WAV = "alder/alder_tape_label.wav"
TEXT_AS_WAV_CONTENT = "Tape label: kitchen recordings, side B. Do not record over.\n"
TRUNCATED = "wren/wren_09.wav"
TRUNCATED_FROM = "wren/wren_03.wav"
TRUNCATED_BYTES = 20
DUPLICATE = "wren/wren_10.flac"
DUPLICATE_OF = "heron/heron_05.flac"
MISSING_ROW = ("otter/otter_09.wav", "otter", "The boathouse doors were painted red.")
OUTSIDE_ROW = ("../outside.wav", "heron", "The ferry bell hangs in the hall now.")
METADATA = "metadata.csv"


def db_to_amplitude(level_db: float) -> float:
    return float(10.0 ** (level_db / 20.0))


def synthesise(*, text: str, voice: Voice) -> np.ndarray:
    """Speak ``text`` with espeak-ng and return its samples without edge silence.

    espeak-ng's own leading and trailing silence is cut off so the edge silence the
    caller adds is exactly the length it asks for.

    Parameters
    ----------
    text : str
        What to say, passed as one argument (never through a shell).
    voice : Voice
        espeak-ng voice, pitch and speed.

    Returns
    -------
    np.ndarray
        Mono float64 samples at ``ESPEAK_RATE``.

    Example
    -------
    >>> speech = synthesise(text="Low water.", voice=VOICES["wren"])
    """
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "speech.wav"
        subprocess.run(
            [
                "espeak-ng",
                "-v",
                voice.voice,
                "-p",
                str(voice.pitch),
                "-s",
                str(voice.speed_wpm),
                "-w",
                str(out),
                "--",
                text,
            ],
            check=True,
        )
        samples, rate = sf.read(out, dtype="float64", always_2d=False)
    if rate != ESPEAK_RATE:
        raise RuntimeError(f"espeak-ng wrote {rate} Hz, expected {ESPEAK_RATE} Hz")
    voiced = np.flatnonzero(np.abs(samples) > 1e-4)
    return samples[voiced[0] : voiced[-1] + 1]


def place_speech(
    speech: np.ndarray,
    *,
    sample_rate: int,
    channels: int,
    peak_dbfs: float,
    lead_s: float,
    trail_s: float,
    noise_dbfs: float | None,
    rng: np.random.Generator,
) -> np.ndarray:
    """Resample, set the peak, pad with silence and add background noise.

    Parameters
    ----------
    speech : np.ndarray
        Mono samples at ``ESPEAK_RATE``.
    sample_rate : int
        Rate of the result in Hz.
    channels : int
        1 or 2. The second channel is the first 1.5 dB quieter with its own noise, like
        a stereo recorder with one capsule slightly off-axis.
    peak_dbfs : float
        Sample peak of the speech in dB relative to full scale.
    lead_s, trail_s : float
        Silence before and after the speech in seconds.
    noise_dbfs : float or None
        RMS of white background noise over the whole clip; None keeps the edges
        digitally silent.
    rng : np.random.Generator
        Source of the noise.

    Returns
    -------
    np.ndarray
        Shape (frames,) for mono or (frames, 2); every sample is inside (-1, 1).

    Example
    -------
    >>> clip = place_speech(speech, sample_rate=8000, channels=1, peak_dbfs=-12.0,
    ...                     lead_s=0.5, trail_s=0.8, noise_dbfs=-66.0, rng=rng)
    """
    voiced = soxr.resample(speech, ESPEAK_RATE, sample_rate, quality="VHQ")
    voiced *= db_to_amplitude(peak_dbfs) / np.max(np.abs(voiced))
    lead = round(lead_s * sample_rate)
    trail = round(trail_s * sample_rate)
    mono = np.concatenate([np.zeros(lead), voiced, np.zeros(trail)])
    gains = [1.0, db_to_amplitude(-1.5)][:channels]
    columns = []
    for gain in gains:
        column = mono * gain
        if noise_dbfs is not None:
            column = column + rng.normal(0.0, db_to_amplitude(noise_dbfs), size=mono.size)
        columns.append(column)
    out = columns[0] if channels == 1 else np.stack(columns, axis=1)
    if np.max(np.abs(out)) >= 1.0:
        raise RuntimeError(f"clip would clip at peak_dbfs={peak_dbfs}")
    return out


def _ogg_crc_table() -> list[int]:
    table = []
    for byte in range(256):
        crc = byte << 24
        for _ in range(8):
            crc = ((crc << 1) ^ 0x04C11DB7) if crc & 0x80000000 else crc << 1
        table.append(crc & 0xFFFFFFFF)
    return table


OGG_CRC_TABLE = _ogg_crc_table()


def set_ogg_serial(data: bytes, *, serial: int) -> bytes:
    """Rewrite the stream serial number of every Ogg page and fix the page checksums.

    libsndfile picks a random serial for each Ogg stream, so two runs would write
    different bytes; a fixed serial makes the generator byte-for-byte repeatable. The
    page layout and CRC (polynomial 0x04C11DB7, no reflection, zero start) are from the
    Ogg framing specification (RFC 3533); written here because no installed library
    lets the caller choose the serial.

    Parameters
    ----------
    data : bytes
        A complete single-stream Ogg file.
    serial : int
        New serial number, 0 to 2**32 - 1.

    Returns
    -------
    bytes
        The same pages with the new serial and recomputed checksums.

    Example
    -------
    >>> fixed = set_ogg_serial(Path("clip.ogg").read_bytes(), serial=7)
    """
    out = bytearray()
    pos = 0
    while pos < len(data):
        if data[pos : pos + 4] != b"OggS":
            raise ValueError(f"no Ogg page at byte {pos}")
        segments = data[pos + 26]
        body = sum(data[pos + 27 : pos + 27 + segments])
        page = bytearray(data[pos : pos + 27 + segments + body])
        page[14:18] = serial.to_bytes(4, "little")
        page[22:26] = bytes(4)
        crc = 0
        for byte in page:
            crc = ((crc << 8) & 0xFFFFFFFF) ^ OGG_CRC_TABLE[(crc >> 24) ^ byte]
        page[22:26] = crc.to_bytes(4, "little")
        out += page
        pos += len(page)
    return bytes(out)


def write_audio(path: Path, samples: np.ndarray, *, encoding: Encoding) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    if encoding.extension != "ogg":
        sf.write(path, samples, encoding.sample_rate, subtype=encoding.subtype)
        return
    buffer = io.BytesIO()
    sf.write(
        buffer,
        samples,
        encoding.sample_rate,
        format="OGG",
        subtype=encoding.subtype,
        compression_level=VORBIS_COMPRESSION_LEVEL,
    )
    serial = zlib.crc32(path.relative_to(ROOT).as_posix().encode())
    path.write_bytes(set_ogg_serial(buffer.getvalue(), serial=serial))


def clip_path(speaker: str, index: int, encoding: Encoding) -> str:
    return f"{speaker}/{speaker}_{index + 1:02d}.{encoding.extension}"


def planned_paths() -> list[str]:
    """Every file the generator writes, relative to the corpus root."""
    paths: list[str] = []
    for speaker, lines in LINES.items():
        for index, line in enumerate(lines):
            audio = clip_path(speaker, index, line.encoding)
            paths.append(audio)
            if line.transcript in ("sidecar", "conflict"):
                paths.append(Path(audio).with_suffix(".txt").as_posix())
    paths.append(f"{LONG_SPEAKER}/{LONG_STEM}.{LONG_ENCODING.extension}")
    paths += [f"{READ_SPEAKER}/{READ_STEM}.{READ_ENCODING.extension}", f"{READ_SPEAKER}/{READ_STEM}.txt"]
    paths += [clip_path(SECOND_SPEAKER, i, line.encoding) for i, (line, _) in enumerate(SECOND_LINES)]
    paths += [ZERO_BYTE, TEXT_AS_WAV, TRUNCATED, DUPLICATE, METADATA]
    return paths


def make_clips(rng_root: np.random.SeedSequence) -> list[list[str]]:
    """Write every normal clip and its sidecar; return the metadata rows."""
    clips = [
        (speaker, index, line)
        for speaker, lines in LINES.items()
        for index, line in enumerate(lines)
    ]
    # Spread peaks evenly over the whole range, then shuffle which clip gets which.
    peaks = np.linspace(*PEAK_RANGE_DBFS, num=len(clips))
    peak_seed, *clip_seeds = rng_root.spawn(len(clips) + 1)
    np.random.default_rng(peak_seed).shuffle(peaks)
    rows: list[list[str]] = []
    for number, ((speaker, index, line), peak, seed) in enumerate(
        zip(clips, peaks, clip_seeds, strict=True)
    ):
        rng = np.random.default_rng(seed)
        speech = synthesise(text=line.spoken or line.text, voice=VOICES[speaker])
        speech_s = speech.size / ESPEAK_RATE
        if not SPEECH_S[0] <= speech_s <= SPEECH_S[1]:
            raise RuntimeError(f"{speaker} line {index + 1}: {speech_s:.2f} s of speech")
        lead_s, trail_s = rng.uniform(*line.encoding.edge_silence_s(), size=2)
        clean = number % CLEAN_EVERY == CLEAN_EVERY - 1
        noise_dbfs = None if clean else float(peak) - rng.uniform(*NOISE_BELOW_PEAK_DB)
        samples = place_speech(
            speech,
            sample_rate=line.encoding.sample_rate,
            channels=line.encoding.channels,
            peak_dbfs=float(peak),
            lead_s=lead_s,
            trail_s=trail_s,
            noise_dbfs=noise_dbfs,
            rng=rng,
        )
        relative = clip_path(speaker, index, line.encoding)
        write_audio(ROOT / relative, samples, encoding=line.encoding)
        if line.transcript in ("sidecar", "conflict"):
            (ROOT / relative).with_suffix(".txt").write_text(line.text + "\n", encoding="utf-8")
        if line.transcript == "metadata":
            rows.append([relative, speaker, line.text])
        if line.transcript == "conflict":
            rows.append([relative, speaker, line.conflicting_text])
    return rows


def make_second_language(seed: np.random.SeedSequence) -> list[list[str]]:
    """Write the Swahili clips; return their metadata rows (with the language cell)."""
    rows = []
    for index, ((line, peak), clip_seed) in enumerate(zip(SECOND_LINES, seed.spawn(len(SECOND_LINES)), strict=True)):
        rng = np.random.default_rng(clip_seed)
        speech = synthesise(text=line.text, voice=SECOND_VOICE)
        if not SPEECH_S[0] <= speech.size / ESPEAK_RATE <= SPEECH_S[1]:
            raise RuntimeError(f"{SECOND_SPEAKER} line {index + 1}: {speech.size / ESPEAK_RATE:.2f} s of speech")
        lead_s, trail_s = rng.uniform(*line.encoding.edge_silence_s(), size=2)
        samples = place_speech(speech, sample_rate=line.encoding.sample_rate, channels=line.encoding.channels,
                               peak_dbfs=peak, lead_s=lead_s, trail_s=trail_s,
                               noise_dbfs=peak - rng.uniform(*NOISE_BELOW_PEAK_DB), rng=rng)
        relative = clip_path(SECOND_SPEAKER, index, line.encoding)
        (ROOT / relative).parent.mkdir(exist_ok=True)
        write_audio(ROOT / relative, samples, encoding=line.encoding)
        rows.append([relative, SECOND_SPEAKER, line.text, SECOND_LANGUAGE])
    return rows


def make_long_recording(rng: np.random.Generator) -> None:
    """Concatenate many sentences with natural pauses into one long recording."""
    rate = LONG_ENCODING.sample_rate
    voice = VOICES[LONG_SPEAKER]
    parts = [np.zeros(round(rng.uniform(*EDGE_SILENCE_S) * rate))]
    for number, sentence in enumerate(LONG_SENTENCES):
        if number:
            parts.append(np.zeros(round(rng.uniform(*LONG_PAUSE_S) * rate)))
        speech = soxr.resample(
            synthesise(text=sentence, voice=voice), ESPEAK_RATE, rate, quality="VHQ"
        )
        # A walking speaker turns away and back: vary each sentence's level a little.
        parts.append(speech / np.max(np.abs(speech)) * db_to_amplitude(rng.uniform(-4.0, 0.0)))
    parts.append(np.zeros(round(rng.uniform(*EDGE_SILENCE_S) * rate)))
    mono = np.concatenate(parts) * db_to_amplitude(LONG_PEAK_DBFS)
    mono += rng.normal(0.0, db_to_amplitude(LONG_PEAK_DBFS - 50.0), size=mono.size)
    duration_s = mono.size / rate
    if not LONG_DURATION_S[0] <= duration_s <= LONG_DURATION_S[1]:
        raise RuntimeError(f"long recording is {duration_s:.1f} s")
    write_audio(
        ROOT / f"{LONG_SPEAKER}/{LONG_STEM}.{LONG_ENCODING.extension}", mono, encoding=LONG_ENCODING
    )


# A read passage with its whole text in a sidecar: the ferry house log, read aloud by
# heron. Longer than audio.max_clip_s, so `make` aligns the text to it and cuts
# it into transcribed clips (README, Long transcribed recordings).
READ_SPEAKER = "heron"
READ_STEM = "heron_storm_log"
READ_ENCODING = O_16
READ_PEAK_DBFS = -6.0
READ_PAUSE_S = (0.3, 1.2)
READ_DURATION_S = (55.0, 90.0)
READ_TEXT = """The ferry house log for the winter of the great storm.
On the first night the wind came round to the north east. We lit the lamp an hour early.
By midnight the spray was reaching the gallery windows. The glass held, but the door
to the oil store blew open twice.
In the morning the causeway was under water. Nobody could reach us from the village.
We had bread for four days and coal for a week. My brother counted the tins twice.
On the third day a fishing boat came close under the rocks. We waved the red flag
and they waved back.
The storm eased on the fifth morning. The harbour master rowed out with letters and eggs.
He said the ferry had broken loose and drifted as far as the salt flats.
Half the nets in the lofts were ruined, and the chapel roof had lost its slates.
We cleaned the lamp and wound the clock, and wrote down every ship we had seen.
There were only two, both far out, and neither of them stopped.
"""


def make_read_passage(rng: np.random.Generator) -> None:
    """Speak READ_TEXT sentence by sentence with pauses; write it and its whole-text sidecar."""
    rate = READ_ENCODING.sample_rate
    voice = VOICES[READ_SPEAKER]
    sentences = [s.strip() + "." for s in " ".join(READ_TEXT.split()).split(".") if s.strip()]
    parts = [np.zeros(round(rng.uniform(*EDGE_SILENCE_S) * rate))]
    for number, sentence in enumerate(sentences):
        if number:
            parts.append(np.zeros(round(rng.uniform(*READ_PAUSE_S) * rate)))
        speech = soxr.resample(synthesise(text=sentence, voice=voice), ESPEAK_RATE, rate, quality="VHQ")
        parts.append(speech / np.max(np.abs(speech)))
    parts.append(np.zeros(round(rng.uniform(*EDGE_SILENCE_S) * rate)))
    mono = np.concatenate(parts) * db_to_amplitude(READ_PEAK_DBFS)
    mono += rng.normal(0.0, db_to_amplitude(READ_PEAK_DBFS - 50.0), size=mono.size)
    if not READ_DURATION_S[0] <= mono.size / rate <= READ_DURATION_S[1]:
        raise RuntimeError(f"read passage is {mono.size / rate:.1f} s")
    audio = ROOT / f"{READ_SPEAKER}/{READ_STEM}.{READ_ENCODING.extension}"
    write_audio(audio, mono, encoding=READ_ENCODING)
    audio.with_suffix(".txt").write_text(READ_TEXT, encoding="utf-8")


def make_faults(rows: list[list[str]]) -> None:
    """Write the broken files and the faulty metadata rows."""
    (ROOT / ZERO_BYTE).write_bytes(b"")
    (ROOT / TEXT_AS_WAV).write_text(TEXT_AS_WAV_CONTENT, encoding="utf-8")
    (ROOT / TRUNCATED).write_bytes((ROOT / TRUNCATED_FROM).read_bytes()[:TRUNCATED_BYTES])
    (ROOT / DUPLICATE).write_bytes((ROOT / DUPLICATE_OF).read_bytes())
    rows.append(list(MISSING_ROW))
    rows.append(list(OUTSIDE_ROW))


def write_metadata(rows: list[list[str]]) -> None:
    with open(ROOT / METADATA, "w", encoding="utf-8", newline="") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(["path", "speaker", "transcript", "language"])
        writer.writerows(row + [""] * (4 - len(row)) for row in rows)


def generate() -> None:
    for relative in planned_paths():
        (ROOT / relative).unlink(missing_ok=True)
    seeds = np.random.SeedSequence(SEED)
    clip_seed, long_seed = seeds.spawn(2)
    rows = make_clips(clip_seed)
    make_long_recording(np.random.default_rng(long_seed))
    make_read_passage(np.random.default_rng(np.random.SeedSequence([SEED, 3])))
    make_faults(rows)
    # Appended after every other row, so the English rows keep their line numbers.
    rows += make_second_language(np.random.SeedSequence([SEED, 2]))
    write_metadata(rows)


def transcript_sources() -> dict[str, str]:
    sources: dict[str, str] = {}
    for speaker, lines in LINES.items():
        for index, line in enumerate(lines):
            sources[clip_path(speaker, index, line.encoding)] = line.transcript
    for index, (line, _) in enumerate(SECOND_LINES):
        sources[clip_path(SECOND_SPEAKER, index, line.encoding)] = f"{line.transcript} ({SECOND_LANGUAGE})"
    return sources


def print_table() -> int:
    """Print one line per audio file and the corpus size; return the size in bytes."""
    sources = transcript_sources()
    header = (
        f"{'path':30} {'format':6} {'subtype':8} {'rate':>6} {'ch':>2} {'dur_s':>6} "
        f"{'peak_dbfs':>9}  transcript"
    )
    print(header)
    print("-" * len(header))
    audio = sorted(p for p in ROOT.rglob("*") if p.suffix in (".wav", ".flac", ".ogg"))
    for path in audio:
        relative = path.relative_to(ROOT).as_posix()
        try:
            samples, rate = sf.read(path, dtype="float64", always_2d=True)
            info = sf.info(path)
        except sf.LibsndfileError as exc:
            print(f"{relative:30} unreadable ({path.stat().st_size} bytes): {exc}")
            continue
        peak = np.max(np.abs(samples))
        peak_db = 20 * np.log10(peak) if peak > 0 else float("-inf")
        print(
            f"{relative:30} {info.format:6} {info.subtype:8} {rate:6d} {info.channels:2d} "
            f"{info.duration:6.2f} {peak_db:9.1f}  {sources.get(relative, '-')}"
        )
    total = sum(p.stat().st_size for p in ROOT.rglob("*") if p.is_file())
    print(
        f"\n{len(audio)} audio-named files, {total:,} bytes in files (limit {SIZE_LIMIT_BYTES:,})"
    )
    return total


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="print the table only")
    args = parser.parse_args(argv)
    if not args.check:
        generate()
    return 0 if print_table() <= SIZE_LIMIT_BYTES else 1


if __name__ == "__main__":
    sys.exit(main())
