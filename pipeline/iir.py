"""IIR filtering of second-order sections with numpy alone, block by block.

``scipy.signal.sosfilt`` does this job, but importing ``scipy.signal`` costs about
1.2 s in every run that measures loudness (it pulls in scipy.stats, interpolate and
optimize), more than filtering half an hour of audio. The block form below gives the
same output (to float32 rounding, ~1e-6 relative) and, because nearly all of its work
is two matrix products, runs as fast as or faster than sosfilt on clips.

Method: the cascade of sections is one linear state-space system
``s[n+1] = A s[n] + B x[n]``, ``y[n] = C s[n] + D x[n]`` of order 2 x sections. Cut
the signal into blocks of L samples. Within a block the output is the block's input
convolved with the first L taps of the impulse response (a lower-triangular Toeplitz
matrix, exact) plus the response to the state the block starts in (``C A^i``); the
state carried to the next block is ``A^L s + R x``. So every block's own part is one
matrix product over all blocks at once, and the states follow the linear recurrence
``s_(k+1) = A^L s_k + R x_k``, solved by recursive doubling (log2 of the block count
vectorised steps) in float64.
"""

from __future__ import annotations

import functools

import numpy as np

from pipeline.errors import ParameterError

# 64 samples per block: large enough that the recurrence over blocks is cheap, small
# enough that the Toeplitz product (L multiply-adds per sample) stays cheap too.
BLOCK_FRAMES = 64


def _check_sos(sos: np.ndarray) -> np.ndarray:
    sos = np.asarray(sos, dtype=np.float64)
    if sos.ndim != 2 or sos.shape[1] != 6 or sos.shape[0] == 0:
        raise ParameterError(f"sos has shape {sos.shape}; expected (sections, 6)")
    if not np.allclose(sos[:, 3], 1.0):
        raise ParameterError(f"sos a0 coefficients are {sos[:, 3].tolist()}; expected 1.0 (normalised sections)")
    return sos


def state_space(sos: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, float]:
    """(A, B, C, D) of the cascade of second-order sections ``sos`` (rows b0 b1 b2 1 a1 a2),
    each section in transposed direct form II."""
    sos = _check_sos(sos)
    a_mat = np.zeros((0, 0))
    b_vec = np.zeros(0)
    c_vec = np.zeros(0)
    d = 1.0
    for b0, b1, b2, _, a1, a2 in sos:
        a_s = np.array([[-a1, 1.0], [-a2, 0.0]])
        b_s = np.array([b1 - a1 * b0, b2 - a2 * b0])
        c_s = np.array([1.0, 0.0])
        n = a_mat.shape[0]
        # Series connection: this section's input is the output so far, C s + D x.
        joined = np.zeros((n + 2, n + 2))
        joined[:n, :n] = a_mat
        joined[n:, :n] = np.outer(b_s, c_vec)
        joined[n:, n:] = a_s
        a_mat, b_vec, c_vec, d = joined, np.concatenate([b_vec, b_s * d]), np.concatenate([b0 * c_vec, c_s]), b0 * d
    return a_mat, b_vec, c_vec, d


@functools.cache
def _block_operators(sos_bytes: bytes, sections: int, block: int) -> tuple[np.ndarray, ...]:
    sos = np.frombuffer(sos_bytes, dtype=np.float64).reshape(sections, 6)
    a_mat, b_vec, c_vec, d = state_space(sos)
    powers = [np.eye(a_mat.shape[0])]
    for _ in range(block):
        powers.append(powers[-1] @ a_mat)
    taps = np.array([d] + [c_vec @ powers[k - 1] @ b_vec for k in range(1, block)])
    i = np.arange(block)
    toeplitz = np.where(i[:, None] >= i[None, :], taps[np.maximum(i[:, None] - i[None, :], 0)], 0.0)
    from_state = np.array([c_vec @ powers[k] for k in range(block)])  # block x order
    to_state = np.array([powers[block - 1 - j] @ b_vec for j in range(block)])  # block x order
    return (np.ascontiguousarray(toeplitz.T, dtype=np.float32), np.ascontiguousarray(to_state, dtype=np.float32),
            np.ascontiguousarray(from_state.T), np.ascontiguousarray(powers[block].T))


def sosfilt(sos: np.ndarray, samples: np.ndarray, *, block_frames: int = BLOCK_FRAMES) -> np.ndarray:
    """Filter a 1-D signal through second-order sections from a zero state.

    The same result as ``scipy.signal.sosfilt(sos, samples)`` to float32 rounding.

    Parameters
    ----------
    sos : array of shape (sections, 6), rows ``(b0, b1, b2, 1, a1, a2)``; every section
        must be stable (poles inside the unit circle).
    samples : 1-D floating-point array.
    block_frames : samples per block (see the module notes); any value >= 2 gives the
        same result.

    Returns
    -------
    float32 array of the same length.

    Example
    -------
    >>> sos = np.array([[0.5, 0.5, 0.0, 1.0, -0.2, 0.0]])
    >>> sosfilt(sos, np.array([1.0, 0.0, 0.0])).round(3).tolist()
    [0.5, 0.6, 0.12]
    """
    sos = _check_sos(sos)
    x = np.asarray(samples)
    if x.ndim != 1 or not np.issubdtype(x.dtype, np.floating):
        raise ParameterError(f"samples has shape {x.shape} and dtype {x.dtype}; expected a 1-D float array")
    if isinstance(block_frames, bool) or not isinstance(block_frames, int) or block_frames < 2:
        raise ParameterError(f"block_frames={block_frames!r}; expected an integer >= 2")
    n = x.shape[0]
    if n == 0:
        return np.zeros(0, dtype=np.float32)
    toeplitz_t, to_state, from_state_t, step_t = _block_operators(sos.tobytes(), sos.shape[0], block_frames)
    blocks = -(-n // block_frames)
    padded = np.zeros((blocks, block_frames), dtype=np.float32)
    padded.reshape(-1)[:n] = x
    out = padded @ toeplitz_t
    # States at the end of each block, from its own input only, then summed along the
    # recurrence by doubling: after the step with shift d each row holds the sum of
    # the 2d latest blocks' contributions, each carried forward by the right power.
    state = (padded @ to_state).astype(np.float64)
    carry = step_t
    shift = 1
    while shift < blocks:
        state[shift:] += state[:-shift] @ carry
        carry = carry @ carry
        shift *= 2
    out[1:] += (state[:-1] @ from_state_t).astype(np.float32)
    return out.reshape(-1)[:n]
