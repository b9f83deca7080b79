"""Names that stages, commands and tests share, spelled once.

Output paths are relative to OUT. Reason codes and stage names are also the enums of
``schemas/rejected.schema.json``; a test keeps the two equal.
"""

from __future__ import annotations

# The stages, in the order the runner runs them.
STAGES = ("ingest", "audio", "text", "split")

# Subsets of the split, in the order they are reported.
LABELLED = "labelled"
UNLABELLED = "unlabelled"
HELDOUT = "heldout"
SUBSETS = (LABELLED, UNLABELLED, HELDOUT)
# The column naming a held-out row's part (split.parts); null in labelled and unlabelled.
PART = "part"

# Quality flags a subset row may carry (`quality_flags`), in the order they are listed.
FLAGS = ("upsampled", "peak_limited", "noisy", "narrowband", "rate_outlier", "clipped", "near_duplicate",
         "transcript_rejected", "heldout_untranscribed", "prompt_in_labelled", "prompt_demoted")

# Reason codes of rejected.parquet, in the order of the schema's enum.
REASONS = (
    "undecodable", "decoder_crashed", "empty", "unsupported_format", "duplicate_content",
    "unreadable", "transcript_encoding", "transcript_unreadable", "metadata_parse_error",
    "metadata_missing_audio", "metadata_duplicate_row", "path_outside_root",
    "conflicting_transcripts", "missing_speaker", "unsupported_sample_rate", "truncated",
    "file_name_encoding", "non_finite_samples", "out_of_range_samples", "upsampled",
    "too_long_transcribed", "transcript_mismatch", "sentences_unaligned", "no_speech", "clipped", "too_short",
    "loudness_unmeasurable",
    "empty_transcript", "unpronounceable", "bad_characters", "oov", "unreadable_number", "noisy",
    "invalid_measurement", "review_excluded", "review_transcript_wrong",
)

# Where a transcript came from (the `transcript_origin` of the text and subset manifests):
# a sidecar file, the metadata table, or a fix recorded by `loam review`.
TRANSCRIPT_ORIGINS = ("sidecar", "metadata", "review")

# Files under OUT.
REJECTED = "manifests/rejected.parquet"
PREDICTED_LEXICON = "lexicon/predicted.tsv"
REPORT_PAGE = "report/index.html"
REPORT_SUMMARY = "report/summary.json"
REPORT_DATASHEET = "report/datasheet.md"
RESOLVED_CONFIG = "config.resolved.json"
LAST_RUN = "logs/last-run.json"
LEDGER_IN_OUT = "ledger.tsv"
LOGS = "logs"
CACHE = "cache"
# In a pseudonymised build, the private mapping from references back to RAW's names
# (pipeline.stages.privacy); under the cache, which is never shared.
PRIVATE_MAPPING = "cache/privacy-mapping.tsv"
REPORT = "report"
# The lock one run holds on OUT (pipeline.core.lock).
LOCK = ".loam.lock"
# The no-change snapshot of the last finished run (pipeline.core.snapshot).
SNAPSHOT_STATE = "cache/state.json"
# The configs that passed the schema check (pipeline.core.config.validate_config_data).
CONFIG_CHECKS = "cache/config-checked.txt"


def subset_manifest(subset: str) -> str:
    """``manifests/<subset>.parquet``.

    >>> subset_manifest(HELDOUT)
    'manifests/heldout.parquet'
    """
    return f"manifests/{subset}.parquet"


def stage_manifest(stage: str) -> str:
    """``stages/<stage>.parquet``, a stage's own manifest."""
    return f"stages/{stage}.parquet"


def stage_rejects(stage: str) -> str:
    """``stages/<stage>.rejects.parquet``."""
    return f"stages/{stage}.rejects.parquet"


def stage_summary(stage: str) -> str:
    """``stages/<stage>.summary.json``."""
    return f"stages/{stage}.summary.json"


def stage_outputs_record(stage: str) -> str:
    """``cache/stages/<stage>.arrow``: the stat of every file the stage wrote last time
    (pipeline.core.outputs_record)."""
    return f"cache/stages/{stage}.arrow"


def stage_manifest_facts(stage: str) -> str:
    """``cache/stages/<stage>.manifests.json``: the content hash of each manifest the
    stage wrote last time and the schema it was checked against (pipeline.core.runner)."""
    return f"cache/stages/{stage}.manifests.json"
