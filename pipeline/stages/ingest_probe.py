"""What ingest learns of one audio file by itself: header facts and content hash, or why
the file cannot be used (``probe_file``), and the table its results are cached in.

A probe depends on the file's bytes, this module's code and the audio library, nothing
else: the probe cache (``OUT/cache/ingest/probes.parquet``) is scoped by this module's
code version (:func:`pipeline.core.codeversion.code_version` of ``ingest_probe``), so an
edit to the rest of the ingest stage, which changes what ingest decides from the probes
but not the probes, keeps them (100,000 files took 26 s of two workers to probe).
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from pipeline.core.fsio import sha256_file
from pipeline.core.startup import pandas_left_unloaded

# Containers libsndfile may have been built without, by file extension.
_EXTENSION_FORMATS = {".mp3": "MP3", ".ogg": "OGG", ".flac": "FLAC", ".opus": "OGG"}

# Source sample rates taken as audio. Below 4 kHz no speech band is left (half the
# 8 kHz telephone rate of ITU-T G.711); 768 kHz is the highest rate of common audio
# converters (from memory). A damaged header outside these would make the resampler
# produce hours of samples from seconds of data, or none at all.
SOURCE_RATE_RANGE_HZ = (4000, 768000)


@dataclass(frozen=True)
class ProbeJob:
    """One file to probe: its absolute ``path``, its path relative to RAW (``rel``) and,
    for a file the probe cache knows by path, size and mtime but not by inode (a moved or
    copied RAW), the content hash cached for it (``cached_sha256``)."""

    path: str
    rel: str
    cached_sha256: str | None = None


# What probe_files gives for a file whose bytes hash to its cached_sha256.
SAME_BYTES: dict[str, Any] = {"same_bytes": True}


def probe_files(jobs: Sequence[ProbeJob]) -> list[dict[str, Any]]:
    """:func:`probe_file` for each job, in order (one task of a pool for several files),
    or :data:`SAME_BYTES` for a job whose file still holds the bytes of its
    ``cached_sha256``: the probe is a function of the bytes, so the cached result stands
    for it, and only the hash was paid (under a fifth of a short file's probe).

    Examples
    --------
    >>> import hashlib, tempfile
    >>> with tempfile.NamedTemporaryFile(suffix=".wav") as fh:
    ...     empty = ProbeJob(fh.name, "a.wav", cached_sha256=hashlib.sha256(b"").hexdigest())
    ...     probe_files([empty, ProbeJob(fh.name, "a.wav")])
    [{'same_bytes': True}, {'error': ('empty', 'a.wav: the file is empty (0 bytes); expected audio data')}]
    """
    results = []
    for job in jobs:
        if job.cached_sha256 is not None and _hash_or_none(job.path) == job.cached_sha256:
            results.append(SAME_BYTES)
        else:
            results.append(probe_file(job))
    return results


def _hash_or_none(path: str) -> str | None:
    try:
        return sha256_file(path)
    except OSError:
        return None  # the probe that follows words it


# The formats the loaded libsndfile reads, with the function that listed them: asking
# costs 37 us per call, a tenth of a short file's probe, and the answer cannot change
# within a process unless the function is replaced (a test does that).
_FORMATS: tuple[Any, dict[str, str]] | None = None


def readable_formats() -> dict[str, str]:
    """``soundfile.available_formats()``, asked once per process.

    Examples
    --------
    >>> "WAV" in readable_formats()
    True
    """
    import soundfile as sf

    global _FORMATS
    if _FORMATS is None or _FORMATS[0] is not sf.available_formats:
        _FORMATS = (sf.available_formats, sf.available_formats())
    return _FORMATS[1]


def probe_file(job: ProbeJob) -> dict[str, Any]:
    """Header facts and content hash of one file, or ``{"error": (reason, sentence)}``."""
    import soundfile as sf

    try:
        size = os.path.getsize(job.path)
    except OSError as exc:
        return {"error": ("unreadable", f"{job.rel}: cannot read the file ({exc.strerror})")}
    if size == 0:
        return {"error": ("empty", f"{job.rel}: the file is empty (0 bytes); expected audio data")}
    container = _EXTENSION_FORMATS.get(os.path.splitext(job.rel)[1].lower())
    if container and container not in readable_formats():
        return {"error": ("unsupported_format",
                          f"{job.rel}: this libsndfile build ({sf.__libsndfile_version__}) cannot read {container}; "
                          "expected a build that can (libsndfile 1.1 or newer reads MP3)")}
    try:
        digest = sha256_file(job.path)
        info = sf.info(job.path)
    except OSError as exc:
        return {"error": ("unreadable", f"{job.rel}: cannot read the file ({exc.strerror})")}
    except (RuntimeError, sf.LibsndfileError) as exc:  # libsndfile's own errors
        message = str(exc).replace(job.path, job.rel)
        return {"error": ("undecodable", f"{job.rel}: not a decodable audio file ({message})")}
    if info.frames <= 0 or info.samplerate <= 0 or info.channels <= 0:
        return {"error": ("empty", f"{job.rel}: the audio holds no samples (frames={info.frames}); expected at least one")}
    low, high = SOURCE_RATE_RANGE_HZ
    if not low <= info.samplerate <= high:
        return {"error": ("unsupported_sample_rate",
                          f"{job.rel}: the header gives a sample rate of {info.samplerate} Hz; expected "
                          f"{low} to {high} Hz (a damaged header, or not a recording)")}
    cut = _truncation(job, info)
    if cut:
        return {"error": ("truncated", cut)}
    return {
        "format": info.format,
        "subtype": info.subtype or "unknown",
        "channels": int(info.channels),
        "sample_rate": int(info.samplerate),
        "num_frames": int(info.frames),
        "duration_s": info.frames / info.samplerate,
        "size_bytes": size,
        "sha256": digest,
    }


def _truncation(job: ProbeJob, info: Any) -> str | None:
    """A sentence when a WAV's data chunk declares more than the file holds, else None.

    Only WAV needs this here: libsndfile reads its length from the file size. Other
    containers give a length the audio stage checks against what it decodes.
    """
    if info.format not in ("WAV", "WAVEX"):
        return None
    from pipeline.signal.declared import declared_frames, wav_data_extent

    try:
        with open(job.path, "rb") as fh:
            extent = wav_data_extent(fh)
    except OSError:
        return None  # the probe above read the file; a vanished file shows up later
    if extent is None or not extent.truncated:
        return None
    declared = declared_frames(extent, subtype=info.subtype or "", channels=info.channels, frames_present=info.frames)
    if declared <= info.frames:
        return None  # less than one frame missing
    return (f"{job.rel}: the header declares {declared} frames ({extent.declared_bytes} bytes of data) but the "
            f"file holds {info.frames} ({extent.present_bytes} bytes); expected the whole recording "
            "(the file was probably cut short)")


# The probe cache's columns (pipeline.core.cache.TableCache): the file's path and stat,
# then what probe_file returned, an error as its reason and sentence.
PROBE_FIELDS = (("format", "string"), ("subtype", "string"), ("channels", "int64"), ("sample_rate", "int64"),
                ("num_frames", "int64"), ("duration_s", "float64"), ("size_bytes", "int64"), ("sha256", "string"))
STAT_FIELDS = (("path", "string"), ("st_size", "int64"), ("st_mtime_ns", "int64"), ("st_ino", "uint64"))
ERROR_FIELDS = (("error_reason", "string"), ("error_detail", "string"))

# Failures are cached too: they depend only on the bytes, like successes. Not a crash,
# which may be the library's fault (fixed by an upgrade), nor an unreadable file, which
# says something about this run's machine (a permission, a worker that does not see
# RAW): the next run must look again.
UNCACHED = ("decoder_crashed", "unreadable")


def cacheable(res: dict[str, Any]) -> bool:
    """Whether a probe result may be kept for the next run (see ``UNCACHED``)."""
    return res.get("error", ("",))[0] not in UNCACHED


def probe_schema() -> Any:
    import pyarrow as pa

    return pa.schema([(name, getattr(pa, kind)()) for name, kind in (*STAT_FIELDS, *PROBE_FIELDS, *ERROR_FIELDS)])


def probe_table(entries: list[tuple[str, tuple[Any, Any, Any], dict[str, Any]]]) -> Any:
    """The probe cache's table of ``(path, (size, mtime_ns, inode), probe result)``
    (a stat of Nones for a file that could not be stat'ed)."""
    import pyarrow as pa

    schema = probe_schema()
    columns: dict[str, list[Any]] = {f.name: [] for f in schema}
    for rel, st, res in entries:
        for name, value in zip(("path", "st_size", "st_mtime_ns", "st_ino"), (rel, *st), strict=True):
            columns[name].append(value)
        for name, _ in PROBE_FIELDS:
            columns[name].append(res.get(name))
        error = res.get("error") or (None, None)
        columns["error_reason"].append(error[0])
        columns["error_detail"].append(error[1])
    with pandas_left_unloaded():
        return pa.table([pa.array(columns[f.name], f.type) for f in schema], schema=schema)
