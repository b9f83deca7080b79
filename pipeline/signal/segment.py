"""Cutting a long untranscribed recording into clips at its pauses.

Works on the smoothed voice-activity decisions (one per frame) and frame energies
from ``pipeline.signal.vad``; no audio is touched, so the plan for an hour of sound is a
few milliseconds of array work. The audio stage then reads each planned span back
from its spool.

Rule: a span longer than ``segment_max_s`` is cut in its longest pause whose cut
leaves both sides at least ``segment_min_s`` long; the pause itself is dropped
except for ``pad_ms`` of it on each side. Both sides are split again the same way.
When no pause qualifies, the cut goes at the quietest frame in the upper half of
``[segment_min_s, segment_max_s]`` from the span's start, so segments stay as long
as allowed; the two sides of such a forced cut are trimmed to their speech again.
A segment can therefore come out shorter than ``segment_min_s`` only where silence
was trimmed off it (the stage's ``min_duration_s`` gate then decides).
"""

from __future__ import annotations

import numpy as np

from pipeline.core.errors import ParameterError
from pipeline.signal.vad import ms_to_frames, runs, trim_frames


def segment_id(source_id: str, *, start_ms: int) -> str:
    """Clip id of a segment: the source id and its start in the source, in ms.

    Example
    -------
    >>> segment_id("harbour-talk-0a1b2c3d4e", start_ms=61250)
    'harbour-talk-0a1b2c3d4e_00061250'
    """
    if start_ms < 0:
        raise ParameterError(f"start_ms={start_ms} must be >= 0")
    return f"{source_id}_{start_ms:08d}"


def _pause_cut(speech: np.ndarray, start: int, stop: int, *, min_frames: int,
               pad_frames: int) -> tuple[int, int] | None:
    """(end of left side, start of right side) for the best pause inside [start, stop)."""
    best: tuple[int, int, int] | None = None  # (length, left_end, right_start)
    for p0, p1 in runs(~speech[start:stop]) + start:
        if p0 == start or p1 == stop:
            continue  # edge silence is not a pause between two parts
        length = int(p1 - p0)
        if length >= 2 * pad_frames:
            left_end, right_start = int(p0) + pad_frames, int(p1) - pad_frames
        else:
            left_end = right_start = int(p0) + length // 2
        if left_end - start < min_frames or stop - right_start < min_frames:
            continue
        if best is None or length > best[0]:  # ties keep the earliest pause
            best = (length, left_end, right_start)
    return None if best is None else (best[1], best[2])


def _quiet_cut(energy_db: np.ndarray, start: int, stop: int, *, min_frames: int,
               max_frames: int) -> int:
    """Frame to cut at when no pause qualifies: the quietest one near the longest length."""
    hi = min(start + max_frames, stop - min_frames)
    lo = max(start + min_frames, start + (min_frames + max_frames + 1) // 2)
    if hi < start + min_frames:
        return start + max_frames  # no cut can honour both bounds; keep the left side legal
    lo = min(lo, hi)
    window = energy_db[lo:hi + 1]
    # Reversed argmin: among equally quiet frames take the latest, the longest segment.
    return hi - int(np.argmin(window[::-1]))


def split_frames(speech: np.ndarray, energy_db: np.ndarray, *, frame_ms: int, segment_min_s: float,
                 segment_max_s: float, pad_ms: int, start: int = 0,
                 stop: int | None = None) -> list[tuple[int, int]]:
    """Frame spans of the segments of ``[start, stop)``, in order.

    The span is first trimmed to its speech (plus ``pad_ms``); spans no longer than
    ``segment_max_s`` are kept whole.

    Parameters
    ----------
    speech : smoothed decisions, one bool per frame.
    energy_db : frame energies (same length), used only when no pause qualifies.
    frame_ms : frame length in ms.
    segment_min_s, segment_max_s : bounds on a segment's length.
    pad_ms : silence kept on each side of a cut pause.
    start, stop : the frame range to split (default: everything).

    Returns
    -------
    Non-overlapping ``(first_frame, stop_frame)`` pairs, sorted; empty when there is
    no speech.

    Example
    -------
    >>> speech = np.array([1] * 50 + [0] * 10 + [1] * 30 + [0] * 3 + [1] * 40, dtype=bool)
    >>> split_frames(speech, np.zeros(len(speech)), frame_ms=100, segment_min_s=2,
    ...              segment_max_s=6, pad_ms=200)
    [(0, 52), (58, 91), (91, 133)]
    """
    speech = np.asarray(speech, dtype=bool)
    energy_db = np.asarray(energy_db, dtype=np.float64)
    if energy_db.shape != speech.shape:
        raise ParameterError(f"energy_db has shape {energy_db.shape}; expected {speech.shape} like speech")
    if not 0 < segment_min_s < segment_max_s:
        raise ParameterError(
            f"segment_min_s={segment_min_s}, segment_max_s={segment_max_s}: need 0 < min < max")
    min_frames = ms_to_frames(segment_min_s * 1000, frame_ms=frame_ms)
    max_frames = int(segment_max_s * 1000 // frame_ms)
    if max_frames < 1:
        raise ParameterError(f"segment_max_s={segment_max_s} is shorter than one {frame_ms} ms frame")
    pad_frames = ms_to_frames(pad_ms, frame_ms=frame_ms)
    first = trim_frames(speech, pad_frames=pad_frames, start=start, stop=stop)
    if first is None:
        return []
    done: list[tuple[int, int]] = []
    todo = [first]
    while todo:
        a, b = todo.pop()
        if b - a <= max_frames:
            done.append((a, b))
            continue
        cut = _pause_cut(speech, a, b, min_frames=min_frames, pad_frames=pad_frames)
        if cut is not None:
            # Both sides end in speech plus at most the pad: already trimmed.
            todo.extend([(a, cut[0]), (cut[1], b)])
            continue
        at = _quiet_cut(energy_db, a, b, min_frames=min_frames, max_frames=max_frames)
        # A side of a forced cut may hold only padding or a silent stretch: trim it.
        for side in ((a, at), (at, b)):
            trimmed = trim_frames(speech, pad_frames=pad_frames, start=side[0], stop=side[1])
            if trimmed is not None:
                todo.append(trimmed)
    return sorted(done)
