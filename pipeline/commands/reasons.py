"""What each reject reason code of ``rejected.parquet`` means, in one sentence.

The datasheet lists the rejects by code; a reader who never saw Loam needs the code's
meaning beside it. ``tests/test_datasheet.py`` checks every code of
``pipeline.core.names.REASONS`` has a sentence here.
"""

from __future__ import annotations

MEANINGS = {
    "undecodable": "The audio file could not be decoded.",
    "decoder_crashed": "Decoding the audio file crashed the decoding library twice; the file was set aside alone.",
    "empty": "The file has no bytes, or its audio holds no samples.",
    "unsupported_format": "The installed audio library cannot read the file's container.",
    "duplicate_content": "The file is byte-identical to another file of the dump, which was kept.",
    "unreadable": "The file could not be read from disk.",
    "transcript_encoding": "A transcript did not decode in the configured text encoding; its audio was kept as untranscribed.",
    "transcript_unreadable": "A transcript file could not be read; its audio was kept as untranscribed.",
    "metadata_parse_error": "A row of the metadata table could not be parsed.",
    "metadata_missing_audio": "A row of the metadata table names an audio file that does not exist.",
    "metadata_duplicate_row": "The metadata table names the same audio file more than once.",
    "path_outside_root": "A path (a metadata row or a symbolic link) leads outside the raw dump; it was not followed.",
    "conflicting_transcripts": "Two transcripts of the same file disagree; both were set aside and the audio kept as untranscribed.",
    "missing_speaker": "No speaker, or more than one, could be found for the file.",
    "unsupported_sample_rate": "The sample rate in the file's header is outside the range of recordings (a damaged header).",
    "truncated": "The file holds less audio than its header declares.",
    "file_name_encoding": "The file's name is not valid text in the file system's encoding.",
    "non_finite_samples": "The decoded audio holds NaN or infinite samples.",
    "out_of_range_samples": "The decoded audio holds samples beyond full scale.",
    "upsampled": "The file's rate is below the output rate and the config rejects such files.",
    "too_long_transcribed": "A transcribed recording is longer than the longest clip allowed, so its transcript cannot be cut with it.",
    "transcript_mismatch": "A long recording's transcript could not be aligned to it (too few sentences found in the audio); the audio is kept as untranscribed clips.",
    "sentences_unaligned": "Some sentences of a long recording's transcript were not placed with confidence; their audio is kept as untranscribed clips, the sentence names them.",
    "no_speech": "Voice activity detection found too little speech.",
    "clipped": "Too many samples sit at full scale for the audio to be usable.",
    "too_short": "The clip is shorter than the shortest allowed after trimming.",
    "loudness_unmeasurable": "The clip's integrated loudness could not be measured: every block is below the BS.1770-4 absolute gate.",
    "empty_transcript": "The transcript is empty, or nothing is left of it after normalisation.",
    "unpronounceable": "No phones could be found for a word of the transcript.",
    "bad_characters": "The transcript holds characters outside the configured alphabet.",
    "oov": "The transcript holds words the configured lexicon does not know.",
    "unreadable_number": "A number in the transcript could not be read out in the transcript's language.",
    "noisy": "The clip's estimated SNR is below the threshold and the config rejects noisy clips.",
    "invalid_measurement": "A measured value broke the manifest's schema; the row was set aside.",
    "review_excluded": "A person excluded the clip with loam review; the sentence gives their reason and note.",
    "review_transcript_wrong": "A person marked the transcript wrong for this audio with loam review; the audio was kept as untranscribed.",
}


def meaning(reason: str) -> str:
    """The sentence for ``reason``, or a plain statement that there is none.

    Examples
    --------
    >>> meaning("too_short")
    'The clip is shorter than the shortest allowed after trimming.'
    >>> meaning("no_such_code")
    'No description is recorded for this code.'
    """
    return MEANINGS.get(reason, "No description is recorded for this code.")
