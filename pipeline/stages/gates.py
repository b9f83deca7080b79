"""Quality gates: which clips a gate flags, and which flags keep a clip out of labelled.

The split stage decides with these functions and ``loam validate`` checks with the same
ones, so the two cannot disagree about what a gate does.

Each gate compares one measured value with a threshold of ``[quality]``:

- ``noisy``: WADA-SNR below ``min_snr_db``;
- ``narrowband``: effective bandwidth below ``min_bandwidth_hz``;
- ``rate_outlier``: speaking-rate robust z-score beyond ``rate_max_abs_z``;
- ``clipped``: a larger share of the source's samples at ``audio.clip_level`` than
  ``audio.max_clipped_fraction`` (the audio stage measures it; beyond
  ``audio.unusable_clipped_fraction`` it has already rejected the source).

Every gate flags; what a flag does is the gate's action (``[quality]
<gate>_action``): ``"flag"`` only marks the clip, ``"demote"`` keeps it out of the
labelled tiers and out of held-out scoring (its audio still serves as unlabelled, or
stays in held-out unscored), and ``"reject"`` (``noisy`` and ``clipped``) sets the clip
aside.
Transcribed speech is the scarcest thing a low-resource corpus has, so by default only
the gates that say the transcript is wrong or the audio unusable demote: a speaking rate
that does not fit the clip's length (the transcript probably belongs to other audio),
and audio so noisy that its speech barely stands above the noise. A narrowband clip
(telephone audio upsampled into a wider corpus) is still correctly transcribed speech:
by default it is only flagged. So is a clipped one: flattened peaks distort the audio
but say nothing against the transcript (audio clipped past
``audio.unusable_clipped_fraction``, no longer speech to learn from, never reaches a
gate: the audio stage rejects it).
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from pipeline.core.errors import ParameterError

GATES = ("noisy", "narrowband", "rate_outlier", "clipped")
# Actions each gate accepts; the first is what every gate accepts.
ACTIONS = {"noisy": ("flag", "demote", "reject"), "narrowband": ("flag", "demote"),
           "rate_outlier": ("flag", "demote"), "clipped": ("flag", "demote", "reject")}
# Actions that keep a flagged clip out of labelled and held-out scoring.
HOLDING_ACTIONS = ("demote", "reject")


def _column(name: str, values: object, length: int | None) -> np.ndarray:
    x = np.asarray(values, dtype=np.float64)
    if x.ndim != 1:
        raise ParameterError(f"{name} must be 1-D, got shape {x.shape}")
    if length is not None and x.shape[0] != length:
        raise ParameterError(f"{name} has {x.shape[0]} values; expected {length}, one per clip")
    return x


def gate_flags(*, snr_db: object, bandwidth_hz: object, rate_z: object, clipped_fraction: object,
               min_snr_db: float, min_bandwidth_hz: float, rate_max_abs_z: float,
               max_clipped_fraction: float) -> dict[str, np.ndarray]:
    """Which clips each gate flags, from their measured values.

    Parameters
    ----------
    snr_db : array_like of float
        WADA-SNR per clip in dB; NaN where not measured.
    bandwidth_hz : array_like of float
        Effective bandwidth per clip in Hz; NaN where not measured.
    rate_z : array_like of float
        Robust z-score of speaking rate per clip; NaN where there is none (no transcript).
    clipped_fraction : array_like of float
        Share of the clip's source samples at the clip level; NaN where not measured.
    min_snr_db : float
        ``quality.min_snr_db``: a lower SNR flags ``noisy``.
    min_bandwidth_hz : float
        ``quality.min_bandwidth_hz``: a narrower bandwidth flags ``narrowband``.
    rate_max_abs_z : float
        ``quality.rate_max_abs_z``: a larger absolute z-score flags ``rate_outlier``.
    max_clipped_fraction : float
        ``audio.max_clipped_fraction``: a larger share flags ``clipped``.

    Returns
    -------
    dict of str to np.ndarray
        One boolean mask per gate of ``GATES``. A value that was not measured (NaN)
        never trips a gate.

    Examples
    --------
    >>> flags = gate_flags(snr_db=[2.0, 30.0, np.nan], bandwidth_hz=[7800.0, 3400.0, np.nan],
    ...                    rate_z=[np.nan, 0.4, -5.0], clipped_fraction=[0.0, 0.004, 0.001],
    ...                    min_snr_db=5.0, min_bandwidth_hz=5000.0, rate_max_abs_z=3.5,
    ...                    max_clipped_fraction=0.001)
    >>> {gate: mask.tolist() for gate, mask in flags.items()}  # doctest: +NORMALIZE_WHITESPACE
    {'noisy': [True, False, False], 'narrowband': [False, True, False], 'rate_outlier': [False, False, True],
     'clipped': [False, True, False]}
    """
    snr = _column("snr_db", snr_db, None)
    bandwidth = _column("bandwidth_hz", bandwidth_hz, snr.shape[0])
    z = _column("rate_z", rate_z, snr.shape[0])
    clipped = _column("clipped_fraction", clipped_fraction, snr.shape[0])
    with np.errstate(invalid="ignore"):  # NaN compares False, which is what "not measured" means
        return {"noisy": snr < min_snr_db, "narrowband": bandwidth < min_bandwidth_hz,
                "rate_outlier": np.abs(z) > rate_max_abs_z, "clipped": clipped > max_clipped_fraction}


def check_actions(actions: Mapping[str, str]) -> None:
    """ParameterError unless ``actions`` names an allowed action for every gate of ``GATES``.

    Examples
    --------
    >>> check_actions({"noisy": "demote", "narrowband": "flag", "rate_outlier": "demote", "clipped": "flag"})
    >>> check_actions({"noisy": "demote", "narrowband": "reject", "rate_outlier": "demote", "clipped": "flag"})
    Traceback (most recent call last):
    ...
    pipeline.core.errors.ParameterError: actions['narrowband']='reject' is not one of ('flag', 'demote')
    """
    for gate in GATES:
        if gate not in actions:
            raise ParameterError(f"actions={dict(actions)!r} has no action for the gate {gate!r}")
        if actions[gate] not in ACTIONS[gate]:
            raise ParameterError(f"actions[{gate!r}]={actions[gate]!r} is not one of {ACTIONS[gate]}")


def holding_gates(actions: Mapping[str, str]) -> tuple[str, ...]:
    """The gates whose flag keeps a clip out of labelled and held-out scoring, in ``GATES`` order.

    Parameters
    ----------
    actions : mapping of str to str
        The action of every gate (``QualityConfig.gate_actions``).

    Returns
    -------
    tuple of str
        The gates whose action is ``"demote"`` or ``"reject"``.

    Examples
    --------
    >>> holding_gates({"noisy": "demote", "narrowband": "flag", "rate_outlier": "demote", "clipped": "reject"})
    ('noisy', 'rate_outlier', 'clipped')
    """
    check_actions(actions)
    return tuple(g for g in GATES if actions[g] in HOLDING_ACTIONS)


def rejecting_gates(actions: Mapping[str, str]) -> tuple[str, ...]:
    """The gates whose flag sets a clip aside (action ``"reject"``), in ``GATES`` order.

    Examples
    --------
    >>> rejecting_gates({"noisy": "reject", "narrowband": "flag", "rate_outlier": "demote", "clipped": "reject"})
    ('noisy', 'clipped')
    """
    check_actions(actions)
    return tuple(g for g in GATES if actions[g] == "reject")


def held_back(flags: Mapping[str, np.ndarray], *, actions: Mapping[str, str]) -> np.ndarray:
    """Which clips the gates keep out of labelled and held-out scoring.

    Parameters
    ----------
    flags : mapping of str to np.ndarray
        Boolean masks per gate, as :func:`gate_flags` returns them.
    actions : mapping of str to str
        The action of every gate.

    Returns
    -------
    np.ndarray
        Boolean mask: flagged by at least one gate whose action demotes or rejects.

    Examples
    --------
    >>> flags = {"noisy": np.array([True, False, False]), "narrowband": np.array([False, True, False]),
    ...          "rate_outlier": np.array([False, False, True]), "clipped": np.array([False, True, False])}
    >>> keep = {"noisy": "demote", "narrowband": "flag", "rate_outlier": "demote", "clipped": "flag"}
    >>> held_back(flags, actions=keep).tolist()
    [True, False, True]
    >>> held_back(flags, actions={**keep, "noisy": "flag", "rate_outlier": "flag", "clipped": "demote"}).tolist()
    [False, True, False]
    """
    gates = holding_gates(actions)
    missing = [g for g in GATES if g not in flags]
    if missing:
        raise ParameterError(f"flags has no mask for the gates {missing}; expected one per gate of {GATES}")
    lengths = {np.asarray(m).shape for m in flags.values()}
    if len(lengths) != 1:
        raise ParameterError(f"flags has masks of shapes {sorted(lengths)}; expected one shape")
    out = np.zeros(lengths.pop(), dtype=bool)
    for gate in gates:
        out |= np.asarray(flags[gate], dtype=bool)
    return out
