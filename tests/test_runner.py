"""The runner: stages finish out of order when they can, and the outputs never show it."""

from __future__ import annotations

import json
import os
import shutil
import time
from pathlib import Path

import pytest

from pipeline.commands.cli import main
from tests.conftest import tree_hash


def _outputs(out: Path) -> dict[str, str]:
    """Everything but logs, caches and config.resolved.json (which records the workers)."""
    return {k: v for k, v in tree_hash(out).items()
            if not k.startswith(("logs", "cache")) and k != "config.resolved.json"}


def test_stages_run_in_order_and_outputs_do_not_depend_on_workers(
        small_raw: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    logs, outputs, stages = {}, {}, {}
    out = tmp_path / "out"  # the same path for both runs: the summaries name it
    for workers in (1, 2):
        shutil.rmtree(out, ignore_errors=True)
        capsys.readouterr()
        assert main(["prepare", str(small_raw), str(out), "--workers", str(workers), "--no-progress"]) == 0
        logs[workers] = capsys.readouterr().err
        outputs[workers] = _outputs(out)
        recorded = json.loads((out / "logs" / "last-run.json").read_text())["stages"]
        stages[workers] = [s["name"] for s in recorded]
        # The text stage reads the audio manifest (the clips of long aligned sources), so
        # no stage is ready while a pool works: none runs "during" another.
        assert [s.get("during") for s in recorded] == [None, None, None, None]
    for workers in (1, 2):
        assert logs[workers].index("audio  done") < logs[workers].index("text   running")
    assert outputs[1] == outputs[2]
    assert stages[1] == stages[2] == ["ingest", "audio", "text", "split"]


def test_the_command_flushes_everything_before_its_fast_exit(small_raw: Path, tmp_path: Path) -> None:
    # `loam` ends with os._exit (no interpreter teardown): the log file, the console and
    # the exit code must still be complete.
    import subprocess
    import sys

    from tests.conftest import REPO

    out = tmp_path / "out"
    done = subprocess.run([sys.executable, "-m", "pipeline", "prepare", str(small_raw), str(out), "--workers", "2",
                           "--no-progress"], capture_output=True, text=True, cwd=REPO)
    assert done.returncode == 0, done.stderr
    assert done.stderr.rstrip().splitlines()[-1].startswith("rejected: 2 rows in")
    (log,) = (out / "logs").glob("prepare-*.log")
    assert log.read_text(encoding="utf-8").rstrip().splitlines()[-1].endswith("manifests/rejected.parquet")
    bad = subprocess.run([sys.executable, "-m", "pipeline", "validate", str(tmp_path / "nowhere")],
                         capture_output=True, text=True, cwd=REPO)
    assert bad.returncode == 2 and "does not exist" in bad.stderr


def test_a_full_prepare_never_loads_pandas_or_scipy(small_raw: Path, tmp_path: Path) -> None:
    # Their imports cost more than the work a run asks of them (DEVELOPERS.md, start-up
    # cost); a fresh interpreter, since this test process may hold both already.
    import subprocess
    import sys

    script = (
        "import sys\n"
        "from pipeline.commands.cli import main\n"
        f"rc = main(['prepare', {str(small_raw)!r}, {str(tmp_path / 'out')!r}, '--workers', '2', '--no-progress'])\n"
        "print(rc, sorted(m for m in ('pandas', 'scipy.fft', 'scipy.signal', 'g2p_en', 'nltk', 'epitran', 'panphon',\n"
        "                             'num2words')\n"
        "                 if m in sys.modules), 'libespeak' in open('/proc/self/maps').read())\n"
    )
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True)
    # An English run loads no rule engine: neither epitran (with pandas) nor libespeak-ng.
    assert done.stdout.strip().splitlines()[-1] == "0 [] False"
    assert (tmp_path / "out" / "manifests" / "labelled.parquet").is_file()


def test_loading_the_stages_leaves_the_per_file_libraries_for_later() -> None:
    # A run imports each stage's module before it runs, or while ingest's workers probe
    # (which on a rebuild finish first, so the driver's imports are what it waits for);
    # the per-file libraries load in the audio stage's warm-up only when some file is new,
    # and importlib.metadata when the pronouncer's provenance asks for it (DEVELOPERS.md,
    # start-up cost). A fresh interpreter, since this test process holds them all.
    import subprocess
    import sys

    script = (
        "import sys\n"
        "import pipeline.commands.cli, pipeline.core.runner\n"
        "from pipeline.stages import STAGES\n"
        "print([stage.name for stage in STAGES])\n"
        "print(sorted(m for m in ('soundfile', 'soxr', 'webrtcvad', 'importlib.metadata', 'difflib')\n"
        "             if m in sys.modules))\n"
    )
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True)
    assert done.stdout.splitlines() == ["['ingest', 'audio', 'text', 'split']", "[]"]


def test_ingest_reusing_its_probe_cache_leaves_pandas_unloaded(small_raw: Path, tmp_path: Path) -> None:
    # A rebuild's ingest joins the probe cache to RAW's listing in Arrow; turning the
    # join's result into numpy imports pandas unless refused (0.17 s of a 20,000-file
    # rebuild's ingest). A fresh interpreter, since this test process may hold pandas.
    import subprocess
    import sys

    out = tmp_path / "out"
    assert main(["prepare", str(small_raw), str(out), "--workers", "1", "--no-progress"]) == 0
    script = (
        "import sys\n"
        "from pipeline.commands.cli import main\n"
        f"rc = main(['stage', 'ingest', {str(small_raw)!r}, {str(out)!r}, '--workers', '1', '--no-progress'])\n"
        "print(rc, 'pandas' in sys.modules)\n"
    )
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True)
    assert done.stdout.strip().splitlines()[-1] == "0 False"
    (log,) = (out / "logs").glob("stage-*.log")
    assert "ingest: 0 files probed" in log.read_text(encoding="utf-8")  # the cache's path was taken


def test_recorded_manifest_hashes_are_the_files_and_a_replaced_file_is_checked_again(
        small_raw: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # The runner records each manifest's content hash as it writes it, so a later stage
    # and the next run reuse the hash instead of reading the file again; the record holds
    # only while the file keeps its size, mtime and inode. Reference: hashlib over the
    # file's bytes.
    import hashlib

    import pyarrow.parquet as pq

    from pipeline.core.names import stage_manifest, stage_manifest_facts

    out = tmp_path / "out"
    assert main(["prepare", str(small_raw), str(out), "--workers", "1", "--no-progress"]) == 0
    for stage in ("ingest", "audio", "text", "split"):
        facts = json.loads((out / stage_manifest_facts(stage)).read_text(encoding="utf-8"))
        assert facts, stage
        for rel, (_size, _mtime, _inode, digest, _schema, _schema_digest) in facts.items():
            assert digest == hashlib.sha256((out / rel).read_bytes()).hexdigest(), rel
    # A stale record: the audio manifest replaced by one that breaks its schema (a column
    # gone), with the same metadata. Running the text stage alone reads it as its input:
    # it must be checked, not taken as the file the record describes.
    path = out / stage_manifest("audio")
    table = pq.ParquetFile(path).read()
    pq.write_table(table.drop_columns(["duration_s"]), path)
    capsys.readouterr()
    assert main(["stage", "text", str(small_raw), str(out), "--workers", "1", "--no-progress"]) != 0
    assert "stages/audio.parquet breaks schemas/audio.schema.json" in capsys.readouterr().err


def test_a_later_stage_gets_exactly_the_table_the_file_holds(small_raw: Path, tmp_path: Path) -> None:
    # The runner hands a later stage the main manifest it has just written from memory,
    # not read back from the file: it must be the table reading the file gives, schema
    # (list item names, nullability), metadata and values alike. Reference: pyarrow's
    # Parquet reader on the file.
    from pipeline.core.config import load_config
    from pipeline.core.manifest import read_manifest
    from pipeline.core.runner import Runner
    from pipeline.stages import STAGES

    out = tmp_path / "out"
    runner = Runner(small_raw, out, load_config(None), stages=STAGES, workers=1)
    runner.prepare()
    held = runner._tables
    assert sorted(held) == sorted(STAGES[name].main_manifest for name in STAGES.order)
    for rel, table in held.items():
        from_file = read_manifest(out / rel)
        assert table.schema.to_string() == from_file.schema.to_string(), rel
        assert table.equals(from_file, check_metadata=True), rel


def test_a_replaced_manifest_with_a_stale_record_changes_the_input_hash(
        small_raw: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # The same rows written again (a new file, another inode): the recorded hash is not
    # used for it, so the text stage's input hash is the new file's.
    import pyarrow.parquet as pq

    from pipeline.core.manifest import read_metadata
    from pipeline.core.names import stage_manifest

    out = tmp_path / "out"
    assert main(["prepare", str(small_raw), str(out), "--workers", "1", "--no-progress"]) == 0
    before = read_metadata(out / stage_manifest("text"))["inputs_sha256"]
    path = out / stage_manifest("audio")
    table = pq.ParquetFile(path).read()
    pq.write_table(table, path, compression="none")  # same rows, other bytes
    capsys.readouterr()
    assert main(["stage", "text", str(small_raw), str(out), "--workers", "1", "--no-progress"]) == 0
    assert "text   running" in capsys.readouterr().err
    assert read_metadata(out / stage_manifest("text"))["inputs_sha256"] != before


def test_the_record_of_written_files_is_columnar_and_an_older_json_record_is_a_miss(
        small_raw: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # The runner's record of what a stage wrote (pipeline.core.outputs_record) holds each
    # file's os.stat as it was written (reference: os.stat now, nothing having changed);
    # a stage is reused only while every recorded file still has it.
    import os

    import pyarrow.feather as feather

    from pipeline.core.names import stage_outputs_record

    out = tmp_path / "out"
    stage_audio = ["stage", "audio", str(small_raw), str(out), "--workers", "1", "--no-progress"]
    assert main(["prepare", str(small_raw), str(out), "--workers", "1", "--no-progress"]) == 0
    record = feather.read_table(out / stage_outputs_record("audio")).to_pylist()
    clips = [row for row in record if row["path"].startswith("audio/")]
    assert clips and len(record) == len(clips) + 3  # the manifest, its rejects, its summary
    for row in record:
        st = os.stat(out / row["path"])
        assert [row["st_size"], row["st_mtime_ns"], row["st_ino"]] == [st.st_size, st.st_mtime_ns, st.st_ino]
    capsys.readouterr()
    assert main(stage_audio) == 0
    assert "audio  reused" in capsys.readouterr().err
    # A clip touched: its stat no longer the recorded one, so the stage runs again.
    clip = out / clips[-1]["path"]
    st = os.stat(clip)
    os.utime(clip, ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000))
    assert main(stage_audio) == 0
    assert "audio  running" in capsys.readouterr().err
    # The JSON record an older version wrote, in place of the columnar one: a miss, then
    # replaced (and removed).
    old = out / "cache" / "stages" / "audio.json"
    (out / stage_outputs_record("audio")).unlink()
    old.write_text(json.dumps({"files": [[row["path"], row["st_size"], row["st_mtime_ns"], row["st_ino"]]
                                         for row in record]}) + "\n", encoding="utf-8")
    assert main(stage_audio) == 0
    assert "audio  running" in capsys.readouterr().err
    assert not old.exists() and (out / stage_outputs_record("audio")).is_file()
    assert main(stage_audio) == 0
    assert "audio  reused" in capsys.readouterr().err


@pytest.mark.parametrize("audio_runs", [False, True])
def test_temporaries_of_an_interrupted_run_are_removed_whether_the_audio_stage_runs_or_not(
        audio_runs: bool, small_raw: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # The runner's sweep leaves OUT/audio to the audio stage (Stage.cleans_folder), which
    # removes every file there no row names; a reused audio stage's folder is swept by
    # the runner after the stages.
    import soundfile as sf

    from tests.conftest import speechlike

    out = tmp_path / "out"
    args = ["prepare", str(small_raw), str(out), "--workers", "1", "--no-progress"]
    assert main(args) == 0
    clips = sorted((out / "audio").rglob("*.flac"))
    planted = [clips[0].parent / f".loam-{clips[0].name}.0a1b2c3d4e5f.tmp", out / "stages" / ".loam-x.parquet.tmp",
               out / ".loam-config.resolved.json.0a1b2c3d4e5f.tmp"]
    for path in planted:
        path.write_bytes(b"half a file")
    if audio_runs:  # a new file: ingest's manifest changes, the audio stage runs
        sf.write(small_raw / "spk_a" / "a3.wav", speechlike(1.5, 16000, seed=9), 16000)
    else:  # a touched transcript: ingest runs again, its manifest's bytes do not change
        st = (small_raw / "spk_a" / "a1.txt").stat()
        os.utime(small_raw / "spk_a" / "a1.txt", ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000))
    capsys.readouterr()
    assert main(args) == 0
    log = capsys.readouterr().err
    assert ("audio  reused" in log) is not audio_runs
    # The audio stage counts what it removed as files, not clips (the temporary is one).
    assert ("audio: removed 1 file under OUT/audio that no row refers to" in log) is audio_runs
    assert not [path for path in planted if path.exists()]
    assert not list(out.rglob(".loam-*.tmp"))
    # The clips themselves stay (one more for the new file).
    assert set(clips) <= set((out / "audio").rglob("*.flac"))


def test_a_stage_main_manifest_lands_after_its_files_and_after_the_stage_before(
        small_raw: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # The writer thread puts a stage's files in place while the next stage computes: the
    # main manifest, whose metadata marks the stage up to date, must still land after
    # the stage's rejects and summary, and after every file of the stages finished
    # before it, as when the driver wrote them all in turn.
    from pipeline.core import runner as runner_module
    from pipeline.core.config import load_config
    from pipeline.core.names import stage_outputs_record, stage_rejects, stage_summary
    from pipeline.stages import STAGES

    out = tmp_path / "out"  # new: a file there was written by this run
    put, seen = runner_module._put_in_place, []

    def spy(staged: Path, target: Path, written: object) -> object:
        name = next(n for n in STAGES.order if out / STAGES[n].main_manifest == target)
        assert (out / stage_rejects(name)).is_file() and (out / stage_summary(name)).is_file(), name
        for earlier in seen:
            for rel in (STAGES[earlier].main_manifest, stage_rejects(earlier), stage_summary(earlier)):
                assert (out / rel).is_file(), (name, earlier, rel)
        seen.append(name)
        return put(staged, target, written)  # type: ignore[arg-type]

    monkeypatch.setattr(runner_module, "_put_in_place", spy)
    runner_module.Runner(small_raw, out, load_config(None), stages=STAGES, workers=1).prepare()
    assert seen == ["ingest", "audio", "text", "split"]
    # The records of written files, made once the files are in place, are all there.
    assert all((out / stage_outputs_record(name)).is_file() for name in seen)
    assert not list(out.rglob(".loam-*.tmp"))


def test_a_file_the_writer_thread_cannot_write_stops_the_run_and_nothing_lands_after_it(
        small_raw: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from pipeline.core import runner as runner_module
    from pipeline.core.config import load_config
    from pipeline.stages import STAGES

    out = tmp_path / "out"
    put = runner_module._put_in_place

    def failing(staged: Path, target: Path, written: object) -> object:
        if target.name == "audio.parquet":
            raise OSError(28, "No space left on device", str(target))
        return put(staged, target, written)  # type: ignore[arg-type]

    monkeypatch.setattr(runner_module, "_put_in_place", failing)
    with pytest.raises(OSError, match="No space left"):
        runner_module.Runner(small_raw, out, load_config(None), stages=STAGES, workers=1).prepare()
    _assert_stopped_after_ingest(out)


def test_a_stage_that_fails_leaves_the_records_of_those_before_it(
        small_raw: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # The records of written files are made at the end of the run: a run a later stage
    # stops must still make those of the stages whose files are in place, so that the
    # next run reuses them instead of running them again.
    from pipeline.core import runner as runner_module
    from pipeline.core.config import load_config
    from pipeline.core.errors import DataError
    from pipeline.stages import STAGES

    out = tmp_path / "out"
    original = runner_module.Runner._write_result

    def failing(self: runner_module.Runner, stage: object, *args: object) -> None:
        if getattr(stage, "name", "") == "split":
            raise DataError("split: the ledger could not be read")
        original(self, stage, *args)  # type: ignore[arg-type]

    monkeypatch.setattr(runner_module.Runner, "_write_result", failing)
    with pytest.raises(DataError, match="ledger could not be read"):
        runner_module.Runner(small_raw, out, load_config(None), stages=STAGES, workers=1).prepare()
    monkeypatch.setattr(runner_module.Runner, "_write_result", original)
    records = runner_module.Runner(small_raw, out, load_config(None), stages=STAGES, workers=1).prepare()
    assert {r.name: r.ran for r in records} == {"ingest": True, "audio": False, "text": False, "split": True}


def test_stats_handed_over_in_order_are_taken_whole_and_others_looked_up(tmp_path: Path) -> None:
    # outputs_record.stat_table: stats a stage hands over for the last paths, in their
    # order, are taken as they are; any other case (another order, a path twice, a path
    # among the manifests too) goes through the look-up, whose record has each path once.
    # Reference: the look-up itself, and os.stat for the files not handed over.
    import pyarrow as pa

    from pipeline.core import outputs_record

    (tmp_path / "m.parquet").write_bytes(b"abc")
    known = pa.table({"path": ["audio/a", "audio/b"], "st_size": [1, 2], "st_mtime_ns": [5, 6],
                      "st_ino": pa.array([7, 8], pa.uint64())}, schema=outputs_record.SCHEMA)
    st = os.stat(tmp_path / "m.parquet")
    whole = outputs_record.stat_table(tmp_path, ["m.parquet", "audio/a", "audio/b"], known)
    assert whole.to_pylist() == [*known.to_pylist(), {"path": "m.parquet", "st_size": st.st_size,
                                                      "st_mtime_ns": st.st_mtime_ns, "st_ino": st.st_ino}]
    looked_up = outputs_record.stat_table(tmp_path, ["m.parquet", "audio/b", "audio/a"], known)
    assert sorted(looked_up.to_pylist(), key=str) == sorted(whole.to_pylist(), key=str)
    twice = outputs_record.stat_table(tmp_path, ["audio/a", "audio/a", "audio/b"], known)
    assert twice.column("path").to_pylist() == ["audio/a", "audio/b"]
    assert outputs_record._given_last(pa.array(["audio/b", "audio/a", "audio/b"]), known) is None
    assert outputs_record._given_last(pa.array(["m.parquet", "audio/a", "audio/b"]), known) is not None


def _add_source(raw: Path) -> None:
    """A new recording in RAW: the ingest manifest gains a row, so every stage runs."""
    import soundfile as sf

    from tests.conftest import speechlike

    sf.write(raw / "spk_a" / "a3.wav", speechlike(1.5, 16000, seed=9), 16000)


def test_a_stage_starts_before_its_inputs_bytes_are_made_only_when_it_must_run(
        small_raw: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # The encoder thread makes a stage's main manifest while the next stage starts:
    # the next one need not wait for the new bytes' hash when its manifest records the
    # input hash of the files being replaced, whose bytes the new ones cannot be
    # (Runner._stale_while_encoding). Reference: the plain path, which waits for the
    # new bytes and compares the input hashes; the outputs must be byte-identical.
    from pipeline.core import runner as runner_module
    from pipeline.core.config import load_config
    from pipeline.core.stage import Stage
    from pipeline.stages import STAGES

    out, first = tmp_path / "out", tmp_path / "first"
    runner_module.Runner(small_raw, out, load_config(None), stages=STAGES, workers=1).prepare()
    shutil.copytree(out, first, symlinks=True)
    _add_source(small_raw)
    monkeypatch.setattr(runner_module.Runner, "_stale_while_encoding", lambda *args: False)
    plain = runner_module.Runner(small_raw, out, load_config(None), stages=STAGES, workers=1).prepare()
    assert all(record.ran for record in plain)
    reference = _outputs(out)
    monkeypatch.undo()

    shutil.rmtree(out)
    shutil.copytree(first, out, symlinks=True)  # other inodes: the replaced files are hashed
    write, stale, seen = runner_module.write_manifest, runner_module.Runner._stale_while_encoding, {}

    def slow(path: Path, *args: object, **kwargs: object) -> object:
        if Path(path).name.startswith(".loam-"):  # a main manifest, on the encoder thread
            time.sleep(0.3)
        return write(path, *args, **kwargs)  # type: ignore[arg-type]

    def spy(self: runner_module.Runner, stage: Stage, *args: object) -> bool:
        seen[stage.name] = answer = stale(self, stage, *args)  # type: ignore[arg-type]
        return answer

    monkeypatch.setattr(runner_module, "write_manifest", slow)
    monkeypatch.setattr(runner_module.Runner, "_stale_while_encoding", spy)
    runner_module.Runner(small_raw, out, load_config(None), stages=STAGES, workers=1).prepare()
    assert seen == {"ingest": False, "audio": True, "text": True, "split": True}
    assert _outputs(out) == reference


def test_the_proof_that_a_stage_must_run_holds_only_for_the_files_its_manifest_records(
        small_raw: Path, tmp_path: Path) -> None:
    # Reference for the input hash: inputs_sha256 hashing each input file.
    from concurrent.futures import Future

    import pyarrow.parquet as pq

    from pipeline.core import runner as runner_module
    from pipeline.core.config import load_config
    from pipeline.core.fsio import sha256_file
    from pipeline.core.manifest import read_metadata
    from pipeline.stages import STAGES

    out = tmp_path / "out"
    runner_module.Runner(small_raw, out, load_config(None), stages=STAGES, workers=1).prepare()
    runner = runner_module.Runner(small_raw, out, load_config(None), stages=STAGES, workers=1)
    text, audio = STAGES["text"], STAGES["audio"].main_manifest
    ctx = runner._context({})
    extras = runner_module.extra_parts(text, ctx, set())
    recorded = read_metadata(out / text.main_manifest)["inputs_sha256"]
    assert recorded == runner_module.inputs_sha256(out, text, ctx, STAGES)

    def stale() -> bool:
        return runner._stale_while_encoding(text, ctx, extras)

    making: Future[object] = Future()
    runner._written[audio] = making  # type: ignore[assignment]
    assert not stale()  # no digest of the file replaced: unknown
    runner._replaced[audio] = sha256_file(out / audio)  # the file the text manifest records
    assert stale()
    runner._replaced[audio] = "0" * 64  # another file: the text stage may be up to date
    assert not stale()
    runner._replaced[audio] = sha256_file(out / audio)
    making.set_result(None)  # the new bytes made: the input hash decides, as ever
    assert not stale()
    runner._written[audio] = Future()  # type: ignore[assignment]
    path = out / text.main_manifest  # the text manifest records another input hash
    table = pq.ParquetFile(path).read()
    metadata = {**table.schema.metadata, b"loam.inputs_sha256": b"1" * 64}
    pq.write_table(table.replace_schema_metadata(metadata), path)
    assert not stale()


def test_a_replaced_manifest_digest_is_given_only_when_the_new_bytes_cannot_be_the_old(
        small_raw: Path, tmp_path: Path) -> None:
    # Reference: hashlib over the file's bytes; the footer's row count and schema.
    import hashlib

    import pyarrow.parquet as pq

    from pipeline.core import runner as runner_module
    from pipeline.core.config import load_config
    from pipeline.stages import STAGES

    out = tmp_path / "out"
    runner_module.Runner(small_raw, out, load_config(None), stages=STAGES, workers=1).prepare()
    runner = runner_module.Runner(small_raw, out, load_config(None), stages=STAGES, workers=1)
    rel = STAGES["audio"].main_manifest
    file = pq.ParquetFile(out / rel)
    schema, rows = file.schema_arrow, file.metadata.num_rows
    digest = hashlib.sha256((out / rel).read_bytes()).hexdigest()
    assert runner._replaced_digest(rel, schema, rows) is None  # the same footer: maybe the same bytes
    assert runner._replaced_digest(rel, schema, rows + 1) == digest
    other = schema.with_metadata({**schema.metadata, b"loam.inputs_sha256": b"0" * 64})
    assert runner._replaced_digest(rel, other, rows) == digest
    shutil.copy2(out / rel, tmp_path / "copy.parquet")  # a copied OUT: no record holds, hashed
    os.replace(tmp_path / "copy.parquet", out / rel)
    assert runner._manifest_fact(rel) is None
    assert runner._replaced_digest(rel, schema, rows + 1) == digest
    (out / rel).unlink()
    assert runner._replaced_digest(rel, schema, rows + 1) is None


def test_a_main_manifest_whose_file_reads_back_otherwise_than_the_table_held_stops_the_run(
        small_raw: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # Later stages get the table with the schema its file will read back as, predicted
    # before the file exists (_read_back_schema): a file that reads otherwise stops the
    # run before it lands, and nothing after it lands either.
    from pipeline.core import runner as runner_module
    from pipeline.core.config import load_config
    from pipeline.stages import STAGES

    out = tmp_path / "out"
    predict = runner_module._read_back_schema

    def wrong(name: str, *args: object) -> object:
        schema = predict(name, *args)  # type: ignore[arg-type]
        return schema.with_metadata({**schema.metadata, b"loam.extra": b"x"}) if name == "audio" else schema

    monkeypatch.setattr(runner_module, "_read_back_schema", wrong)
    with pytest.raises(RuntimeError, match="stages/audio.parquet: the file's schema is not the one"):
        runner_module.Runner(small_raw, out, load_config(None), stages=STAGES, workers=1).prepare()
    _assert_stopped_after_ingest(out)


def _assert_stopped_after_ingest(out: Path) -> None:
    """A run stopped while the audio stage's files were written: ingest's main manifest
    landed, no later one did, and no temporary file is left."""
    from pipeline.stages import STAGES

    assert (out / STAGES["ingest"].main_manifest).is_file()
    assert not any((out / STAGES[name].main_manifest).exists() for name in ("audio", "text", "split"))
    assert not list(out.rglob(".loam-*.tmp"))


def test_a_table_the_stage_checked_is_not_checked_again_and_every_other_is(
        small_raw: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import pyarrow as pa

    from pipeline.core import checked_tables, runner
    from pipeline.core.errors import ManifestError

    seen: list[str] = []
    partition = runner.partition_rows

    def counted(name: str, table: pa.Table, *, where: str) -> tuple[pa.Table, list[object]]:
        seen.append(Path(where).name)
        return partition(name, table, where=where)

    monkeypatch.setattr(runner, "partition_rows", counted)
    assert main(["prepare", str(small_raw), str(tmp_path / "out"), "--workers", "1", "--no-progress"]) == 0
    # The split stage checks its three subset manifests itself (checked_tables.check),
    # before its ledger names their clips; the runner checks every other manifest.
    assert sorted(seen) == ["audio.parquet", "ingest.parquet", "text.parquet"]

    # Only the very table checked counts: an equal copy, or the table against another
    # schema, is checked again; a table that is gone is forgotten.
    table = pa.table({"source_path": ["a.wav"], "reason": ["empty"], "detail": ["a.wav: empty"],
                      "stage": ["ingest"], "clip_id": pa.array([None], pa.string())})
    checked_tables.check("rejected", table, where="rejected.parquet")
    assert checked_tables.was_checked("rejected", table)
    assert not checked_tables.was_checked("rejected", pa.concat_tables([table]))
    assert not checked_tables.was_checked("subset", table)
    held = len(checked_tables._checked)
    del table
    assert len(checked_tables._checked) == held - 1
    with pytest.raises(ManifestError, match="breaks schemas/rejected.schema.json"):
        checked_tables.check("rejected", pa.table({"source_path": ["a.wav"]}), where="r.parquet")
