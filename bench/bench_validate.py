"""Benchmark of ``loam validate``: a synthetic clean OUT folder of many one-second clips,
and the time :func:`pipeline.commands.validate.validate_out` takes on it (``make bench``
runs it on 100,000 rows)."""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import numpy as np
import soundfile as sf

from pipeline import __version__
from pipeline.commands.validate import validate_out
from pipeline.core.config import build_config
from pipeline.core.errors import ParameterError
from pipeline.core.fsio import sha256_bytes, write_text_atomic
from pipeline.core.manifest import empty_table, table_from_columns, write_manifest
from pipeline.core.names import (
    HELDOUT,
    LABELLED,
    REJECTED,
    RESOLVED_CONFIG,
    SUBSETS,
    UNLABELLED,
    subset_manifest,
)

RATE = 16000
PHONES = ["DH", "AH", "K", "AE", "T"]


def _link_clips(out: Path, audio_paths: list[str]) -> None:
    """One second of a 220 Hz tone at every path of ``audio_paths`` under ``out``: hard
    links to one FLAC file (copies where links are refused)."""
    (out / "audio").mkdir(parents=True, exist_ok=True)
    template = out / "audio" / "template.flac"
    t = np.arange(RATE) / RATE
    sf.write(template, 0.1 * np.sin(2 * np.pi * 220 * t), RATE, subtype="PCM_16")
    for folder in {Path(rel).parent for rel in audio_paths}:
        (out / folder).mkdir(parents=True, exist_ok=True)
    for rel in audio_paths:
        target = out / rel
        if not target.exists():
            try:
                os.link(template, target)
            except OSError:
                target.write_bytes(template.read_bytes())
    template.unlink()


def _subset_columns(name: str, clip_ids: list[str], speaker_ids: list[str], audio_paths: list[str],
                    *, tier: str, parts: list[str | None]) -> dict[str, list[Any]]:
    """The columns of subset ``name`` for these clips: one clean second each."""
    n = len(clip_ids)
    transcribed = name != UNLABELLED
    return {
        "clip_id": clip_ids,
        "speaker": speaker_ids,
        "group": speaker_ids,
        "audio_path": audio_paths,
        "audio_sha256": [sha256_bytes(c.encode()) for c in clip_ids],
        "sample_rate": [RATE] * n,
        "num_samples": [RATE] * n,
        "duration_s": [1.0] * n,
        "source_path": [f"{sp}/{c}.wav" for sp, c in zip(speaker_ids, clip_ids, strict=True)],
        "source_start_s": [0.0] * n,
        "source_end_s": [1.0] * n,
        "loudness_lufs": [-23.0] * n,
        "loudness_in_lufs": [-30.0] * n,
        "transcript": [f"the cat {c}" if transcribed else None for c in clip_ids],
        "transcript_origin": ["sidecar" if transcribed else None for _ in clip_ids],
        "norm_text": [f"the cat {c}" if transcribed else None for c in clip_ids],
        "phones": [PHONES if transcribed else None for _ in clip_ids],
        "subset": [name] * n,
        "tiers": [[tier] if name == LABELLED else [] for _ in clip_ids],
        "speech_ratio": [0.8] * n,
        "snr_db": [30.0] * n,
        "bandwidth_hz": [7500.0] * n,
        "clipped_fraction": [0.0] * n,
        "speaking_rate": [5.0 if transcribed else None for _ in clip_ids],
        "rate_z": [0.0 if transcribed else None for _ in clip_ids],
        "near_duplicate_of": [None] * n,
        "quality_flags": [[] for _ in clip_ids],
        "scorable": [transcribed] * n,
        "part": parts,
    }


def synthetic_out(out: Path, *, n_rows: int, speakers: int = 200) -> Path:
    """A clean synthetic OUT of ``n_rows`` one-second clips for timing
    :func:`pipeline.commands.validate.validate_out`.

    Every clip's file is a hard link to one FLAC file (copies where links are refused), so
    building 100,000 clips takes seconds; ``audio_sha256`` values are distinct stand-ins, so
    only ``deep=False`` runs are meaningful on it. A tenth of the speakers are held out,
    a fifth of the rest labelled, in one tier as long as the labelled clips; held-out
    speakers of even number are in part dev, the others in test.
    """
    if n_rows < 1:
        raise ParameterError(f"n_rows={n_rows} must be >= 1")
    out = Path(out)
    ids = np.arange(n_rows)
    speaker = ids % speakers
    heldout = speaker < max(1, speakers // 10)
    labelled = ~heldout & (speaker % 5 == 0)
    subset = np.where(heldout, HELDOUT, np.where(labelled, LABELLED, UNLABELLED))
    budget_s = max(1, int(labelled.sum()))
    config = build_config({"split": {"labelled_budgets": [f"{budget_s}s"], "group_by": "speaker"}})
    write_text_atomic(out / RESOLVED_CONFIG, json.dumps(config.to_json(), indent=2, sort_keys=True) + "\n")

    clip_ids = [f"clip{i:07d}-{i:010x}" for i in ids]
    speaker_ids = [f"spk{k:04d}" for k in speaker]
    audio_paths = [f"audio/{sp}/{c}.flac" for sp, c in zip(speaker_ids, clip_ids, strict=True)]
    _link_clips(out, audio_paths)
    meta = {"version": __version__, "stage": "split", "config_sha256": config.sha256()}
    for name in SUBSETS:
        sel = np.flatnonzero(subset == name)
        parts = [("dev" if speaker[i] % 2 == 0 else "test") if name == HELDOUT else None for i in sel]
        columns = _subset_columns(name, [clip_ids[i] for i in sel], [speaker_ids[i] for i in sel],
                                  [audio_paths[i] for i in sel], tier=f"{budget_s}s", parts=parts)
        write_manifest(out / subset_manifest(name), "subset", table_from_columns("subset", columns), metadata=meta)
    write_manifest(out / REJECTED, "rejected", empty_table("rejected"), metadata=meta)
    return out


def bench_validate(n_rows: int, tmp: Path) -> dict[str, Any]:
    """Time :func:`validate_out` on a synthetic OUT of ``n_rows`` clips.

    Returns the seconds and rows per second with and without the per-file header checks,
    and the number of problems found (0 on the clean synthetic folder).

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     figures = bench_validate(50, Path(tmp))
    >>> figures["rows"], figures["problems_manifests_only"], figures["problems_with_headers"]
    (50, 0, 0)
    """
    out = synthetic_out(Path(tmp) / f"validate-{n_rows}", n_rows=n_rows)
    figures: dict[str, Any] = {"rows": n_rows}
    for label, audio_files in (("manifests_only", False), ("with_headers", True)):
        result = validate_out(out, audio_files=audio_files)
        figures[f"seconds_{label}"] = round(result.seconds, 3)
        figures[f"rows_per_second_{label}"] = round(n_rows / result.seconds) if result.seconds else None
        figures[f"problems_{label}"] = len(result.problems)
    return figures
