"""The stage contract, checked the same way over every registered stage.

Every test below that takes ``stage`` runs once per ``Stage`` in the registry
(``pipeline.stages.STAGES``), so a new stage is checked as soon as it is registered:
its declared outputs are written and valid against their schemas, its rejects are
well-formed, two builds give the same bytes, and a second ``prepare`` reuses it
without touching its files. The corpus is the demo corpus with settings that make
every stage reject something, so no reject check passes for want of rows.
"""

from __future__ import annotations

import ast
import dataclasses
import hashlib
import json
import re
from pathlib import Path

import pytest

from pipeline.core import names
from pipeline.core.codeversion import stage_code
from pipeline.core.config import load_config
from pipeline.core.errors import ParameterError
from pipeline.core.manifest import read_manifest, read_metadata, validate_table
from pipeline.core.runner import Runner
from pipeline.core.stage import Output, Stage
from pipeline.stages import STAGES
from tests.conftest import DEMO, REPO

# Settings under which each stage of the demo rejects at least one input:
# ingest its damaged files (at any settings), audio the 8 kHz files (upsampled),
# text the transcript with a "q" ("Quillabrack", outside the alphabet) and split the
# clips below 25 dB WADA-SNR (wren's noisiest recordings measure 22 to 24 dB).
OVERRIDES = {
    "audio.upsampled": "reject",
    "text.backend": "graphemes",
    "text.alphabet": "abcdefghijklmnoprstuvwxyz",
    "quality.min_snr_db": 25,
    "quality.noisy_action": "reject",
}
EVERY_STAGE = pytest.mark.parametrize("stage", list(STAGES), ids=lambda stage: stage.name)


@dataclasses.dataclass
class Builds:
    first: Path  # built with two workers
    second: Path  # built with one worker, then prepared again
    before_rerun: dict[str, dict[str, tuple[int, int, int, str]]]  # stage -> file -> stat and digest
    ran_again: dict[str, bool]


def stage_files(out: Path, stage: Stage) -> list[str]:
    """Every file the stage wrote: its manifests, rejects, summary and written files."""
    rels = [o.path for o in stage.outputs] + [names.stage_rejects(stage.name), names.stage_summary(stage.name)]
    if stage.written_files is not None:
        written = stage.written_files(out, read_manifest(out / stage.main_manifest))
        rels += written if isinstance(written, list) else written.to_pylist()
    return sorted(set(rels))


def fingerprints(out: Path, stage: Stage) -> dict[str, tuple[int, int, int, str]]:
    found = {}
    for rel in stage_files(out, stage):
        st = (out / rel).stat()
        found[rel] = (st.st_size, st.st_mtime_ns, st.st_ino, hashlib.sha256((out / rel).read_bytes()).hexdigest())
    return found


@pytest.fixture(scope="module")
def builds(tmp_path_factory: pytest.TempPathFactory) -> Builds:
    config = load_config(DEMO / "corpus.toml", overrides=dict(OVERRIDES))
    first = tmp_path_factory.mktemp("contract-first") / "out"
    second = tmp_path_factory.mktemp("contract-second") / "out"
    Runner(DEMO, first, config, stages=STAGES, workers=2).prepare()
    Runner(DEMO, second, config, stages=STAGES, workers=1).prepare()
    before = {stage.name: fingerprints(second, stage) for stage in STAGES}
    records = Runner(DEMO, second, config, stages=STAGES, workers=1).prepare()
    return Builds(first, second, before, {record.name: record.ran for record in records})


@EVERY_STAGE
def test_declared_outputs_are_written_and_valid(stage: Stage, builds: Builds) -> None:
    out = builds.second
    for output in stage.outputs:
        path = out / output.path
        assert path.is_file(), f"{stage.name} declares {output.path} but did not write it"
        validate_table(output.schema, read_manifest(path), where=str(path))
        meta = read_metadata(path)
        assert meta["stage"] == stage.name and meta["schema"] == output.schema
    rejects = out / names.stage_rejects(stage.name)
    validate_table("rejected", read_manifest(rejects), where=str(rejects))
    assert isinstance(json.loads((out / names.stage_summary(stage.name)).read_text(encoding="utf-8")), dict)
    root = out.resolve()
    for rel in stage_files(out, stage):
        assert (out / rel).resolve().is_relative_to(root) and (out / rel).is_file(), rel


@EVERY_STAGE
def test_rejects_are_well_formed(stage: Stage, builds: Builds) -> None:
    out = builds.second
    rows = read_manifest(out / names.stage_rejects(stage.name)).to_pylist()
    assert rows, f"the conformance corpus must make stage {stage.name} reject something: extend OVERRIDES"
    for row in rows:
        assert row["reason"] in names.REASONS, row
        assert row["stage"] == stage.name, row
        assert row["source_path"] and row["detail"].strip(), row
        # A source is a file under RAW, or a line of the metadata table ("metadata.csv:11").
        source_file = re.sub(r":\d+$", "", row["source_path"])
        assert source_file in row["detail"], f"detail does not name its source {source_file!r}: {row['detail']!r}"
    # The runner gathers the stage's rejects, unchanged, into manifests/rejected.parquet.
    gathered = [r for r in read_manifest(out / names.REJECTED).to_pylist() if r["stage"] == stage.name]
    assert gathered == rows


@EVERY_STAGE
def test_stage_is_deterministic(stage: Stage, builds: Builds) -> None:
    """Two builds (two workers, one worker) write the same files with the same bytes."""
    first, second = builds.first, builds.second
    assert stage_files(first, stage) == stage_files(second, stage)
    for rel in stage_files(first, stage):
        assert (first / rel).read_bytes() == (second / rel).read_bytes(), rel


@EVERY_STAGE
def test_stage_is_reused(stage: Stage, builds: Builds) -> None:
    """A second prepare with nothing changed reuses the stage and leaves its files alone;
    a stage that must always run (it reads RAW itself) rewrites the same bytes."""
    after = fingerprints(builds.second, stage)
    before = builds.before_rerun[stage.name]
    assert builds.ran_again[stage.name] == stage.always_run
    if stage.always_run:
        assert {rel: fp[0::3] for rel, fp in after.items()} == {rel: fp[0::3] for rel, fp in before.items()}
    else:
        assert after == before


@EVERY_STAGE
def test_code_version_covers_the_stage(stage: Stage) -> None:
    """The code version starts from the stage's module and hashes its declared schemas."""
    code = stage_code(stage.name)
    assert f"stages/{stage.name}.py" in dict(code.modules)
    assert stage.run.__module__ == f"{STAGES.package}.{stage.name}"
    hashed = dict(code.schemas)
    for output in stage.outputs:
        assert f"schemas/{output.schema}.schema.json" in hashed


def test_every_stage_module_is_registered() -> None:
    """A module of pipeline/stages that declares ``STAGE = Stage(...)`` is in the registry,
    in order."""
    declaring = set()
    for path in (REPO / "pipeline" / "stages").glob("*.py"):
        for node in ast.parse(path.read_text(encoding="utf-8")).body:
            if (isinstance(node, ast.Assign) and [getattr(t, "id", None) for t in node.targets] == ["STAGE"]
                    and isinstance(node.value, ast.Call) and getattr(node.value.func, "id", None) == "Stage"):
                declaring.add(path.stem)
    assert declaring == set(STAGES.order)
    assert [stage.name for stage in STAGES] == list(names.STAGES)


def _run(ctx: object) -> None:
    return None


GOOD = {"name": "text", "inputs": ("ingest",), "config_sections": ("text",), "run": _run,
        "outputs": (Output(names.stage_manifest("text"), schema="text"),)}


@pytest.mark.parametrize(("change", "message"), [
    ({"name": "txet"}, "name='txet' is not one of ingest, audio, text, split"),
    ({"inputs": ("split",)}, "'split' runs after 'text'"),
    ({"inputs": ("ingest", "ingest")}, "an entry is listed twice"),
    ({"inputs": ["ingest"]}, "expected a tuple of non-empty strings"),
    ({"config_sections": ("txt",)}, "'txt' is not one of ingest, audio, text, split, quality, privacy"),
    ({"outputs": ()}, "expected a non-empty tuple of Output"),
    ({"outputs": (Output("../text.parquet", schema="text"),)}, "inside OUT"),
    ({"outputs": (Output(names.REJECTED, schema="rejected"),)}, "written by the runner"),
    ({"outputs": (Output("stages/text.parquet", schema="txt"),)}, "no schemas/txt.schema.json"),
    ({"run": "run"}, "run='run': expected a function"),
    ({"reuse_note": "split changes: none"}, "reuse_note='split changes: none': expected a function or None"),
    ({"always_run": 1}, "always_run=1: expected True or False"),
    ({"inputs_after_run": True}, "inputs_after_run=True without extra_inputs"),
    ({"cleans_folder": "audio/ana"}, "cleans_folder='audio/ana': expected the name of a top-level folder"),
    ({"cleans_folder": ".."}, "cleans_folder='..': expected the name of a top-level folder"),
    ({"cleans_folder": None}, "cleans_folder=None: expected the name of a top-level folder"),
])
def test_a_wrong_declaration_is_named(change: dict[str, object], message: str) -> None:
    with pytest.raises(ParameterError, match=re.escape(message)):
        Stage(**{**GOOD, **change})


def test_a_misspelt_field_is_an_error_not_an_absence() -> None:
    with pytest.raises(TypeError, match="always_rum"):
        Stage(**GOOD, always_rum=True)  # type: ignore[call-arg]
    assert Stage(**GOOD).always_run is False
