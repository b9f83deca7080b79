"""The README's config reference, generated from ``schemas/config.schema.json``.

``python -m pipeline.commands.docs`` prints it; a test checks the README carries it verbatim.
"""

from __future__ import annotations

import json
from typing import Any

from pipeline.core.config import _describe_allowed
from pipeline.core.schemas_io import load_schema


def _row(key: str, prop: dict[str, Any]) -> str:
    default = json.dumps(prop.get("default"), ensure_ascii=False)
    allowed = _describe_allowed(prop).replace("|", "\\|")
    text = prop.get("description", "").replace("|", "\\|")
    return f"| `{key}` | `{default}` | {allowed} | {text} |"


def config_reference_markdown() -> str:
    schema = load_schema("config")
    lines = ["| key | default | allowed | meaning |", "|---|---|---|---|"]
    for section, node in schema["properties"].items():
        if "properties" in node:
            lines.extend(_row(f"{section}.{key}", prop) for key, prop in node["properties"].items())
        else:
            lines.append(_row(section, node))
    return "\n".join(lines) + "\n"


if __name__ == "__main__":
    print(config_reference_markdown(), end="")
