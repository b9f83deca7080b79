"""The stage contract.

A stage is a module under ``pipeline/stages/`` exposing:

``NAME``            the stage name (``OUT/stages/<NAME>.parquet`` is its manifest);
``INPUTS``          names of the upstream stages whose manifests it reads;
``CONFIG_SECTIONS`` config sections its output depends on (plus ``seed``);
``run(ctx) -> StageResult``.

Its code version is derived, never declared: ``pipeline.core.codeversion`` hashes every
package module the stage can execute (found from the imports in the sources), the data
files and schemas they use, and the versions of the libraries they import.

Optional: ``prepare_driver(config)`` loads into this process what the stage's work
will need (imports, tables), so that workers forked later inherit it; the runner calls
it while an earlier stage waits for its pool, when this process would be idle anyway.

Optional: ``written_files(out, table) -> list[str]``, the files besides manifests the
stage wrote (paths relative to OUT, e.g. its audio clips), given its main manifest.
The runner records the stat of those and of every manifest the stage wrote in
``OUT/cache/stages/<NAME>.json``, and reuses the stage only while they all match, so
a deleted clip or an edited manifest makes the stage run again.

The stages are found through a ``StageRegistry`` (``pipeline.stages.STAGES``), which the
commands hand to the runner: ``pipeline.core`` never imports a stage by name.

The runner hands the stage its validated input tables in ``ctx.inputs``, and
validates and writes whatever the stage returns. A stage never writes a
manifest itself; it may write other files (audio, lexicons) through
``pipeline.core.fsio.atomic_output``.
"""

from __future__ import annotations

import importlib
import logging
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from types import ModuleType
from typing import Any

import pyarrow as pa

from pipeline.core.config import Config
from pipeline.core.errors import UsageError
from pipeline.core.manifest import table_from_rows


@dataclass(frozen=True)
class StageRegistry:
    """The stages a runner may run: their names in running order, and the package that
    holds one module per stage (imported only when the runner needs it).

    Examples
    --------
    >>> registry = StageRegistry(order=("ingest", "audio"), package="pipeline.stages")
    >>> registry.module("ingest").NAME
    'ingest'
    >>> registry.module("mix")
    Traceback (most recent call last):
    ...
    pipeline.core.errors.UsageError: unknown stage 'mix'; stages are: ingest, audio
    """

    order: tuple[str, ...]
    package: str

    def module(self, name: str) -> ModuleType:
        """The module of stage ``name`` (UsageError for a name not in ``order``)."""
        if name not in self.order:
            raise UsageError(f"unknown stage {name!r}; stages are: {', '.join(self.order)}")
        return importlib.import_module(f"{self.package}.{name}")

    def manifest_path(self, name: str) -> str:
        """The stage's main manifest (``MAIN_MANIFEST`` in its module, else stages/<name>.parquet)."""
        return getattr(self.module(name), "MAIN_MANIFEST", f"stages/{name}.parquet")


@dataclass
class StageContext:
    raw: Path
    out: Path
    config: Config
    inputs: dict[str, pa.Table]
    workers: int
    scheduler: str = ""
    progress: bool = False
    log: logging.Logger = field(default_factory=lambda: logging.getLogger("loam"))
    # Whether to use and fill the per-file caches under OUT/cache.
    use_cache: bool = True
    # Options that do not come from the config file (e.g. --fresh for the ledger).
    options: dict[str, Any] = field(default_factory=dict)
    # Later stages the runner can run in this process while this one waits for its
    # workers; a stage with a pool hands it to map_ordered(meanwhile=...).
    meanwhile: Callable[[], None] | None = None

    @property
    def cache_dir(self) -> Path:
        return self.out / "cache"


@dataclass
class StageResult:
    """What a stage hands back to the runner.

    ``manifests`` maps a path relative to OUT to (schema name, table); the stage's
    main manifest is ``stages/<NAME>.parquet``. ``rejects`` are rows of the
    ``rejected`` schema. ``summary`` (JSON-ready) is written to
    ``stages/<NAME>.summary.json`` for the report, and ``metadata`` is added to every
    manifest's Parquet key-value metadata: both must depend only on RAW, the config
    and the ledger, like the manifests. ``run_stats`` holds what depends on this run's
    history instead (files reused from the cache or processed, orphans removed, cache
    hits): the runner logs it and keeps it in ``logs/last-run.json``, never in OUT's
    outputs, which are compared, hashed and shipped.
    """

    manifests: dict[str, tuple[str, pa.Table]]
    rejects: list[dict[str, Any]] = field(default_factory=list)
    summary: dict[str, Any] = field(default_factory=dict)
    metadata: dict[str, str] = field(default_factory=dict)
    run_stats: dict[str, Any] = field(default_factory=dict)
    # Non-empty: a sentence saying why the run must stop (exit 1) once this stage's
    # outputs and the rejects are written, e.g. every input unreadable.
    stop: str = ""

    def rejects_table(self) -> pa.Table:
        return table_from_rows("rejected", self.rejects)


def reject(stage: str, source_path: str, reason: str, detail: str, clip_id: str | None = None) -> dict[str, Any]:
    """One row for ``rejected.parquet``: a reason code and a sentence a person can act on."""
    return {"source_path": source_path, "reason": reason, "detail": detail, "stage": stage, "clip_id": clip_id}

