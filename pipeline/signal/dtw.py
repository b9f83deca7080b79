"""Dynamic time warping of a recording against a synthetic reading of its transcript,
in bounded memory, recovering from passages one side has and the other lacks.

Rows are the recording's frames, columns the synthetic frames; the path gives every
recording frame one synthetic frame. The local steps are (1, 0), (1, 1) and (1, 2): the
recording may be any amount slower than the synthetic speech (a pause, a slow reader)
and up to twice as fast. Because every step advances one row, each row's best costs
depend only on the row before, and a row is computed in one vector operation.

The synthetic reading has a run of *gap* columns (its silence) before, between and after
its sentences. Two rules let the path recover from a mismatch instead of bending every
later boundary to absorb it:

- a gap column's local cost is capped at ``garbage_cost``: a stretch of the recording
  that the transcript does not hold (an unread passage, a remark) is matched to a gap at
  that flat cost, rather than to the neighbouring sentences;
- the path may jump from the last column of any gap to the first column of any later
  gap, paying ``skip_cost``: a sentence the speaker did not read is skipped.

Memory: a full cost matrix of an hour against an hour at 20 ms frames would hold 3e10
cells. The alignment is computed coarse to fine instead (the multiscale scheme of
Salvador and Chan, "FastDTW", 2007): both sequences are averaged in pairs of frames until
the full matrix has at most ``full_cells`` cells, aligned there in full, and each finer
level is aligned only within ``radius_frames`` of the coarser path. Memory then grows
with the length of the recording times the width of the band (one byte per cell, for
the way back), not with the product of the lengths.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.core.errors import ParameterError

__all__ = ["Path", "warp"]

_INF = np.inf
_SKIP = 3  # the way-back code of a jump between gaps; 0, 1, 2 are column steps


@dataclass(frozen=True)
class Path:
    """The warping path: ``columns[i]`` is the synthetic frame of recording frame ``i``,
    ``costs[i]`` that pair's local cost (capped on gaps), ``total`` their sum with the
    skip costs paid."""

    columns: np.ndarray
    costs: np.ndarray
    total: float


def _pool(frames: np.ndarray) -> np.ndarray:
    """Frames averaged in pairs (a last odd frame kept as it is)."""
    even = len(frames) // 2 * 2
    pooled = (frames[0:even:2] + frames[1:even:2]) * np.float32(0.5)
    return np.concatenate([pooled, frames[even:]]) if even < len(frames) else pooled


def _local(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Euclidean distances from frame ``x`` to each row of ``y``, per root coefficient."""
    diff = y - x
    return np.sqrt(np.einsum("jd,jd->j", diff, diff, optimize=False) / np.float32(x.shape[0]))


@dataclass(frozen=True)
class _Gaps:
    """Gap runs as (first, last) columns at one level, and which columns are gaps."""

    first: np.ndarray
    last: np.ndarray
    mask: np.ndarray

    @classmethod
    def at(cls, runs: np.ndarray, *, shift: int, columns: int) -> _Gaps:
        first, last = runs[:, 0] >> shift, np.minimum(runs[:, 1] >> shift, columns - 1)
        mask = np.zeros(columns, dtype=bool)
        for a, b in zip(first, last, strict=True):
            mask[a:b + 1] = True
        return cls(first, last, mask)


def _band_dtw(x: np.ndarray, y: np.ndarray, lo: np.ndarray, hi: np.ndarray, gaps: _Gaps, *,
              garbage_cost: float, skip_cost: float) -> np.ndarray:
    """The best path's column per row, searching only columns ``lo[i] <= j < hi[i]``."""
    n = len(x)
    ways: list[np.ndarray] = []
    # Per row, the columns reached by a jump and where each jump came from (int32 arrays:
    # a dict entry per jump cost ten times the memory at the coarsest level).
    jumps: list[tuple[np.ndarray, np.ndarray] | None] = [None]
    prev = np.full(0, _INF)
    plo = 0
    for i in range(n):
        a, b = int(lo[i]), int(hi[i])
        cost = _local(x[i], y[a:b]).astype(np.float64)
        cost = np.where(gaps.mask[a:b], np.minimum(cost, garbage_cost), cost)
        if i == 0:
            acc = np.where(np.arange(a, b) <= gaps.last[0], cost, _INF)
            ways.append(np.zeros(b - a, dtype=np.int8))
            prev, plo = acc, a
            continue
        # prev covers columns [plo, plo + len(prev)); take columns j, j-1, j-2 for j in [a, b).
        padded = np.full(b - a + 2, _INF)
        s0, s1 = max(a - 2, plo), min(b, plo + len(prev))
        if s1 > s0:
            padded[s0 - (a - 2):s1 - (a - 2)] = prev[s0 - plo:s1 - plo]
        options = np.stack([padded[2:], padded[1:-1], padded[:-2]])
        way = np.argmin(options, axis=0).astype(np.int8)
        best = options[way, np.arange(b - a)]
        jumps.append(_jump(prev, plo, a, b, gaps, best, way, skip_cost))
        prev, plo = best + cost, a
        ways.append(way)
    return _trace(ways, jumps, lo, n)


def _jump(prev: np.ndarray, plo: int, a: int, b: int, gaps: _Gaps, best: np.ndarray, way: np.ndarray,
          skip_cost: float) -> tuple[np.ndarray, np.ndarray] | None:
    """Let each gap's first column in [a, b) be reached from an earlier gap's last column;
    the columns so reached and their origins."""
    starts = gaps.first[(gaps.first >= a) & (gaps.first < b)]
    if starts.size == 0:
        return None
    ends = gaps.last[(gaps.last >= plo) & (gaps.last < plo + len(prev))]
    if ends.size == 0:
        return None
    values = prev[ends - plo]
    running = np.minimum.accumulate(values)
    where = np.concatenate([[0], np.flatnonzero(values[1:] < running[:-1]) + 1])
    origin = ends[where[np.searchsorted(where, np.arange(len(ends)), side="right") - 1]]
    reached: list[int] = []
    sources: list[int] = []
    for s in starts:
        k = int(np.searchsorted(ends, s, side="left")) - 1  # the ends before this gap
        if k < 0:
            continue
        candidate = running[k] + skip_cost
        if candidate < best[s - a]:
            best[s - a] = candidate
            way[s - a] = _SKIP
            reached.append(int(s))
            sources.append(int(origin[k]))
    return (np.array(reached, dtype=np.int32), np.array(sources, dtype=np.int32)) if reached else None


def _trace(ways: list[np.ndarray], jumps: list[tuple[np.ndarray, np.ndarray] | None], lo: np.ndarray,
           n: int) -> np.ndarray:
    """Follow the way back from the last column of the last row."""
    columns = np.empty(n, dtype=np.int64)
    j = int(lo[n - 1]) + len(ways[n - 1]) - 1
    for i in range(n - 1, -1, -1):
        columns[i] = j
        if i == 0:
            break
        w = int(ways[i][j - int(lo[i])])
        if w == _SKIP:
            reached, sources = jumps[i]  # type: ignore[misc]
            j = int(sources[np.searchsorted(reached, j)])
        else:
            j -= w
    return columns


def _project(columns: np.ndarray, *, rows: int, cols: int, radius: int) -> tuple[np.ndarray, np.ndarray]:
    """The band of a finer level around a coarser path: each fine row's [lo, hi)."""
    coarse = len(columns)
    # Per coarse row, the columns the path spans there (a jump spans the whole gap between).
    low = columns.copy()
    high = columns.copy()
    high[:-1] = np.maximum(high[:-1], columns[1:])
    low[1:] = np.minimum(low[1:], columns[:-1])
    r = np.minimum(np.arange(rows) // 2, coarse - 1)
    before, after = np.maximum(r - 1, 0), np.minimum(r + 1, coarse - 1)
    lo = 2 * np.minimum(low[before], low[r]) - radius
    hi = 2 * np.maximum(high[after], high[r]) + 2 + radius
    lo = np.clip(lo, 0, cols - 1)
    hi = np.clip(hi, lo + 1, cols)
    lo[0] = 0
    hi[-1] = cols
    # Keep the band connected: each row's band must reach two columns past the last one's start.
    lo = np.minimum(lo, np.maximum.accumulate(lo))
    hi = np.maximum.accumulate(hi)
    return lo, hi


def warp(real: np.ndarray, synth: np.ndarray, *, gap_runs: np.ndarray, garbage_cost: float, skip_cost: float,
         radius_frames: int = 16, full_cells: int = 30_000_000) -> Path:
    """Align ``real`` frames to ``synth`` frames (see the module's docstring).

    Parameters
    ----------
    real, synth : np.ndarray
        Normalised features, shape (frames, coefficients), the same coefficients.
    gap_runs : np.ndarray
        Shape (gaps, 2): first and last synthetic column of each gap, in order; the
        first gap starts at column 0 and the last ends at the last column.
    garbage_cost : float
        Cap on a gap column's local cost.
    skip_cost : float
        Price of a jump from the end of one gap to the start of a later one.
    radius_frames : int
        Half-width of the band around the coarser path, in frames of each level.
    full_cells : int
        Largest matrix aligned in full, at the coarsest level.

    Returns
    -------
    Path

    Examples
    --------
    Two gaps around one three-frame "sentence"; the recording pauses in the middle of it:

    >>> y = np.array([[0.0], [5.0], [6.0], [7.0], [0.0]], dtype=np.float32)
    >>> x = np.array([[0.0], [5.0], [6.0], [0.0], [7.0], [0.0]], dtype=np.float32)
    >>> warp(x, y, gap_runs=np.array([[0, 0], [4, 4]]), garbage_cost=10.0, skip_cost=1.0).columns.tolist()
    [0, 1, 2, 2, 3, 4]
    """
    real = np.ascontiguousarray(real, dtype=np.float32)
    synth = np.ascontiguousarray(synth, dtype=np.float32)
    if real.ndim != 2 or synth.ndim != 2 or real.shape[1] != synth.shape[1] or not len(real) or not len(synth):
        raise ParameterError(f"real {real.shape} and synth {synth.shape}: expected non-empty (frames, coefficients) "
                             "arrays with the same coefficients")
    runs = np.asarray(gap_runs, dtype=np.int64).reshape(-1, 2)
    if not len(runs) or runs[0, 0] != 0 or runs[-1, 1] != len(synth) - 1 or np.any(np.diff(runs.ravel()) < 0):
        raise ParameterError(f"gap_runs={runs.tolist()[:4]}...: expected ordered runs from column 0 to {len(synth) - 1}")
    if radius_frames < 1 or full_cells < 1:
        raise ParameterError(f"radius_frames={radius_frames}, full_cells={full_cells}: expected both >= 1")
    levels = [(real, synth)]
    while len(levels[-1][0]) * len(levels[-1][1]) > full_cells and min(map(len, levels[-1])) > 2 * radius_frames:
        levels.append((_pool(levels[-1][0]), _pool(levels[-1][1])))
    columns = None
    for shift in range(len(levels) - 1, -1, -1):
        x, y = levels[shift]
        gaps = _Gaps.at(runs, shift=shift, columns=len(y))
        if columns is None:
            lo, hi = np.zeros(len(x), dtype=np.int64), np.full(len(x), len(y), dtype=np.int64)
        else:
            lo, hi = _project(columns, rows=len(x), cols=len(y), radius=radius_frames)
        columns = _band_dtw(x, y, lo, hi, gaps, garbage_cost=garbage_cost, skip_cost=skip_cost)
    costs = np.sqrt(np.einsum("jd,jd->j", real - synth[columns], real - synth[columns], optimize=False)
                    / np.float32(real.shape[1])).astype(np.float64)
    gap_mask = _Gaps.at(runs, shift=0, columns=len(synth)).mask
    costs = np.where(gap_mask[columns], np.minimum(costs, garbage_cost), costs)
    jumps = int(np.count_nonzero(np.diff(columns) > 2))
    return Path(columns, costs, float(costs.sum() + jumps * skip_cost))
