"""The shared names agree with the schemas that also spell them."""

from __future__ import annotations

import json
from pathlib import Path

from pipeline.core import names

SCHEMAS = Path(__file__).resolve().parent.parent / "schemas"


def test_reasons_and_stages_are_the_rejected_schema_enums() -> None:
    props = json.loads((SCHEMAS / "rejected.schema.json").read_text())["properties"]
    assert list(names.REASONS) == props["reason"]["enum"]
    assert list(names.STAGES) == props["stage"]["enum"]


def test_subset_column_enum_is_the_subsets() -> None:
    props = json.loads((SCHEMAS / "subset.schema.json").read_text())["properties"]
    assert set(props["subset"]["enum"]) == set(names.SUBSETS)
    assert set(props["quality_flags"]["items"]["enum"]) == set(names.FLAGS)


def test_transcript_origins_are_the_text_and_subset_enums() -> None:
    text = json.loads((SCHEMAS / "text.schema.json").read_text())["properties"]["transcript_origin"]
    subset = json.loads((SCHEMAS / "subset.schema.json").read_text())["properties"]["transcript_origin"]
    assert text["enum"] == list(names.TRANSCRIPT_ORIGINS)
    assert subset["enum"] == [*names.TRANSCRIPT_ORIGINS, None]
