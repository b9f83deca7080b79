"""Loading the JSON Schemas shipped in ``schemas/``."""

from __future__ import annotations

import functools
import json
from pathlib import Path
from typing import Any

SCHEMA_DIR = Path(__file__).resolve().parent.parent / "schemas"


@functools.cache
def load_schema(name: str) -> dict[str, Any]:
    """The parsed schema ``schemas/<name>.schema.json``."""
    with open(SCHEMA_DIR / f"{name}.schema.json", encoding="utf-8") as fh:
        return json.load(fh)


@functools.cache
def row_validator(name: str) -> Any:
    """One compiled draft 2020-12 validator per schema, reused for every row."""
    from jsonschema import Draft202012Validator

    schema = load_schema(name)
    Draft202012Validator.check_schema(schema)
    return Draft202012Validator(schema)
