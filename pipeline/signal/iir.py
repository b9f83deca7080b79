"""IIR filtering of second-order sections with numpy alone, block by block.

``scipy.signal.sosfilt`` does this job, but importing ``scipy.signal`` costs about
1.2 s in every run that measures loudness (it pulls in scipy.stats, interpolate and
optimize), more than filtering half an hour of audio. The block form below gives the
same output (to float32 rounding, ~1e-6 relative).

Method: the cascade of sections is one linear state-space system
``s[n+1] = A s[n] + B x[n]``, ``y[n] = C s[n] + D x[n]`` of order 2 x sections. Cut
the signal into blocks of L samples. Within a block the output is the block's input
convolved with the first L taps of the impulse response (a lower-triangular Toeplitz
matrix, exact) plus the response to the state the block starts in (``C A^i``); the
state carried to the next block is ``A^L s + R x``. So every block's own part is one
matrix product over all blocks at once, and the states follow the linear recurrence
``s_(k+1) = A^L s_k + R x_k``, solved in float64 by recursive doubling within groups
of G blocks and then over the groups (``_block_starts``).

Every product is ``numpy.einsum`` with ``optimize=False``, never ``@``: einsum then
runs numpy's own loops, whose order of summation is fixed by the shapes, while ``@``
calls the BLAS library, whose order follows its thread count and the kernel it picked
for the processor. Through BLAS, loudness readings differed in the 11th digit between
the driver and a dask worker, and so did the bytes of the audio manifest
(tests/test_blas_independence.py now checks several thread counts and kernels). The
blocks are laid out along the last axis, so einsum's inner loops run along long
contiguous rows. Cost, best of 40 on the 2-core development VM, one BLAS thread:
60 s of noise at 16 kHz filtered in 8.3 ms (7.8 ms by the earlier BLAS form with
64-sample blocks), at 48 kHz in 26 ms (26 ms), 3 s at 16 kHz in 0.35 ms (0.21 ms);
``loudness.integrated_loudness`` of the 60 s clip 10.0 ms (8.6 ms), of a 5 s clip
0.62 ms (0.47 ms). The per-file work of the bench workload (bench/bench_per_file.py,
226 files, 30 minutes) took 4.22 CPU seconds against 4.21 before: within noise.
"""

from __future__ import annotations

import functools
from typing import NamedTuple

import numpy as np

from pipeline.core.errors import ParameterError

# 16 samples per block and 16 blocks per group (see _block_starts): the Toeplitz
# product costs L multiply-adds per sample, the recurrence over blocks about
# 16 (log2 16 + 1) per block; these balance the two, and keep the number of numpy
# calls per piece of signal small, which is what short clips pay for.
BLOCK_FRAMES = 16
GROUP_BLOCKS = 16
# Long signals are filtered this many samples at a time, the state carried from one
# piece to the next, so the working arrays stay in the processor's cache.
CHUNK_FRAMES = 1 << 17


class _Operators(NamedTuple):
    toeplitz: np.ndarray  # (L, L) float32: the first L taps of the impulse response
    to_state: np.ndarray  # (order, L) float32: a block's input -> its end state
    from_state: np.ndarray  # (L, order) float32: a block's start state -> its output
    powers: np.ndarray  # (G + 1, order, order): (A^L)^j for j = 0..G
    carries: tuple[np.ndarray, ...]  # (A^(L G))^(2^i): the doubling steps over groups


def _product(subscripts: str, *operands: np.ndarray) -> np.ndarray:
    """``numpy.einsum`` in numpy's own loops (never BLAS): the same bytes whatever the
    BLAS library's threads or CPU kernel."""
    return np.einsum(subscripts, *operands, optimize=False)


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
def _block_operators(sos_bytes: bytes, sections: int, block: int) -> _Operators:
    sos = np.frombuffer(sos_bytes, dtype=np.float64).reshape(sections, 6)
    a_mat, b_vec, c_vec, d = state_space(sos)
    powers = [np.eye(a_mat.shape[0])]
    for _ in range(block):
        powers.append(_product("ij,jk->ik", powers[-1], a_mat))
    taps = np.array([d] + [_product("i,ij,j->", c_vec, powers[k - 1], b_vec) for k in range(1, block)])
    i = np.arange(block)
    toeplitz = np.where(i[:, None] >= i[None, :], taps[np.maximum(i[:, None] - i[None, :], 0)], 0.0)
    from_state = np.array([_product("i,ij->j", c_vec, powers[k]) for k in range(block)])
    to_state = np.array([_product("ij,j->i", powers[block - 1 - j], b_vec) for j in range(block)]).T
    step_powers = [powers[0]]
    for _ in range(GROUP_BLOCKS):
        step_powers.append(_product("ij,jk->ik", step_powers[-1], powers[block]))
    carries = [step_powers[-1]]
    for _ in range(40):  # enough for 2^40 groups
        carries.append(_product("ij,jk->ik", carries[-1], carries[-1]))
    return _Operators(np.ascontiguousarray(toeplitz, dtype=np.float32),
                      np.ascontiguousarray(to_state, dtype=np.float32),
                      np.ascontiguousarray(from_state, dtype=np.float32), np.array(step_powers), tuple(carries))


def sosfilt(sos: np.ndarray, samples: np.ndarray, *, block_frames: int = BLOCK_FRAMES) -> np.ndarray:
    """Filter a 1-D signal through second-order sections from a zero state.

    The same result as ``scipy.signal.sosfilt(sos, samples)`` to float32 rounding, and
    the same bytes on every machine with the same numpy build, whatever its BLAS.

    Parameters
    ----------
    sos : array of shape (sections, 6), rows ``(b0, b1, b2, 1, a1, a2)``; every section
        must be stable (poles inside the unit circle).
    samples : 1-D floating-point array.
    block_frames : samples per block (see the module notes); any value >= 2 gives the
        same result to float32 rounding.

    Returns
    -------
    float32 array of the same length.

    Example
    -------
    >>> sos = np.array([[0.5, 0.5, 0.0, 1.0, -0.2, 0.0]])
    >>> sosfilt(sos, np.array([1.0, 0.0, 0.0])).astype(np.float64).round(3).tolist()
    [0.5, 0.6, 0.12]
    """
    sos = _check_sos(sos)
    x = np.asarray(samples)
    if x.ndim != 1 or not np.issubdtype(x.dtype, np.floating):
        raise ParameterError(f"samples has shape {x.shape} and dtype {x.dtype}; expected a 1-D float array")
    if isinstance(block_frames, bool) or not isinstance(block_frames, int) or block_frames < 2:
        raise ParameterError(f"block_frames={block_frames!r}; expected an integer >= 2")
    operators = _block_operators(sos.tobytes(), sos.shape[0], block_frames)
    out = np.empty(x.shape[0], dtype=np.float32)
    state = np.zeros(operators.to_state.shape[0])
    chunk = max(CHUNK_FRAMES // block_frames, 1) * block_frames
    for start in range(0, x.shape[0], chunk):
        out[start:start + chunk], state = _filter_chunk(operators, x[start:start + chunk], state)
    return out


def _filter_chunk(operators: _Operators, x: np.ndarray, initial: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Output of one piece of signal starting in state ``initial``, and the state after
    its last group of blocks (which is the state after the piece when its length is a
    multiple of L x G, as every piece but the last is)."""
    block = operators.toeplitz.shape[0]
    group = operators.powers.shape[0] - 1
    n = x.shape[0]
    groups = -(-n // (block * group))
    padded = np.zeros((groups, group, block), dtype=np.float32)
    padded.reshape(-1)[:n] = x
    # Sample k of block j of group g at [k, j, g]: every product below runs its inner
    # loop along the last axis, contiguous and as long as the signal allows.
    columns = np.ascontiguousarray(padded.transpose(2, 1, 0))
    out = _product("kt,tjg->kjg", operators.toeplitz, columns)
    own = _product("st,tjg->sjg", operators.to_state, columns).astype(np.float64)
    starts, final = _block_starts(operators, own, initial)
    out += _product("ks,sjg->kjg", operators.from_state, starts.astype(np.float32))
    return out.transpose(2, 1, 0).reshape(-1)[:n], final


def _block_starts(operators: _Operators, own: np.ndarray, initial: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The state every block starts in, given each block's end state from a zero start
    (``own[:, j, g]`` for block j of group g) and the state the first block starts in;
    and the state after the last block.

    The states follow ``s_(b+1) = M s_b + own_b`` with ``M = A^L``. Within each group,
    recursive doubling: after the step with shift d every block holds the sum of its
    2d latest terms, each carried forward by the right power of M. Then the same over
    the groups' last blocks with ``M^G`` gives the state each group starts in, and one
    product carries it j blocks into the group. That costs log2(G) + 1 passes over the
    blocks instead of log2(blocks).
    """
    powers = operators.powers
    group = powers.shape[0] - 1
    shift = 1
    while shift < group:
        own[:, shift:, :] += _product("sr,rjg->sjg", powers[shift], own[:, :-shift, :])
        shift *= 2
    ends = np.empty((own.shape[0], own.shape[2] + 1))
    ends[:, 0] = initial
    ends[:, 1:] = own[:, -1, :]
    shift = 1
    for carry in operators.carries:
        if shift >= ends.shape[1]:
            break
        ends[:, shift:] += _product("sr,rg->sg", carry, ends[:, :-shift])
        shift *= 2
    starts = np.empty_like(own)
    starts[:, 0, :] = 0.0
    starts[:, 1:, :] = own[:, :-1, :]
    starts += _product("jsr,rg->sjg", powers[:-1], ends[:, :-1])
    return starts, ends[:, -1].copy()
