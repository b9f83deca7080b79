"""The split stage's outputs on generated corpora, against digests of what the stage
wrote before it became columnar (audio rows, clips and subset rows as Python dicts).

The digests were taken by running this file's ``outputs`` with the stage as it was
before (commit d87a1e6); a refactoring of the stage must keep them. A change of what
the stage decides changes them on purpose: take them again and say why in the commit.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pytest

from pipeline.core.stage import StageResult
from pipeline.signal.fingerprint import decode_fingerprint, encode_fingerprint
from pipeline.stages import split
from tests.test_split import Corpus, make_ctx, random_corpus


def _with_near_copies(corpus: Corpus, seed: int) -> Corpus:  # and shared prompts
    """Some clips re-encoded copies of another clip of their speaker: its fingerprint two
    frames later with a few bits flipped (near-duplicates the fingerprint search must bind)."""
    rng = np.random.default_rng(seed)
    rows = corpus.audio
    for k in rng.choice(len(rows), size=len(rows) // 6, replace=False).tolist():
        same = [r for r in rows if r["speaker"] == rows[k]["speaker"]]
        fp = decode_fingerprint(same[int(rng.integers(len(same)))]["fingerprint"])[2:].copy()
        flip = rng.random(fp.size) < 0.02
        fp[flip] ^= np.uint32(1) << rng.integers(0, 32, size=int(flip.sum())).astype(np.uint32)
        rows[k]["fingerprint"] = encode_fingerprint(fp)
    # Prompts read by several speakers, so keeping test prompts apart has work to do.
    for t in corpus.text:
        t["norm_text"] = f"prompt {int(rng.integers(8))}"
    return corpus


def outputs(root: Path, corpus: Corpus, data: dict[str, Any], *, fresh: bool = True) -> str:
    """A digest of the three subset manifests (schema and rows) and the reject rows."""
    return digest(split.run(make_ctx(root, corpus, data, fresh=fresh)))


def digest(result: StageResult) -> str:
    h = hashlib.sha256()
    for rel in sorted(result.manifests):
        table = result.manifests[rel][1]
        h.update(f"{rel}\n{table.schema}\n".encode())
        h.update(json.dumps(table.to_pylist(), sort_keys=True).encode())
    h.update(json.dumps(result.rejects, sort_keys=True, default=str).encode())
    return h.hexdigest()


CONFIGS = {
    "default": {},
    "demote, transcripts dropped, by recording": {
        "split": {"group_by": "recording", "text_overlap": "demote", "keep_transcripts": False,
                  "labelled_budgets": ["30s", "2m"]},
        "quality": {"noisy_action": "reject", "clipped_action": "demote"}},
    "by clip, random selection": {"split": {"group_by": "clip", "selection": "random", "heldout": "30%"},
                                  "quality": {"narrowband_action": "demote"}},
}
EXPECTED = {
    "default": "567d11878687c47d3151bb22c51c3d7c783d4309c787c927e0f81317cb2ec799",
    "demote, transcripts dropped, by recording": "9ebbfe01ed7d549ac8c0da0a401814bde487fbda9ad4eae5d54c6536516e4319",
    "by clip, random selection": "1a97ab5e7c1e39a02f85f1669a534e88e203e4156488be7532a1f5d498765101",
    "rebuild": "533395a1baffb390da44eeace8061ebd7fd6847adab57713bc9304d277eb2136",
}


@pytest.mark.parametrize("name", sorted(CONFIGS))
def test_outputs_as_before(tmp_path: Path, name: str) -> None:
    corpus = _with_near_copies(random_corpus([9, 7, 12, 5, 8, 6], 11, dup_share=0.15)[0], 5)
    assert outputs(tmp_path, corpus, CONFIGS[name]) == EXPECTED[name]


def test_rebuild_outputs_as_before(tmp_path: Path) -> None:
    """A rebuild after clips were added, with the ledger (and the cache) of the first run."""
    corpus = _with_near_copies(random_corpus([9, 7, 12, 5, 8, 6], 12, dup_share=0.15)[0], 6)
    first = corpus.subset({r["clip_id"] for k, r in enumerate(corpus.audio) if k % 5})
    outputs(tmp_path, first, {})
    assert outputs(tmp_path, corpus, {}, fresh=False) == EXPECTED["rebuild"]


def test_outputs_from_an_input_of_several_chunks(tmp_path: Path) -> None:
    """An audio table in two chunks (a manifest of two row groups) gives the same outputs;
    the stage's input keeps no fingerprint text after the run (freed before the search)."""
    corpus = _with_near_copies(random_corpus([9, 7, 12, 5, 8, 6], 11, dup_share=0.15)[0], 5)
    ctx = make_ctx(tmp_path, corpus, CONFIGS["default"], fresh=True)
    audio = ctx.inputs["audio"]
    ctx.inputs["audio"] = pa.concat_tables([audio.slice(0, audio.num_rows // 2), audio.slice(audio.num_rows // 2)])
    assert ctx.inputs["audio"].column("fingerprint").num_chunks == 2
    assert digest(split.run(ctx)) == EXPECTED["default"]
    assert "fingerprint" not in ctx.inputs["audio"].column_names
