"""The distribution name and the README's install lines.

``loam`` on the package index (pypi.org) is an unrelated project, so Loam's
distribution has its own name, and the README installs from a checkout until it is
published; the command stays ``loam``.
"""

from __future__ import annotations

import re
import sys
from pathlib import Path

if sys.version_info >= (3, 11):
    import tomllib
else:
    import tomli as tomllib

ROOT = Path(__file__).resolve().parent.parent


def test_distribution_name_is_not_the_taken_one_and_the_command_is_loam() -> None:
    project = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["project"]
    assert project["name"] == "loam-speech"
    assert project["scripts"] == {"loam": "pipeline.commands.cli:console"}
    assert "cluster" in project["optional-dependencies"]


def test_every_pip_install_in_the_readme_installs_from_a_checkout_or_a_third_party_package() -> None:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    targets = [t.strip("`'\"") for t in re.findall(r"pip install (?:-e )?('[^']+'|\S+)", readme)]
    assert {".", ".[cluster]"} <= set(targets), targets
    for target in targets:
        # A checkout ('.', '.[extra]') or a named third-party package; never the index's "loam".
        assert target.startswith(".") or not re.match(r"loam\b", target), target
    assert "'loam[" not in (ROOT / "pipeline" / "core" / "parallel.py").read_text(encoding="utf-8")
