"""How much audio a RIFF/WAVE file's header declares against how much the file holds.

libsndfile trusts the file size: a WAV cut short in transfer opens and decodes as the
shorter recording, with nothing to say that its end is missing. The header still
says how long it was meant to be: the ``data`` chunk's size field (Microsoft/IBM
"Multimedia Programming Interface and Data Specifications 1.0", 1991: a RIFF file is
a chain of chunks, each a 4-byte id, a 4-byte size and the data padded to an even
length; RIFX is the same chain with big-endian sizes).
"""

from __future__ import annotations

import os
import struct
from dataclasses import dataclass
from typing import BinaryIO

# Size fields that mean "length unknown": streaming writers leave 0 or 0xFFFFFFFF in
# the data size when they cannot seek back to fill it in (common practice, from
# memory; RF64 uses 0xFFFFFFFF to point at its ds64 chunk). Neither is a truncation.
UNKNOWN_SIZES = (0, 0xFFFFFFFF)
# A file with more chunks than this before its data chunk is not a recording.
MAX_CHUNKS = 4096


@dataclass(frozen=True)
class DataExtent:
    """The data chunk of a WAVE file: bytes its header declares, bytes the file holds."""

    declared_bytes: int
    present_bytes: int

    @property
    def truncated(self) -> bool:
        return self.declared_bytes not in UNKNOWN_SIZES and self.declared_bytes > self.present_bytes


def wav_data_extent(fh: BinaryIO) -> DataExtent | None:
    """Walk the chunks of a RIFF or RIFX WAVE file to its ``data`` chunk.

    Parameters
    ----------
    fh : the file, opened for binary reading (only read and seek are used).

    Returns
    -------
    The data chunk's declared and present sizes in bytes, or None when the file is
    not RIFF/RIFX WAVE or its chain of chunks ends before a data chunk.

    Example
    -------
    >>> import io
    >>> head = b"RIFF" + struct.pack("<I", 36 + 8000) + b"WAVE" + b"data" + struct.pack("<I", 8000)
    >>> wav_data_extent(io.BytesIO(head + bytes(3000)))
    DataExtent(declared_bytes=8000, present_bytes=3000)
    """
    fh.seek(0, os.SEEK_END)
    size = fh.tell()
    fh.seek(0)
    head = fh.read(12)
    if len(head) < 12 or head[8:12] != b"WAVE" or head[:4] not in (b"RIFF", b"RIFX"):
        return None
    order = "<" if head[:4] == b"RIFF" else ">"
    offset = 12
    for _ in range(MAX_CHUNKS):
        if offset + 8 > size:
            return None
        fh.seek(offset)
        chunk = fh.read(8)
        (length,) = struct.unpack(order + "I", chunk[4:8])
        if chunk[:4] == b"data":
            return DataExtent(declared_bytes=length, present_bytes=size - offset - 8)
        offset += 8 + length + (length & 1)
    return None


# Bytes per sample of the uncompressed subtypes libsndfile reads from WAV.
_SAMPLE_BYTES = {"PCM_U8": 1, "PCM_S8": 1, "PCM_16": 2, "PCM_24": 3, "PCM_32": 4,
                 "FLOAT": 4, "DOUBLE": 8, "ULAW": 1, "ALAW": 1}


def declared_frames(extent: DataExtent, *, subtype: str, channels: int, frames_present: int) -> int:
    """Frames the header declares, from the data size and the sample format.

    For a compressed subtype (ADPCM, GSM) the frames per byte of what is present stand
    in for the format's block arithmetic.

    Example
    -------
    >>> declared_frames(DataExtent(206870, 82749), subtype="PCM_16", channels=1, frames_present=41374)
    103435
    """
    width = _SAMPLE_BYTES.get(subtype)
    if width:
        return extent.declared_bytes // (width * max(1, channels))
    if extent.present_bytes <= 0:
        return 0
    return extent.declared_bytes * frames_present // extent.present_bytes
