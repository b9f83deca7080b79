"""No manifest column may hide behind a pandas.DataFrame attribute.

pandas gives a column attribute access (``df.speaker``) only when the name is not
already an attribute of DataFrame; otherwise ``df.<name>`` silently returns the
attribute, not the column (pandas user guide, "Indexing and selecting data",
section "Attribute access"). A manifest column named ``flags`` once did exactly that
(``DataFrame.flags``), so every schema's columns are checked here.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest

SCHEMAS = sorted((Path(__file__).resolve().parent.parent / "schemas").glob("*.schema.json"))
DATAFRAME_ATTRIBUTES = frozenset(dir(pd.DataFrame))


def clashes(schema_file: Path) -> list[str]:
    """Top-level property names of a schema (a manifest's columns) that DataFrame already has."""
    properties = json.loads(schema_file.read_text(encoding="utf-8")).get("properties", {})
    return sorted(name for name in properties if name in DATAFRAME_ATTRIBUTES)


def test_every_schema_is_checked() -> None:
    names = {p.name for p in SCHEMAS}
    assert {"ingest.schema.json", "audio.schema.json", "text.schema.json", "subset.schema.json",
            "rejected.schema.json", "config.schema.json"} <= names


@pytest.mark.parametrize("schema_file", SCHEMAS, ids=lambda p: p.name)
def test_no_column_shadows_a_dataframe_attribute(schema_file: Path) -> None:
    assert clashes(schema_file) == [], (
        f"{schema_file.name}: column(s) {clashes(schema_file)} are pandas.DataFrame attributes; "
        "df.<name> would return the attribute, not the column: rename them")


def test_the_check_sees_a_clash(tmp_path: Path) -> None:
    # The name that once clashed, and two more DataFrame members a column might be called.
    bad = tmp_path / "bad.schema.json"
    bad.write_text(json.dumps({"properties": {"clip_id": {}, "flags": {}, "sample": {}, "size": {}}}))
    assert clashes(bad) == ["flags", "sample", "size"]
    frame = pd.DataFrame({"flags": [["noisy"]]})
    assert not isinstance(frame.flags, pd.Series)  # what the check guards against
