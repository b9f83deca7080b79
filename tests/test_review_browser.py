"""`loam review` driven in headless Chromium, then `loam prepare` applying what was decided.

The browser is Debian's chromium (``make test`` installs it), driven over the DevTools
protocol's pipe (tests/devtools.py). The raw dump is a copy of the demo corpus with one
more recording whose file name is HTML markup, so the page's escaping is tested on a
name that reaches it from RAW.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow.parquet as pq
import pytest
import soundfile as sf

from pipeline.commands.validate import load_resolved_config
from pipeline.core.names import REJECTED, SUBSETS, stage_manifest, stage_summary, subset_manifest
from pipeline.stages.decisions import append_decision
from pipeline.stages.gates import robust_z_scores
from tests.conftest import DEMO, REPO
from tests.devtools import Browser

EVIL_STEM = "heron_<img src=x onerror=document.title=1>"
FIXED = "A loaf and a jar of honey cost five pounds twenty back then."


def loam(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "pipeline", *args], cwd=REPO, capture_output=True, text=True,
                          timeout=600, check=False)


def prepare(raw: Path, out: Path) -> subprocess.CompletedProcess[str]:
    done = loam("prepare", str(raw), str(out), "--config", str(raw / "corpus.toml"), "--workers", "2",
                "--no-progress")
    assert done.returncode == 0, done.stderr
    return done


def rows(out: Path) -> dict[str, dict[str, Any]]:
    """clip_id -> its subset row, as JSON text of every column."""
    found = {}
    for subset in SUBSETS:
        for row in pq.read_table(out / subset_manifest(subset)).to_pylist():
            found[row["clip_id"]] = row
    return found


@pytest.fixture(scope="module")
def build(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    root = tmp_path_factory.mktemp("review")
    raw = root / "raw"
    shutil.copytree(DEMO, raw, ignore=shutil.ignore_patterns("__pycache__"))
    # A recording whose file name is markup, with a transcript normalisation rewrites ("5"),
    # so the clip is queued and its name shown: a quieter copy of another, so the two are
    # near-duplicates (byte-identical files would be set aside at ingest).
    audio, rate = sf.read(raw / "heron" / "heron_01.wav", dtype="float64")
    sf.write(raw / "heron" / f"{EVIL_STEM}.wav", audio * 0.8, rate, subtype="PCM_16")
    (raw / "heron" / f"{EVIL_STEM}.txt").write_text("I counted 5 boats at the slipway.\n", encoding="utf-8")
    out = root / "out"
    prepare(raw, out)
    return raw, out


class Server:
    """`loam review OUT` in a child process; its URL is the first line it prints."""

    def __init__(self, out: Path) -> None:
        self.proc = subprocess.Popen([sys.executable, "-m", "pipeline", "review", str(out), "--spot-checks", "3"],
                                     cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        assert self.proc.stdout is not None
        self.url = self.proc.stdout.readline().strip()
        assert self.url.startswith("http://127.0.0.1:"), self.proc.stderr.read() if self.proc.stderr else ""

    def stop(self) -> None:
        self.proc.terminate()
        self.proc.wait(timeout=10)


AUDIO_CHECK = """(async () => {
  const a = document.querySelector('.card.current audio');
  if (a.readyState < 1) await new Promise((ok, fail) => {
    a.addEventListener('loadedmetadata', ok);
    a.addEventListener('error', () => fail(new Error('media error ' + (a.error && a.error.code)))); });
  const r = await fetch(a.currentSrc);
  const bytes = new Uint8Array(await r.arrayBuffer());
  const hash = new Uint8Array(await crypto.subtle.digest('SHA-256', bytes));
  return { clip: document.querySelector('.card.current').dataset.clip, duration: a.duration,
           magic: String.fromCharCode(...bytes.slice(0, 4)), type: r.headers.get('content-type'),
           sha256: [...hash].map(x => x.toString(16).padStart(2, '0')).join('') };
})()"""


def show(browser: Browser, url: str, why: str) -> str:
    """Load the page filtered on one reason; the clip shown first."""
    browser.page("Page.navigate", url=f"{url}#why={why}")
    browser.wait_for("document.body && document.body.dataset.loaded === 'yes'")
    return browser.evaluate("document.querySelector('.card.current').dataset.clip")


def recorded(browser: Browser, clip: str, decision: str) -> None:
    browser.wait_for(f"S.decided[{json.dumps(clip)}] === {json.dumps(decision)}")


def test_review_in_chromium_then_prepare_applies_the_decisions(build: tuple[Path, Path], tmp_path: Path) -> None:
    raw, out = build
    before = rows(out)
    server = Server(out)
    browser = Browser(tmp_path / "profile")
    try:
        # An audio element loads its clip: the FLAC bytes of the manifest's file.
        oov_clip = show(browser, server.url, "oov")
        heard = browser.evaluate(AUDIO_CHECK)
        assert heard["magic"] == "fLaC" and heard["type"] == "audio/flac"
        assert heard["sha256"] == before[oov_clip]["audio_sha256"]
        assert abs(heard["duration"] - before[oov_clip]["duration_s"]) < 0.01
        media = [e["params"]["response"] for e in browser.events if e.get("method") == "Network.responseReceived"
                 and e["params"]["type"] == "Media"]
        assert media and all(r["status"] in (200, 206) and r["mimeType"] == "audio/flac" for r in media)

        # Accept the guessed pronunciation (key p).
        browser.key("p")
        recorded(browser, oov_clip, "pronunciation")

        # Edit one transcript: e focuses it, select all, type, ctrl+enter saves.
        browser.page("Page.navigate", url="about:blank")
        fixed_clip = show(browser, server.url, "verbalised")
        assert before[fixed_clip]["transcript"].startswith("A loaf and a jar of honey cost $5.20")
        browser.key("e")
        browser.evaluate("document.getElementById('transcript').select()")
        browser.type_text(FIXED)
        browser.key("Enter", ctrl=True)
        recorded(browser, fixed_clip, "fix_transcript")

        # Exclude one clip with a reason from the list and a typed note (key x).
        browser.page("Page.navigate", url="about:blank")
        excluded_clip = show(browser, server.url, "narrowband")
        browser.evaluate("document.querySelector('.card.current select').value = 'unusable audio'")
        browser.evaluate("document.querySelector('.card.current input[aria-label=note]').focus()")
        browser.type_text("hum <b>under</b> the voice")
        browser.key("Escape")
        browser.key("x")
        recorded(browser, excluded_clip, "exclude")
        assert browser.evaluate("document.getElementById('progress').textContent").startswith("reviewed 3 / queued")

        # The file name made of markup is shown as text, and no element came from it.
        browser.page("Page.navigate", url="about:blank")
        show(browser, server.url, "verbalised")
        assert browser.evaluate("S.at = S.shown.findIndex(it => it.source_path.includes('onerror')); render(); S.at") >= 0
        assert EVIL_STEM in browser.evaluate("document.querySelector('.card.current .meta').textContent")
        # It is a near-duplicate: the other copy is shown beside it.
        assert browser.evaluate("document.querySelectorAll('.card').length") == 2
        assert browser.evaluate("document.querySelectorAll('img').length === document.querySelectorAll('img.spec').length")
        assert browser.evaluate("document.title") == "loam review"
        browser.screenshot(tmp_path / "review.png")
    finally:
        browser.close()
        server.stop()

    decisions = (out / "ledger.decisions.jsonl").read_text(encoding="utf-8").splitlines()
    assert json.loads(decisions[0]) == {"loam_review_decisions": 1} and len(decisions) == 4

    done = prepare(raw, out)
    # Only the stages the decisions reach run again: audio is reused.
    assert "audio  reused" in done.stderr and "text   running" in done.stderr
    assert "text: review decisions applied: 2 (1 fix_transcript, 1 pronunciation); not applied: 0" in done.stderr
    assert "split: review decisions applied: 1 (1 exclude); not applied: 0" in done.stderr
    after = rows(out)
    # The fix: the new transcript, normalised and pronounced, marked as coming from review.
    assert after[fixed_clip]["transcript"] == FIXED and after[fixed_clip]["transcript_origin"] == "review"
    assert "five pounds twenty" in after[fixed_clip]["norm_text"]
    # The exclusion: out of every subset, in rejected.parquet with the reason and the note.
    assert excluded_clip not in after
    rejected = {r["clip_id"]: r for r in pq.read_table(out / REJECTED).to_pylist()}
    assert rejected[excluded_clip]["reason"] == "review_excluded"
    assert "unusable audio" in rejected[excluded_clip]["detail"]
    assert "hum <b>under</b> the voice" in rejected[excluded_clip]["detail"]
    # The pronunciation: now from the override lexicon, with the phones that were accepted.
    text = {r["clip_id"]: r for r in pq.read_table(out / stage_manifest("text")).to_pylist()}
    assert "override" in text[oov_clip]["word_backends"]
    # Nothing else changed: every other row is as it was, column for column, except rate_z.
    # rate_z is a robust z-score of the speaking rate against the speaker's clips, or against
    # every clip for speakers with few (quality.rate_min_clips): the fixed transcript's new
    # speaking rate moves that reference. So rate_z is checked against the scores recomputed
    # from the new speaking rates (the excluded clip is still measured, then set aside).
    others = sorted(set(before) - {fixed_clip, excluded_clip})
    assert others == sorted(set(after) - {fixed_clip})
    changed = [cid for cid in others if {k: v for k, v in before[cid].items() if k != "rate_z"}
               != {k: v for k, v in after[cid].items() if k != "rate_z"}]
    assert changed == []
    quality = load_resolved_config(out)[0].quality
    pool = {**after, excluded_clip: before[excluded_clip]}
    ids = sorted(pool)
    expected = robust_z_scores(
        np.array([np.nan if pool[c]["speaking_rate"] is None else pool[c]["speaking_rate"] for c in ids]),
        np.array([pool[c]["speaker"] for c in ids], dtype=object),
        min_group_size=quality.rate_min_clips, min_mad_fraction=quality.rate_min_spread)
    for cid, z in zip(ids, expected, strict=True):
        if cid in others:
            assert after[cid]["rate_z"] == (None if np.isnan(z) else pytest.approx(float(z), rel=1e-12)), cid
    summary = json.loads((out / stage_summary("split")).read_text())["review"]
    assert summary["applied"] == {"exclude": 1} and summary["not_applied_total"] == 0

    # A keep decision concerns the split stage alone: the text stage is reused.
    append_decision(out / "ledger.decisions.jsonl", {"decision": "keep", "clip_id": others[0]})
    done = prepare(raw, out)
    assert "text   reused" in done.stderr
    assert "split: review decisions applied: 2 (1 exclude, 1 keep); not applied: 0" in done.stderr
