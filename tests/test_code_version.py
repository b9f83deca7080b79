"""Code versions (pipeline.core.codeversion): a stage's version covers every package module
it can execute, found from the imports in the sources, with the data files, schemas and
libraries they use; an edit within a stage's reach reruns it and misses its per-file
caches, an edit outside leaves it reused."""

from __future__ import annotations

import importlib.metadata
import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from pipeline.core import codeversion
from pipeline.core.codeversion import code_version, library_version, stage_code
from tests.conftest import REPO

STAGES = ("ingest", "audio", "text", "split")


@pytest.fixture(autouse=True)
def _fresh() -> None:
    # Versions are computed once per process; these tests edit sources between calls.
    codeversion.forget()


def _copy_package(dest: Path) -> Path:
    """A copy of the repository's pipeline/ and schemas/ under ``dest``; returns the package folder."""
    shutil.copytree(REPO / "schemas", dest / "schemas")
    shutil.copytree(REPO / "pipeline", dest / "pipeline", symlinks=True,
                    ignore=shutil.ignore_patterns("__pycache__"))
    return dest / "pipeline"


def _versions(package: Path, cache_dir: Path | None = None) -> dict[str, str]:
    codeversion.forget()
    return {s: code_version(s, package_dir=package, cache_dir=cache_dir) for s in STAGES}


def _write(path: Path, files: dict[str, str]) -> Path:
    for rel, text in files.items():
        (path / rel).parent.mkdir(parents=True, exist_ok=True)
        (path / rel).write_text(text, encoding="utf-8")
    return path


def test_every_form_of_import_is_followed(tmp_path: Path) -> None:
    package = _write(tmp_path / "pkg", {
        "__init__.py": "CONSTANT = 1\n",
        "stages/__init__.py": "",
        "stages/stagex.py": (
            "import importlib\n"
            "import pkg.a\n"
            "from pkg import b, CONSTANT\n"
            "from pkg.c import thing\n"
            "from .. import d\n"
            "from ..e import thing as other\n"
            "def later():\n"
            "    import pkg.f as f\n"
            "    from ..sub import h\n"
            "    return importlib.import_module('pkg.g')\n"
        ),
        "a.py": "from pkg import j\n", "b.py": "", "c.py": "thing = 1\n", "d.py": "", "e.py": "thing = 2\n",
        "f.py": "", "g.py": "", "j.py": "", "i.py": "",
        "sub/__init__.py": "", "sub/h.py": "from .. import i\n",
        "unused.py": "import pkg.stages.stagex\n",
    })
    modules = dict(stage_code("stagex", package_dir=package).modules)
    assert sorted(modules) == ["__init__.py", "a.py", "b.py", "c.py", "d.py", "e.py", "f.py", "g.py", "i.py",
                               "j.py", "stages/__init__.py", "stages/stagex.py", "sub/__init__.py", "sub/h.py"]


def test_data_files_named_by_a_reached_module_are_hashed(tmp_path: Path) -> None:
    package = _write(tmp_path / "pkg", {
        "__init__.py": "",
        "stages/stagex.py": "from pathlib import Path\nfrom pkg import helper\nWORDS = Path(__file__).parent / 'data/words.tsv'\n",
        "helper.py": "from pathlib import Path\nTABLE = Path(__file__).parent / 'data' / 'table.tsv'\n",
        "other.py": "NAME = 'unused.tsv'\n",
        "data/words.tsv": "a\n", "data/table.tsv": "b\n", "data/unused.tsv": "c\n",
    })
    assert dict(stage_code("stagex", package_dir=package).data_files).keys() == {"data/table.tsv", "data/words.tsv"}


def test_libraries_imported_or_located_are_versioned(tmp_path: Path) -> None:
    package = _write(tmp_path / "pkg", {
        "__init__.py": "",
        "stages/stagex.py": "import os\nimport importlib.util\ndef f():\n    import numpy\n"
                            "    return importlib.util.find_spec('soxr')\n",
    })
    code = stage_code("stagex", package_dir=package)
    # Reference: importlib.metadata, the standard library's reader of the same records.
    assert code.libraries == (("numpy", f"numpy {importlib.metadata.version('numpy')}"),
                              ("soxr", f"soxr {importlib.metadata.version('soxr')}"))


@pytest.mark.parametrize("module", ["webrtcvad", "_webrtcvad"])
def test_a_module_from_a_distribution_named_otherwise_is_found(module: str) -> None:
    # webrtcvad and its extension _webrtcvad (which the audio stage imports) are installed
    # by a distribution of another name; packages_distributions() (the standard
    # library's full mapping) is the reference.
    (dist,) = importlib.metadata.packages_distributions()[module]
    assert library_version(module).split() == [dist.replace("-", "_"), importlib.metadata.version(dist)]


def test_what_each_stage_reaches_in_this_package() -> None:
    reach = {s: dict(stage_code(s).modules) for s in STAGES}
    assert {"text/normalise.py", "text/pronounce.py", "text/neural.py", "text/pos.py", "text/cmudict_index.py",
            "text/lexicon.py", "text/characters.py"} <= set(reach["text"])
    assert "signal/iir.py" in reach["audio"] and "signal/loudness.py" in reach["audio"]
    assert "stages/ledger.py" in reach["split"] and "stages/selection.py" in reach["split"]
    for s in STAGES:
        assert {"__init__.py", "stages/__init__.py", f"stages/{s}.py", "core/stage.py",
                "core/manifest.py"} <= set(reach[s])
        assert not {"commands/cli.py", "commands/report.py", "commands/validate.py",
                    "core/runner.py"} & set(reach[s])
    audio = dict(stage_code("audio").libraries)
    assert {"numpy", "soxr", "soundfile", "_webrtcvad"} <= set(audio)
    assert dict(stage_code("text").data_files).keys() == {"data/abbreviations.tsv"}
    assert dict(stage_code("split").schemas).keys() == {"schemas/rejected.schema.json", "schemas/subset.schema.json"}


# (file edited in a copy of the package, how, the stages whose version must change)
EDITS = [
    ("text/normalise.py", ("} percent\"", "} per cent\""), {"text"}),
    ("text/pronounce.py", None, {"text"}),
    ("text/neural.py", None, {"text"}),
    ("text/pos.py", None, {"text"}),
    ("text/cmudict_index.py", None, {"text"}),
    ("data/abbreviations.tsv", None, {"text"}),
    ("signal/iir.py", None, {"audio"}),
    ("signal/vad.py", None, {"audio"}),
    # The audio stage reads the private source mapping and scrubs its rejects with privacy's helpers.
    # split pseudonymises the balance table's speakers (split.balance_table) as ingest does.
    ("stages/privacy.py", None, {"ingest", "audio", "split"}),
    ("stages/speakers.py", None, {"ingest", "split"}),
    ("stages/transcripts.py", None, {"ingest"}),
    # The text stage finds the review decisions beside the ledger (stages/decisions.py).
    ("stages/ledger.py", None, {"text", "split"}),
    ("stages/review_apply.py", None, {"text", "split"}),
    ("stages/review_text.py", None, {"text"}),
    ("stages/selection.py", None, {"split"}),
    ("stages/gates.py", None, {"split"}),
    ("core/pool.py", None, {"ingest", "audio", "split"}),
    ("core/forked.py", None, {"split"}),
    ("signal/snr.py", None, {"audio"}),
    ("signal/bandwidth.py", None, {"audio"}),
    ("signal/fingerprint.py", None, {"audio", "split"}),
    # The search for pairs is the split stage's alone: the audio stage computes fingerprints only.
    ("signal/added_search.py", None, {"split"}),
    ("signal/pair_similarity.py", None, {"split"}),
    ("signal/arrays.py", None, {"audio", "split"}),
    ("core/manifest.py", None, set(STAGES)),
    ("__init__.py", None, set(STAGES)),
    ("stages/__init__.py", None, set(STAGES)),
    ("core/runner.py", None, set()),
    ("../schemas/text.schema.json", None, {"text"}),
    ("../schemas/subset.schema.json", None, {"split"}),
    ("../schemas/rejected.schema.json", None, set(STAGES)),
    ("../schemas/config.schema.json", None, set()),
    ("commands/report.py", None, set()),
    ("commands/validate.py", None, set()),
    ("commands/cli.py", None, set()),
]


@pytest.mark.parametrize(("rel", "change", "expected"), EDITS, ids=[e[0] for e in EDITS])
def test_an_edit_changes_exactly_the_versions_of_the_stages_that_reach_it(
        rel: str, change: tuple[str, str] | None, expected: set[str], tmp_path: Path) -> None:
    package = _copy_package(tmp_path)
    before = _versions(package, tmp_path / "cache")
    path = package / rel
    text = path.read_text(encoding="utf-8")
    if change is None:
        text += "\n# edited\n" if path.suffix == ".py" else "\n"
    else:
        assert change[0] in text
        text = text.replace(change[0], change[1], 1)
    path.write_text(text, encoding="utf-8")
    after = _versions(package, tmp_path / "cache")
    assert {s for s in STAGES if after[s] != before[s]} == expected
    # The facts kept in OUT/cache give what a fresh parse gives.
    assert _versions(package) == after


@pytest.mark.parametrize(("rel", "changes"), [
    ("stages/split.py", False), ("stages/selection.py", False),
    ("stages/duplicate_cache.py", True), ("signal/added_search.py", True),
    ("signal/pair_similarity.py", True), ("signal/fingerprint.py", True),
    # The fingerprints are made by the audio stage's per-file work, not its driver or cache.
    ("stages/audio.py", False), ("stages/audio_cache.py", False), ("stages/audio_file.py", True),
    ("signal/loudness.py", True),
])
def test_the_near_duplicate_cache_scope_covers_the_search_not_the_split_stage(
        rel: str, changes: bool, tmp_path: Path) -> None:
    # pipeline/stages/duplicate_cache.py puts the versions of its own reach and of the
    # fingerprints' maker in its cache's scope.
    from pipeline.stages.duplicate_cache import FINGERPRINT_MODULE, SCOPE_MODULE

    def scope() -> tuple[str, str]:
        codeversion.forget()
        return (code_version(SCOPE_MODULE, package_dir=package), code_version(FINGERPRINT_MODULE, package_dir=package))

    package = _copy_package(tmp_path)
    before = scope()
    (package / rel).write_text((package / rel).read_text(encoding="utf-8") + "\n# edited\n", encoding="utf-8")
    assert (scope() != before) is changes


# (file edited, whether the audio outcome cache's scope changes): the per-file work
# and all it reaches, not the stage's driver, its cache code or the worker pool.
OUTCOME_SCOPE_EDITS = [
    ("stages/audio_file.py", True), ("signal/iir.py", True), ("signal/loudness.py", True),
    ("signal/fingerprint.py", True), ("signal/decode.py", True), ("stages/alignment.py", True),
    ("text/speech.py", True), ("core/config.py", True), ("core/stage.py", True),
    ("stages/audio.py", False), ("stages/audio_cache.py", False), ("core/pool.py", False),
    ("core/parallel.py", False), ("core/cache.py", False), ("stages/privacy.py", False),
    ("core/runner.py", False), ("stages/split.py", False),
]


@pytest.mark.parametrize(("rel", "changes"), OUTCOME_SCOPE_EDITS, ids=[e[0] for e in OUTCOME_SCOPE_EDITS])
def test_the_audio_outcome_scope_covers_the_per_file_work_not_the_driver(
        rel: str, changes: bool, tmp_path: Path) -> None:
    # pipeline/stages/audio_cache.outcome_code puts the version of PER_FILE_MODULE's reach
    # (with the table's schema) in the outcome table's scope.
    from pipeline.stages.audio_cache import PER_FILE_MODULE

    package = _copy_package(tmp_path)
    codeversion.forget()
    before = code_version(PER_FILE_MODULE, package_dir=package), code_version("audio", package_dir=package)
    _edit(package / rel)
    codeversion.forget()
    after = code_version(PER_FILE_MODULE, package_dir=package), code_version("audio", package_dir=package)
    assert (after[0] != before[0]) is changes
    # Whatever the per-file work reaches, the stage reaches: its version changes too.
    assert not changes or after[1] != before[1]


def test_the_fingerprints_scope_names_the_audio_per_file_module() -> None:
    # duplicate_cache spells the module's name rather than import audio_cache (whose code
    # would then be in the near-duplicate cache's scope): the two must agree.
    from pipeline.stages.audio_cache import PER_FILE_MODULE
    from pipeline.stages.duplicate_cache import FINGERPRINT_MODULE

    assert FINGERPRINT_MODULE == PER_FILE_MODULE
    assert {"signal/fingerprint.py", f"stages/{PER_FILE_MODULE}.py"} <= set(dict(stage_code(PER_FILE_MODULE).modules))


def test_a_damaged_facts_file_is_rebuilt(tmp_path: Path) -> None:
    package = _copy_package(tmp_path)
    fresh = _versions(package)
    facts = tmp_path / "cache" / codeversion.FACTS_FILE
    facts.parent.mkdir()
    facts.write_text('{"extractor": 1, "modules": [', encoding="utf-8")
    assert _versions(package, facts.parent) == fresh
    assert json.loads(facts.read_text(encoding="utf-8"))["modules"]
    # An entry whose hash matches but whose content is the wrong shape is parsed again.
    data = json.loads(facts.read_text(encoding="utf-8"))
    data["modules"] = {name: [entry[0], "x", 3] for name, entry in data["modules"].items()}
    facts.write_text(json.dumps(data), encoding="utf-8")
    assert _versions(package, facts.parent) == fresh


def _prepare(src: Path, raw: Path, out: Path) -> str:
    """``loam prepare`` run from the copied package; returns its log (stderr)."""
    env = {**os.environ, "PYTHONPATH": str(src)}
    done = subprocess.run([sys.executable, "-m", "pipeline", "prepare", str(raw), str(out), "--workers", "1",
                           "--no-progress"], capture_output=True, text=True, cwd=src, env=env)
    assert done.returncode == 0, done.stderr
    return done.stderr


def _reused(log: str) -> set[str]:
    return {s for s in STAGES if re.search(rf"^.*\b{s}\s+reused: ", log, re.MULTILINE)}


def _texts(out: Path) -> list[str]:
    return pq.read_table(out / "stages/text.parquet")["norm_text"].to_pylist()


def _edit(path: Path, old: str | None = None, new: str = "") -> None:
    text = path.read_text(encoding="utf-8")
    path.write_text(text + "\n# edited\n" if old is None else text.replace(old, new, 1), encoding="utf-8")


@pytest.mark.slow
def test_editing_a_helper_reruns_its_stage_and_only_its_stage(small_raw: Path, tmp_path: Path) -> None:
    src = tmp_path / "src"
    package = _copy_package(src)
    env = {**os.environ, "PYTHONPATH": str(src)}
    where = subprocess.run([sys.executable, "-c", "import pipeline; print(pipeline.__file__)"],
                           capture_output=True, text=True, cwd=src, env=env, check=True).stdout
    assert Path(where.strip()).parent == package
    (small_raw / "spk_a" / "a1.txt").write_text("up 40% on the day\n", encoding="utf-8")
    out = tmp_path / "out"
    _prepare(src, small_raw, out)
    assert "up forty percent on the day" in _texts(out)
    audio_bytes = (out / "stages/audio.parquet").read_bytes()

    # The number words: the text stage runs again and says "per cent"; audio is reused.
    _edit(package / "text/normalise.py", '} percent"', '} per cent"')
    log = _prepare(src, small_raw, out)
    assert _reused(log) == {"audio"}
    assert "up forty per cent on the day" in _texts(out)
    assert (out / "stages/audio.parquet").read_bytes() == audio_bytes

    # A filter helper of audio's: audio runs and conditions every file again (its cache
    # missed). Text and split run too: they read audio's manifest, which records its new
    # code version (text reads it for the clips of long aligned sources).
    _edit(package / "signal/iir.py")
    log = _prepare(src, small_raw, out)
    assert _reused(log) == set()
    assert re.search(r"audio: [1-9]\d* files processed, 0 reused from cache", log)

    # The audio stage's driver (how it lists, reuses and records): audio runs, as its
    # version changed, but conditions nothing again (its outcome cache's scope is the
    # per-file work's reach, pipeline/stages/audio_file.py); its manifest holds the same
    # rows (its metadata records the new code version).
    rows = pq.read_table(out / "stages/audio.parquet").replace_schema_metadata(None)
    _edit(package / "stages/audio.py")
    log = _prepare(src, small_raw, out)
    assert re.search(r"audio: 0 files processed, [1-9]\d* reused from cache", log)
    assert pq.read_table(out / "stages/audio.parquet").replace_schema_metadata(None).equals(rows)

    # An ingest-only helper outside the probe's reach: the probes stand (they depend on the
    # bytes and on pipeline/stages/ingest_probe.py's reach), every row is decided again.
    # Its manifest records the new code version, so the later stages run, but audio's
    # per-file cache still holds.
    _edit(package / "stages/transcripts.py")
    log = _prepare(src, small_raw, out)
    assert re.search(r"ingest: 0 files probed, [1-9]\d* reused from cache", log)
    assert re.search(r"ingest: 0 rows reused, [1-9]\d* files followed one by one", log)
    assert re.search(r"audio: 0 files processed, [1-9]\d* reused from cache", log)
    # The probe's own module: every file is probed again.
    _edit(package / "stages/ingest_probe.py")
    log = _prepare(src, small_raw, out)
    assert re.search(r"ingest: [1-9]\d* files probed, 0 reused from cache", log)
    assert re.search(r"audio: 0 files processed, [1-9]\d* reused from cache", log)

    # The split ledger's module: split runs, and text, which finds the review decisions
    # beside the ledger; audio is reused.
    _edit(package / "stages/ledger.py")
    log = _prepare(src, small_raw, out)
    assert _reused(log) == {"audio"}
    assert re.search(r"ingest: 0 files probed, [1-9]\d* reused from cache", log)

    # A module no stage uses: a full run (the no-change check sees every source), in
    # which every stage is reused.
    _edit(package / "commands/report.py")
    log = _prepare(src, small_raw, out)
    assert _reused(log) == {"audio", "text", "split"}
    assert "nothing changed since the last run" not in log
    assert "nothing changed since the last run" in _prepare(src, small_raw, out)


def test_the_no_change_check_sees_everything_a_code_version_covers(tmp_path: Path,
                                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    from pipeline.core import snapshot

    listed = set(snapshot._package_files())
    installed = set(snapshot._distributions())
    for s in STAGES:
        code = stage_code(s)
        assert {label for label, _ in code.modules + code.data_files + code.schemas} <= listed
        for _, found in code.libraries:
            if found != "not installed":
                assert "{}-{}.dist-info".format(*found.split()) in installed
    # And a change to a data file or to the installed distributions changes its digest.
    monkeypatch.setattr(snapshot, "_PACKAGE", _copy_package(tmp_path))
    before = snapshot.code_digest()
    _edit(snapshot._PACKAGE / "data/abbreviations.tsv", None)
    assert snapshot.code_digest() != before
    before = snapshot.code_digest()
    monkeypatch.setattr(snapshot, "_distributions", lambda: ["numpy-0.0.1.dist-info"])
    assert snapshot.code_digest() != before
