"""Shared fixtures: small raw dumps generated in the test; the only committed audio is the
demo corpus and the speech in tests/fixtures/ (see tests/fixtures/make_speech.py)."""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import settings

# Property tests draw the same examples on every run, so a red run is a code change and
# never a new random draw; `make property-search` searches more widely (DEVELOPERS.md,
# Testing). LOAM_HYPOTHESIS picks the profile, LOAM_HYPOTHESIS_SCALE multiplies each
# test's example count (see `examples`).
settings.register_profile("ci", derandomize=True, database=None, print_blob=True)
settings.register_profile("search", derandomize=False, print_blob=True)
settings.load_profile(os.environ.get("LOAM_HYPOTHESIS", "ci"))


def examples(count: int) -> int:
    """A property test's ``max_examples``: ``count`` times LOAM_HYPOTHESIS_SCALE (default 1)."""
    scale = os.environ.get("LOAM_HYPOTHESIS_SCALE", "1")
    if not scale.isdigit() or int(scale) < 1:
        raise pytest.UsageError(f"LOAM_HYPOTHESIS_SCALE has value {scale!r}; expected a whole number of at least 1")
    return count * int(scale)

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "demo_corpus"
FIXTURES = REPO / "tests" / "fixtures"


def tone(seconds: float, sample_rate: int, *, freq_hz: float = 220.0, level: float = 0.3, channels: int = 1) -> np.ndarray:
    t = np.arange(int(seconds * sample_rate)) / sample_rate
    x = (level * np.sin(2 * np.pi * freq_hz * t)).astype(np.float32)
    return np.stack([x] * channels, axis=1) if channels > 1 else x


def speechlike(seconds: float, sample_rate: int, *, seed: int, channels: int = 1, level: float = 0.5) -> np.ndarray:
    """Voiced bursts with pauses: a 140 Hz pulse train with a little noise, shaped by a
    3 Hz syllable envelope, silent for 0.3 s at each end. Not speech, but it has the
    harmonic structure and rhythm that a voice-activity detector reacts to."""
    rng = np.random.default_rng(seed)
    t = np.arange(int(seconds * sample_rate)) / sample_rate
    pulse = np.sign(np.sin(2 * np.pi * 140 * t)) * 0.3 + 0.05 * rng.standard_normal(len(t))
    envelope = np.clip(np.sin(2 * np.pi * 3.0 * t), 0, None) * (t > 0.3) * (t < seconds - 0.3)
    x = (pulse * envelope * level).astype(np.float32)
    return np.stack([x] * channels, axis=1) if channels > 1 else x


# The clean recordings of the demo corpus (espeak-ng speech with digitally silent edges)
# and what they say (demo_corpus/generate.py).
DEMO_CLEAN = {
    "heron/heron_08.wav": "Nobody ever paid the fare on a Sunday.",
    "otter/otter_08.ogg": "My aunt could tie a knot faster than anyone in the village.",
    "sedge/sedge_08.ogg": "Eels hid under the cut reeds in the ditches.",
    "alder/alder_08.ogg": "We washed the plates in rainwater from the roof.",
    "plover/plover_08.flac": "Supplies came out by boat once a fortnight.",
    "wren/wren_08.wav": "My grandmother wrote every recipe on a card.",
}
# What the speech fixtures say (tests/fixtures/make_speech.py).
FIXTURE_SPEECH = {
    "harbour": "Half the harbour froze that March, and the ferry stayed tied up until spring.",
    "salt": "Fifty sacks of salt sat on the shelf beside the door of the net loft.",
    "thistle": "Thistles grew along the path from the forge to the old sluice.",
}


def speech_only(path: Path, *, threshold_db: float = -60.0) -> tuple[np.ndarray, int]:
    """A clean recording averaged to mono and cut to its speech: from the first to the
    last sample within ``threshold_db`` of the peak (its edges are digital silence, so
    any threshold far below speech finds the same edges to within a few samples)."""
    import soundfile as sf

    samples, rate = sf.read(path, dtype="float64", always_2d=True)
    mono = samples.mean(axis=1)
    loud = np.flatnonzero(np.abs(mono) >= np.abs(mono).max() * 10 ** (threshold_db / 20))
    return mono[loud[0]:loud[-1] + 1], rate


def tree_hash(root: Path) -> dict[str, str]:
    """Path -> SHA-256 of every file and link under ``root`` (links by their target text)."""
    out = {}
    for folder, _dirs, files in os.walk(root, followlinks=False):
        for name in files:
            p = Path(folder) / name
            rel = str(p.relative_to(root))
            out[rel] = ("link:" + os.readlink(p)) if p.is_symlink() else hashlib.sha256(p.read_bytes()).hexdigest()
    return out


def cache_table(path: Path) -> pa.Table:
    """A mapped cache table (``TableCache(mapped=True)``, an Arrow IPC file) as written,
    its scope in the schema's metadata."""
    return pa.ipc.open_file(pa.py_buffer(path.read_bytes())).read_all()


def rewrite_cache_table(path: Path, table: pa.Table) -> None:
    """Replace the mapped cache table at ``path`` by ``table``, under the scope it was
    written with and with its digest beside it, as ``TableCache.save`` writes one."""
    from pipeline.core.cache import TableCache

    scope = cache_table(path).schema.metadata[b"loam_cache_scope"].decode()
    TableCache(path.parent.parent, path.parent.name, path.stem, scope=scope, mapped=True).save(
        table.replace_schema_metadata(None))


@pytest.fixture
def small_raw(tmp_path: Path) -> Path:
    """Two speakers, a sidecar transcript, a metadata table and three kinds of fault."""
    import soundfile as sf

    raw = tmp_path / "raw"
    (raw / "spk_a").mkdir(parents=True)
    (raw / "spk_b").mkdir()
    sf.write(raw / "spk_a" / "a1.wav", speechlike(1.6, 16000, seed=1), 16000, subtype="PCM_16")
    sf.write(raw / "spk_a" / "a2.flac", speechlike(2.0, 22050, seed=2), 22050)
    (raw / "spk_a" / "a1.txt").write_text("the first line\n", encoding="utf-8")
    sf.write(raw / "spk_b" / "b1.wav", speechlike(2.2, 44100, seed=3, channels=2), 44100, subtype="PCM_24")
    sf.write(raw / "spk_b" / "b2.ogg", speechlike(1.8, 48000, seed=4, level=0.2), 48000)
    (raw / "spk_b" / "broken.wav").write_bytes(b"")
    (raw / "spk_b" / "copy.wav").write_bytes((raw / "spk_a" / "a1.wav").read_bytes())
    (raw / "meta.csv").write_text(
        "path,transcript,speaker\n"
        "spk_b/b1.wav,a second line,spk_b\n"
        "spk_b/missing.wav,nothing here,spk_b\n"
        "../outside.wav,escape,spk_b\n",
        encoding="utf-8",
    )
    return raw


@pytest.fixture(scope="session")
def demo_build(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo corpus prepared once per test session (as `make` does), with its report."""
    from pipeline.commands.report import write_report
    from pipeline.core.config import load_config
    from pipeline.core.runner import Runner
    from pipeline.stages import STAGES

    out = tmp_path_factory.mktemp("demo") / "out"
    Runner(DEMO, out, load_config(DEMO / "corpus.toml"), stages=STAGES, workers=2).prepare()
    write_report(out)
    return out


def pytest_sessionfinish(session: pytest.Session, exitstatus: int) -> None:
    """A skipped test fails the run: `make test` must run every test (DEVELOPERS.md)."""
    reporter = session.config.pluginmanager.get_plugin("terminalreporter")
    skipped = len(reporter.stats.get("skipped", [])) if reporter is not None else 0
    if skipped and exitstatus == 0:
        reporter.write("\n")
        reporter.write_sep("=", f"{skipped} skipped, and every test must run: see the SKIPPED lines", red=True)
        session.exitstatus = pytest.ExitCode.TESTS_FAILED
