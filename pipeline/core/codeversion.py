"""A stage's code version: one hash of everything besides its inputs and configuration
that can shape the stage's output.

The hash covers:

- every module of the package the stage can execute: the stage's module
  (``pipeline/stages/<stage>.py``) and,
  transitively, every package module it imports, found by parsing the sources with
  ``ast`` (never importing them). Every import counts wherever it is written (Loam
  imports most things inside functions): ``import pipeline.x``, ``from pipeline
  import x``, ``from pipeline.x import y``, relative imports, and
  ``importlib.import_module("pipeline.x")``. Importing a module also runs the
  ``__init__`` of each package above it, so those count too;
- the data files those modules name (a string constant equal to the name of a file in
  ``pipeline/data``, such as ``"abbreviations.tsv"``, or ending in ``data/<name>``);
- the JSON Schemas of the manifests the stage writes: its own, ``rejected``, and any
  other schema a reached module names (such as ``"subset"``);
- the version of every other distribution those modules import or locate
  (``find_spec("g2p_en")``): a library upgrade can change output (a resampler's
  filter, a decoder, number words), and Python's version.

The runner puts it in the stage's parameter hash and every per-file cache of the stage
(ingest's probes, audio's conditioned files, text's pronunciations) puts the same value
in its keys, so no edit within the stage's reach, and no upgrade of a library it uses,
can leave an old manifest or cache entry in use. Nobody keeps a list.

Parsing the modules one stage reaches takes 30 to 90 ms, so what each module's source
says is kept in ``OUT/cache/code-facts.json`` under the hash of that source (and of this
module's own source, which decides what is extracted), and a module is parsed again
only when its bytes change. The result is computed once per process.
"""

from __future__ import annotations

import ast
import contextlib
import functools
import hashlib
import json
import os
import re
import sys
from dataclasses import dataclass
from pathlib import Path

PACKAGE_DIR = Path(__file__).resolve().parent.parent
# The sub-package holding one module per stage: stage ``x`` is ``<package>.stages.x``.
STAGES_PACKAGE = "stages"
FACTS_FILE = "code-facts.json"
_LOADERS = frozenset({"find_spec", "import_module"})
# String constants worth keeping: names and paths of files and schemas, not sentences.
_NAME_LIKE = re.compile(r"[\w./-]{1,200}")


@dataclass(frozen=True)
class ModuleFacts:
    """What one module's source says about the code and files it can use."""

    # Dotted names it imports that start with the package's name (some name attributes,
    # not modules: those are dropped when resolved against the package folder).
    package_imports: tuple[str, ...]
    # Top-level names of other packages it imports or locates (standard library excluded).
    libraries: tuple[str, ...]
    # Its string constants that look like a file or schema name.
    names: tuple[str, ...]


@dataclass(frozen=True)
class StageCode:
    """Everything a stage's code version hashes: (label, sha256 or version) pairs."""

    stage: str
    modules: tuple[tuple[str, str], ...]  # path relative to the package folder
    data_files: tuple[tuple[str, str], ...]
    schemas: tuple[tuple[str, str], ...]
    libraries: tuple[tuple[str, str], ...]  # top-level module name, distribution and version
    python: str

    @functools.cached_property
    def version(self) -> str:
        """16 hex digits of the SHA-256 of all of the above."""
        parts = (self.stage, self.modules, self.data_files, self.schemas, self.libraries, self.python)
        return hashlib.sha256(repr(parts).encode()).hexdigest()[:16]


def module_facts(source: bytes, *, module: str, is_package: bool, package: str) -> ModuleFacts:
    """Parse one module's source for the imports and names it holds.

    Parameters
    ----------
    source : bytes
        The module's source.
    module : str
        Its dotted name (``pipeline.stages.audio``), to resolve relative imports.
    is_package : bool
        Whether it is a package's ``__init__`` (its relative imports start from itself).
    package : str
        The top-level package's name: imports under it are package imports.

    Returns
    -------
    ModuleFacts

    Examples
    --------
    >>> src = b"from . import gates\\ndef f():\\n    import soxr\\n    from pipeline.signal.iir import sosfilt\\n"
    >>> facts = module_facts(src, module="pipeline.stages.split", is_package=False, package="pipeline")
    >>> facts.package_imports
    ('pipeline.signal.iir', 'pipeline.signal.iir.sosfilt', 'pipeline.stages', 'pipeline.stages.gates')
    >>> facts.libraries
    ('soxr',)
    """
    here = module if is_package else module.rpartition(".")[0]
    imported: set[str] = set()
    names: set[str] = set()
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            imported.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = _absolute(node.module, node.level, here)
            imported.add(base)
            imported.update(f"{base}.{alias.name}" for alias in node.names if alias.name != "*")
        elif isinstance(node, ast.Call) and _callee(node.func) in _LOADERS and node.args:
            first = node.args[0]
            if isinstance(first, ast.Constant) and isinstance(first.value, str):
                imported.add(first.value)
        elif isinstance(node, ast.Constant) and isinstance(node.value, str) and _NAME_LIKE.fullmatch(node.value):
            names.add(node.value)
    ours = {name for name in imported if name == package or name.startswith(package + ".")}
    tops = {name.partition(".")[0] for name in imported - ours}
    libraries = {top for top in tops if top and top not in sys.stdlib_module_names and top != "__future__"}
    return ModuleFacts(tuple(sorted(ours)), tuple(sorted(libraries)), tuple(sorted(names)))


def _absolute(module: str | None, level: int, here: str) -> str:
    if level == 0:
        return module or ""
    parts = here.split(".")
    base = ".".join(parts[: len(parts) - (level - 1)])
    return f"{base}.{module}" if module else base


def _callee(func: ast.expr) -> str:
    if isinstance(func, ast.Attribute):
        return func.attr
    return func.id if isinstance(func, ast.Name) else ""


def _module_index(package_dir: Path) -> dict[str, str]:
    """Every module of the package: dotted name -> path relative to the package folder."""
    if package_dir not in _INDEX:
        package = package_dir.name
        index: dict[str, str] = {}
        for folder, dirs, files in os.walk(package_dir):
            dirs[:] = sorted(d for d in dirs if d.isidentifier() and d != "__pycache__")
            rel = Path(folder).relative_to(package_dir)
            prefix = ".".join((package, *rel.parts))
            for file in files:
                stem, dot, suffix = file.partition(".")
                if dot and suffix == "py" and stem.isidentifier():
                    index[prefix if stem == "__init__" else f"{prefix}.{stem}"] = (rel / file).as_posix()
        _INDEX[package_dir] = index
    return _INDEX[package_dir]


_INDEX: dict[Path, dict[str, str]] = {}


class _FactsStore:
    """Module facts by module name and source hash, kept in a JSON file across runs."""

    def __init__(self, path: Path | None) -> None:
        self.path = path
        self.changed = False
        self.entries: dict[str, object] = {}
        if path is not None:
            try:
                data = json.loads(path.read_bytes())
                if data["extractor"] == _extractor_digest():
                    self.entries = dict(data["modules"])
            except (OSError, ValueError, KeyError, TypeError):
                pass  # missing or damaged: every module is parsed and the file rewritten

    def facts(self, name: str, path: Path, package: str) -> tuple[str, ModuleFacts]:
        """The module's source hash and facts (parsed only if this source is new)."""
        source = path.read_bytes()
        sha = hashlib.sha256(source).hexdigest()
        known = _stored_facts(self.entries.get(name), sha)
        if known is not None:
            return sha, known
        facts = module_facts(source, module=name, is_package=path.name == "__init__.py", package=package)
        self.entries[name] = [sha, list(facts.package_imports), list(facts.libraries), list(facts.names)]
        self.changed = True
        return sha, facts

    def save(self) -> None:
        if not self.changed or self.path is None:
            return
        self.changed = False
        from pipeline.core.fsio import write_bytes_atomic

        data = {"extractor": _extractor_digest(), "modules": dict(sorted(self.entries.items()))}
        # Only a speed-up: an OUT that cannot take it costs a parse next time. Not
        # durable: a torn file does not parse and is simply rebuilt.
        with contextlib.suppress(OSError):
            write_bytes_atomic(self.path, json.dumps(data, separators=(",", ":")).encode(), durable=False)


def _stored_facts(entry: object, sha: str) -> ModuleFacts | None:
    if not (isinstance(entry, list) and len(entry) == 4 and entry[0] == sha):
        return None
    lists = entry[1:]
    if not all(isinstance(items, list) and all(isinstance(s, str) for s in items) for items in lists):
        return None
    return ModuleFacts(*(tuple(items) for items in lists))


_EXTRACTOR: list[str] = []


def _extractor_digest() -> str:
    """What decides the facts besides a module's source: this code and Python's parser."""
    if not _EXTRACTOR:
        _EXTRACTOR.append(hashlib.sha256(Path(__file__).read_bytes() + sys.version.encode()).hexdigest())
    return _EXTRACTOR[0]


_MEMO: dict[tuple[str, Path], StageCode] = {}


def stage_code(stage: str, *, package_dir: Path = PACKAGE_DIR, cache_dir: Path | None = None) -> StageCode:
    """What the code version of ``stage`` hashes (computed once per process).

    Parameters
    ----------
    stage : str
        The stage's name; its module is ``<package>.stages.<stage>``.
    package_dir : Path
        The package folder (a copy of it, in tests).
    cache_dir : Path or None
        Where ``code-facts.json`` is kept (``OUT/cache``); None parses every module.

    Returns
    -------
    StageCode

    Examples
    --------
    >>> code = stage_code("text")
    >>> "text/normalise.py" in dict(code.modules), "signal/iir.py" in dict(code.modules)
    (True, False)
    """
    key = (stage, package_dir)
    if key not in _MEMO:
        store = _store(cache_dir)
        _MEMO[key] = _collect(stage, Path(package_dir), store)
        store.save()
    return _MEMO[key]


def code_version(stage: str, *, package_dir: Path = PACKAGE_DIR, cache_dir: Path | None = None) -> str:
    """The code version of ``stage``: ``stage_code(stage).version``."""
    return stage_code(stage, package_dir=package_dir, cache_dir=cache_dir).version


def forget() -> None:
    """Drop this process's results (for a caller that has just edited the sources)."""
    _MEMO.clear()
    _INDEX.clear()
    _STORES.clear()


_STORES: dict[Path | None, _FactsStore] = {}


def _store(cache_dir: Path | None) -> _FactsStore:
    path = None if cache_dir is None else Path(cache_dir) / FACTS_FILE
    if path not in _STORES:
        _STORES[path] = _FactsStore(path)
    return _STORES[path]


def _collect(stage: str, package_dir: Path, store: _FactsStore) -> StageCode:
    package = package_dir.name
    index = _module_index(package_dir)
    start = f"{package}.{STAGES_PACKAGE}.{stage}"
    if start not in index:
        raise ValueError(f"stage={stage!r}: {package_dir} has no module {start}")
    modules: dict[str, str] = {}
    reached: list[ModuleFacts] = []
    todo = [start]
    while todo:
        name = todo.pop()
        if name in modules or name not in index:
            continue  # seen, or an attribute imported from a module
        modules[name], facts = store.facts(name, package_dir / index[name], package)
        reached.append(facts)
        parts = name.split(".")
        todo.extend(".".join(parts[:i]) for i in range(1, len(parts)))
        todo.extend(facts.package_imports)
    names = frozenset().union(*(facts.names for facts in reached))
    libraries = sorted(frozenset().union(*(facts.libraries for facts in reached)))
    return StageCode(
        stage=stage,
        modules=tuple(sorted((index[name], sha) for name, sha in modules.items())),
        data_files=tuple(_hashed(package_dir, f"data/{name}") for name in _files(package_dir / "data")
                         if name in names or any(n.endswith(f"data/{name}") for n in names)),
        schemas=tuple(_hashed(package_dir, f"schemas/{name}.schema.json")
                      for name in _schema_names(stage, names, package_dir)),
        libraries=tuple((name, library_version(name)) for name in libraries),
        python=sys.version,
    )


def _files(folder: Path) -> list[str]:
    try:
        return sorted(entry.name for entry in os.scandir(folder) if entry.is_file())
    except (FileNotFoundError, NotADirectoryError):
        return []


def _hashed(package_dir: Path, label: str) -> tuple[str, str]:
    return label, hashlib.sha256((package_dir / label).read_bytes()).hexdigest()


def _schema_names(stage: str, names: frozenset[str], package_dir: Path) -> list[str]:
    """The schemas of the manifests ``stage`` writes: its own, the rejects', and any other
    schema its modules name, except other stages' (every stage's name appears in the
    config code, as a section) and the config's (its defaults reach the stage through
    the config sections, which are hashed with the parameters)."""
    shipped = {name.removesuffix(".schema.json") for name in _files(package_dir / "schemas")
               if name.endswith(".schema.json")}
    stages = {name for name in shipped if f"{package_dir.name}.{STAGES_PACKAGE}.{name}" in _module_index(package_dir)}
    named = {name for name in shipped & names if name not in stages and name != "config"}
    return sorted(({stage, "rejected"} & shipped) | named)


def library_version(name: str) -> str:
    """The distribution and version that provide the top-level module ``name``.

    The distribution named like the module is looked for first, then the one whose
    ``top_level.txt`` or ``RECORD`` lists it (``webrtcvad`` comes from
    ``webrtcvad-wheels``). Read from the installed ``.dist-info`` folders, without
    importing anything (``importlib.metadata`` took 0.5 ms a name, and 0.23 s to map
    every module to its distribution).

    Examples
    --------
    >>> import importlib.metadata
    >>> library_version("numpy") == "numpy " + importlib.metadata.version("numpy")
    True
    >>> library_version("surely_no_such_module")
    'not installed'
    """
    if name not in _VERSIONS:
        _VERSIONS[name] = _find_version(name)
    return _VERSIONS[name]


_VERSIONS: dict[str, str] = {}
_DIST_INFOS: list[tuple[str, str]] = []  # (folder on sys.path, "<name>-<version>.dist-info")
_BY_NAME: dict[str, str] = {}  # normalised distribution name -> label, first on sys.path


def _find_version(name: str) -> str:
    import importlib.util

    if not _DIST_INFOS:
        _DIST_INFOS.extend((entry, sub) for entry in sys.path for sub in _folders(entry or ".")
                           if sub.endswith(".dist-info"))
        for _, dist_info in reversed(_DIST_INFOS):
            _BY_NAME[_normalised(dist_info.partition("-")[0])] = _dist_label(dist_info)
    if _normalised(name) in _BY_NAME:
        return _BY_NAME[_normalised(name)]
    if importlib.util.find_spec(name) is None:
        return "not installed"
    for listing in ("top_level.txt", "RECORD"):
        for entry, dist_info in _DIST_INFOS:
            if _lists_module(Path(entry or ".", dist_info, listing), name):
                return _dist_label(dist_info)
    return "installed, version unknown"


def _lists_module(path: Path, name: str) -> bool:
    try:
        lines = path.read_text(encoding="utf-8").splitlines()
    except OSError:
        return False
    if path.name == "top_level.txt":
        return name in (line.strip() for line in lines)
    # RECORD: "<path>,<hash>,<size>"; a module is "<name>.py", "<name>.<abi>.so" or "<name>/...".
    return any(re.match(rf"{re.escape(name)}(/|\.[^/,]*,)", line) for line in lines)


def _dist_label(dist_info: str) -> str:
    # The folder is "<name>-<version>.dist-info" (the wheel format, PEP 427).
    dist, _, version = dist_info.removesuffix(".dist-info").partition("-")
    return f"{dist} {version}"


def _normalised(name: str) -> str:
    return re.sub(r"[-_.]+", "_", name).lower()


def _folders(entry: str) -> list[str]:
    try:
        return sorted(item.name for item in os.scandir(entry) if item.is_dir())
    except OSError:
        return []
