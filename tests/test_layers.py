"""The package's layers and the directions of their imports (DEVELOPERS.md, "Layers").

Every module under pipeline/ is parsed with ``ast``, imports inside functions included,
and each import of a package module must point at the module's own layer or one it
may use:

- ``core`` imports only core (the runner finds stages through the registry it is given);
- ``signal`` imports core and signal; ``text`` imports core and text;
- ``stages`` import core, signal, text and stages;
- ``commands`` import anything.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

from tests.conftest import REPO

PACKAGE = REPO / "pipeline"
ALLOWED = {
    "core": {"core"},
    "signal": {"core", "signal"},
    "text": {"core", "text"},
    "stages": {"core", "signal", "text", "stages"},
    "commands": {"core", "signal", "text", "stages", "commands"},
}
# Modules outside the layers: the package's own __init__ (the version) and __main__.
TOP_LEVEL = {"pipeline", "pipeline.__main__"}


def _module_name(path: Path, package_dir: Path) -> str:
    rel = path.relative_to(package_dir.parent).with_suffix("")
    parts = rel.parts[:-1] if rel.name == "__init__" else rel.parts
    return ".".join(parts)


def imported_names(source: str, *, module: str, is_package: bool) -> list[tuple[int, str]]:
    """(line, dotted name) of every import in ``source``, relative ones made absolute;
    ``from a import b`` gives ``a.b`` (b may be a module)."""
    here = module if is_package else module.rpartition(".")[0]
    found: list[tuple[int, str]] = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            found += [(node.lineno, alias.name) for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                parts = here.split(".")
                base = ".".join(parts[: len(parts) - (node.level - 1)])
                base = f"{base}.{node.module}" if node.module else base
            else:
                base = node.module or ""
            found += [(node.lineno, f"{base}.{alias.name}") for alias in node.names]
        elif (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
              and node.func.attr == "import_module" and node.args
              and isinstance(node.args[0], ast.Constant) and isinstance(node.args[0].value, str)):
            found.append((node.lineno, node.args[0].value))
    return found


def _layer(dotted: str) -> str | None:
    """The layer of a name under ``pipeline`` (None for the package itself)."""
    parts = dotted.split(".")
    return parts[1] if len(parts) > 1 and parts[1] in ALLOWED else None


def violations(package_dir: Path) -> list[str]:
    """Every import that goes against the directions above, as 'file:line: what'."""
    found: list[str] = []
    for path in sorted(package_dir.rglob("*.py")):
        module = _module_name(path, package_dir)
        source = path.read_text(encoding="utf-8")
        layer = _layer(module)
        if layer is None:
            if module not in TOP_LEVEL:
                found.append(f"{path.relative_to(package_dir.parent)}: outside every layer")
            continue
        for line, name in imported_names(source, module=module, is_package=path.name == "__init__.py"):
            if name != "pipeline" and not name.startswith("pipeline."):
                continue
            target = _layer(name)
            if target is None:
                if name not in ("pipeline", "pipeline.__version__"):
                    found.append(f"{path.relative_to(package_dir.parent)}:{line}: {name} is in no layer")
            elif target not in ALLOWED[layer]:
                found.append(f"{path.relative_to(package_dir.parent)}:{line}: {layer} imports {name}")
    return found


def test_every_import_goes_down_the_layers() -> None:
    assert violations(PACKAGE) == []


def test_every_layer_is_a_folder_with_modules() -> None:
    for layer in ALLOWED:
        assert (PACKAGE / layer / "__init__.py").is_file()
        assert len(list((PACKAGE / layer).glob("*.py"))) > 1


def _copy(tmp_path: Path) -> Path:
    dest = tmp_path / "pipeline"
    for path in PACKAGE.rglob("*.py"):
        target = dest / path.relative_to(PACKAGE)
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_text(path.read_text(encoding="utf-8"), encoding="utf-8")
    return dest


@pytest.mark.parametrize(("rel", "line", "expected"), [
    ("core/runner.py", "from pipeline.stages.split import run\n", "core imports pipeline.stages.split.run"),
    ("signal/vad.py", "def f():\n    from pipeline.text import normalise\n",
     "signal imports pipeline.text.normalise"),
    ("text/pronounce.py", "def f():\n    import pipeline.signal.loudness\n", "text imports pipeline.signal.loudness"),
    ("stages/split.py", "from ..commands import validate\n", "stages imports pipeline.commands.validate"),
    ("core/cache.py", "import importlib\nimportlib.import_module('pipeline.stages.audio')\n",
     "core imports pipeline.stages.audio"),
])
def test_an_import_against_the_layers_is_found(rel: str, line: str, expected: str, tmp_path: Path) -> None:
    package = _copy(tmp_path)
    assert violations(package) == []
    with (package / rel).open("a", encoding="utf-8") as handle:
        handle.write("\n" + line)
    (found,) = violations(package)
    assert found.startswith(f"pipeline/{rel}:") and found.endswith(expected)


def test_a_module_outside_the_layers_is_found(tmp_path: Path) -> None:
    package = _copy(tmp_path)
    (package / "helpers.py").write_text("X = 1\n", encoding="utf-8")
    assert violations(package) == ["pipeline/helpers.py: outside every layer"]
