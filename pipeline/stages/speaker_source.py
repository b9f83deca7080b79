"""Where a file's speaker comes from: the config, the metadata table, or RAW's layout.

In order:

1. ``ingest.speaker`` (not empty): every file of the dump is that one speaker, whatever
   the layout (a single-speaker corpus);
2. ``ingest.speaker_from = "metadata"``: each file's row of the metadata table;
3. ``ingest.speaker_from = "path"`` (the default): the folder at ``speaker_path_level``
   (``RAW/<speaker>/.../<file>``), except in a **flat** dump, whose audio files all lie in
   one folder (RAW itself, or one folder such as ``wavs/``, at any depth). A flat dump
   has no folder that tells one speaker from another: the one folder is a container, not
   a speaker, so the dump is one speaker, :data:`FLAT_SPEAKER`. The folder's name is never
   taken for a speaker's, since Loam cannot tell ``wavs/`` from ``ana/``; a dump laid
   out as ``RAW/ana/*.wav`` is therefore ``speaker-1`` too, and ``ingest.speaker`` names it.

The rule reads only the list of audio paths, so it depends on RAW and the config alone.
A file that gains a sibling folder later (a second speaker's recordings arrive in a dump
that was flat) takes its folder's name from then on; the log says which rule was used.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

# The speaker of a flat dump without ingest.speaker. Not a word the report or the
# manifests use on their own (a pseudonymised build scrubs it from shareable files, as it
# does every speaker id).
FLAT_SPEAKER = "speaker-1"


def flat_folder(paths: Sequence[str]) -> str | None:
    """The one folder holding every path ("" for RAW itself), or None when the paths lie
    in more than one folder, or there are none.

    Parameters
    ----------
    paths : sequence of str
        Audio paths relative to RAW, '/'-separated (single slashes, as the ingest scan
        gives them).

    Returns
    -------
    str or None
        The folder, relative to RAW.

    Examples
    --------
    >>> flat_folder(["wavs/a.wav", "wavs/b.wav"])
    'wavs'
    >>> flat_folder(["a.wav", "b.flac"])
    ''
    >>> flat_folder(["ana/a.wav", "ben/b.wav"]) is None
    True
    >>> flat_folder(["a/x.wav", "a/y.wav", "a/b/z.wav"]) is None, flat_folder([]) is None
    (True, True)
    """
    if not paths:
        return None
    # rpartition is posixpath.dirname for such paths (relative, single slashes), at a
    # fifth of its cost. A dump of several folders is told at its first file in another
    # folder than the first file's: at 100,000 files of 500 speakers the set of every
    # file's folder was 0.13 s of a rebuild's ingest (under the profiler), the loop now stops
    # at the second speaker; only a flat dump is looked at whole.
    first = paths[0].rpartition("/")[0]
    for path in paths:
        if path.rpartition("/")[0] != first:
            return None
    return first


@dataclass(frozen=True)
class SpeakerRule:
    """How every file of one dump gets its speaker.

    ``constant`` is the one speaker of the whole dump (None: per file); ``origin`` says
    which rule applies: ``"ingest.speaker"``, ``"flat layout"``, ``"metadata"`` or ``"path"``;
    ``note`` is the sentence the run logs about it ("" when there is nothing to say).
    """

    constant: str | None
    origin: str
    note: str = ""


def speaker_rule(paths: Sequence[str], *, speaker: str, speaker_from: str) -> SpeakerRule:
    """The rule for a dump whose audio files are ``paths`` (see the module docstring).

    Parameters
    ----------
    paths : sequence of str
        Every audio path found under RAW, relative to it.
    speaker : str
        ``ingest.speaker``: one speaker for the whole dump, or "".
    speaker_from : str
        ``ingest.speaker_from``: "path" or "metadata".

    Returns
    -------
    SpeakerRule

    Examples
    --------
    >>> speaker_rule(["wavs/a.wav", "wavs/b.wav"], speaker="", speaker_from="path").constant
    'speaker-1'
    >>> speaker_rule(["wavs/a.wav"], speaker="narrator", speaker_from="path").origin
    'ingest.speaker'
    >>> speaker_rule(["ana/a.wav", "ben/b.wav"], speaker="", speaker_from="path")
    SpeakerRule(constant=None, origin='path', note='')
    """
    if speaker:
        return SpeakerRule(speaker, "ingest.speaker")
    if speaker_from == "metadata":
        return SpeakerRule(None, "metadata")
    folder = flat_folder(paths)
    if folder is None:
        return SpeakerRule(None, "path")
    where = f"the one folder {folder + '/'!r}" if folder else "RAW itself, without folders"
    return SpeakerRule(FLAT_SPEAKER, "flat layout", (
        f"ingest: all {len(paths)} audio files lie in {where}: a flat layout names no speaker, so the dump is "
        f"one speaker, {FLAT_SPEAKER!r} (set ingest.speaker to name it, or give each speaker a folder of their own)"))


def path_speaker(rel: str, *, level: int) -> str | None:
    """The folder at ``level`` of ``rel`` (0 = the first under RAW), or None when the file
    lies less deep than that.

    Examples
    --------
    >>> path_speaker("ana/day1/take.wav", level=0)
    'ana'
    >>> path_speaker("take.wav", level=0) is None
    True
    """
    parts = rel.split("/")[:-1]
    return parts[level] if len(parts) > level else None
