"""Languages other than English: the rules backend, IPA phones, numbers, scripts, the guard.

Sources are named beside each check. Orthography rules are from published grammars
and orthography guides (cited from memory where marked); number names from grammars
and the Real Academia Española; IPA validity from panphon's feature table
(Mortensen et al., COLING 2016).
"""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
import unicodedata
from pathlib import Path

import pytest

from pipeline.core.errors import ParameterError
from pipeline.stages.languages import canonical_tag
from pipeline.text.engines import epitran_codes, espeak_voices, resolve
from pipeline.text.guard import wrong_language_sentence
from pipeline.text.ipa import InvalidPhone, feature_table, phone_class, segment
from pipeline.text.normalise import normalise
from pipeline.text.numbers import NumberReader
from pipeline.text.rules import RulePhones
from tests.conftest import DEMO
from tests.test_text_stage import REPO, clip, run_stage


def _plain(words: str, language: str) -> list[tuple[str, ...]]:
    rules = RulePhones(language)
    return [rules.phones(w) for w in words.split()]


# --- orthography against published descriptions ---------------------------------------


def test_swahili_digraphs() -> None:
    # Source: E. O. Ashton, "Swahili Grammar" (Longman, 1944), pronunciation chapter:
    # ng' = velar nasal /ŋ/, ny = palatal nasal /ɲ/, ch = /tʃ/, sh = /ʃ/, dh = /ð/ (from memory).
    ngombe, nyumba, chai, shamba, dhahabu = _plain("ng'ombe nyumba chai shamba dhahabu", "sw")
    assert ngombe[0] == "ŋ" and nyumba[0] == "ɲ" and chai[0] == "t͡ʃ" and shamba[0] == "ʃ" and dhahabu[0] == "ð"


def test_spanish_letters() -> None:
    # Source: Real Academia Española, "Ortografía de la lengua española" (2010), ch. 1:
    # ñ = /ɲ/, ch = /tʃ/, rr = the trill /r/ (from memory).
    nino, chico, perro = _plain("niño chico perro", "es")
    assert nino == ("n", "i", "ɲ", "o")
    assert chico[0] == "t͡ʃ"
    assert "r" in perro and "ɾ" not in perro


def test_yoruba_letters_and_tone() -> None:
    # Source: A. Bamgbọṣe, "A Grammar of Yoruba" (CUP, 1966) and the 1974 Yoruba
    # orthography: ṣ = /ʃ/, p = /k͡p/, gb = /ɡ͡b/, ẹ = /ɛ/, ọ = /ɔ/, j = /dʒ/; the acute
    # accent marks high tone on its vowel (from memory).
    se, papa, gbogbo, eja = _plain("ṣé pápá gbogbo ẹja", "yo")
    assert se == ("ʃ", "é")
    assert papa == ("k͡p", "á", "k͡p", "á")
    assert gbogbo[0] == "ɡ͡b" and eja == ("ɛ", "d͡ʒ", "a")
    assert RulePhones("yo", keep_tone=False).phones("pápá") == ("k͡p", "a", "k͡p", "a")


def test_german_sch() -> None:
    # Source: Duden, "Das Aussprachewörterbuch" (7th ed., 2015): <sch> = /ʃ/, <ö> long = /øː/.
    assert _plain("schön", "de")[0] == ("ʃ", "øː", "n")


# --- IPA segmentation and the feature table -------------------------------------------


def test_segmentation_attaches_marks() -> None:
    # epitran hands Yoruba tone marks over as tokens of their own; they join their vowel.
    assert segment(["ɔ", "d͡ʒ", "ɔ", "\u0301"]) == ("ɔ", "d͡ʒ", "ɔ́")
    assert segment("kʷaːn̩") == ("kʷ", "aː", "n̩")
    assert segment(["ˈtʃ", "a"], keep_stress=True) == ("ˈt͡ʃ", "a")  # espeak-ng's untied affricate
    assert segment(["ˈtʃ", "a"]) == ("t͡ʃ", "a")
    assert segment(["aɪ"]) == ("a", "ɪ")  # a diphthong the table lacks: its two vowels
    assert all(unicodedata.is_normalized("NFC", p) for p in segment("ɛ́ɔ̀"))


@pytest.mark.parametrize("bad", ["6", "a6", "q!", "\u0301a"])
def test_invalid_symbols_are_never_kept(bad: str) -> None:
    with pytest.raises(InvalidPhone):
        segment(bad)


def test_feature_classes() -> None:
    # Source: panphon ipa_all.csv (syl/cons features); IPA chart: ɲ consonant, ɔ vowel.
    assert phone_class("ɲ") == "consonant" and phone_class("ɔ́") == "vowel" and phone_class("aː") == "vowel"
    assert len(feature_table()) > 5000


def test_invalid_engine_output_becomes_a_reject_sentence() -> None:
    # espeak-ng 1.52 writes Vietnamese tones as digits ("iɛ6"): not IPA segments.
    rules = RulePhones("vi", "espeak")
    assert rules.phones("việt") == ()
    assert "not a segment of panphon's IPA feature table" in rules.problems["việt"]
    assert "text.keep_tone = false" in rules.problems["việt"]


def test_scripts_without_spaces_are_read_by_the_engine() -> None:
    # Thai has no spaces between words: espeak-ng segments the run itself. Its tone
    # digits are dropped with keep_tone=False, and what remains is valid IPA.
    phones = RulePhones("th", keep_tone=False).phones("สวัสดีครับ")
    assert phones and all(segment(p) == (p,) for p in phones)
    assert RulePhones("ja").phones("こんにちは")[:2] == ("k", "o̞")


# --- engines ---------------------------------------------------------------------------


def test_engines_resolve_and_list() -> None:
    assert {"es", "sw", "de", "hi", "ar"} <= set(espeak_voices())
    assert {"yor-Latn", "amh-Ethi", "swa-Latn", "kin-Latn", "som-Latn"} <= set(epitran_codes())
    assert resolve("es-CO") == ("espeak", "es")
    assert resolve("sw", "espeak") == ("espeak", "sw")
    assert resolve("am") == ("epitran", "amh-Ethi")
    with pytest.raises(ParameterError, match="no espeak-ng voice 'zzz'"):
        resolve("zzz")
    with pytest.raises(ParameterError, match="epitran has no rule set 'xxx-Latn'"):
        resolve("yo", "epitran:xxx-Latn")
    assert canonical_tag("es-co") == "es-CO"


def test_engines_never_reach_the_network(tmp_path: Path) -> None:
    script = textwrap.dedent("""
        import json, socket, sys
        attempts = []
        def refuse(*args, **kwargs):
            attempts.append(args)
            raise OSError("networking is disabled in this test")
        # Sockets may be made (urllib3, imported by epitran's requests, probes IPv6 by
        # binding one to ::1); none may connect, send or resolve a name.
        socket.socket.connect = socket.socket.connect_ex = socket.socket.sendto = refuse
        socket.create_connection = refuse
        socket.getaddrinfo = refuse
        from pipeline.text.rules import RulePhones
        from pipeline.text.numbers import NumberReader
        out = [RulePhones(l).phones(w) for l, w in
               [("es", "niño"), ("sw", "nyumba"), ("yo", "ọjọ́"), ("am", "ሰላም"), ("hi", "नमस्ते")]]
        out.append(NumberReader("es", {}).read("12"))
        print(json.dumps({"attempts": attempts, "out": out}, ensure_ascii=False))
    """)
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, cwd=REPO, check=False)
    assert done.returncode == 0, done.stderr
    report = json.loads(done.stdout.strip().splitlines()[-1])
    assert report["attempts"] == []
    assert all(report["out"][:5]) and report["out"][5] == "doce"


# --- numbers ---------------------------------------------------------------------------


def test_number_names() -> None:
    # Source: Real Academia Española, "Nueva gramática de la lengua española" (2009),
    # §21 numerales cardinales: 1984 "mil novecientos ochenta y cuatro", 150 "ciento cincuenta".
    spanish = NumberReader("es", {})
    assert spanish.read("1984") == "mil novecientos ochenta y cuatro"
    assert spanish.read("150") == "ciento cincuenta"
    # Source: Académie française, rectifications de l'orthographe (1990): 80 "quatre-vingts".
    assert NumberReader("fr", {}).read("80") == "quatre-vingts"
    # Source: Duden, Grammatik (2016), Kardinalzahlen: 21 "einundzwanzig".
    assert NumberReader("de", {}).read("21") == "einundzwanzig"


def test_swahili_numbers_need_the_override() -> None:
    # num2words has no Swahili: the number is not guessed, and never read in English.
    # Source: Ashton (1944), numerals: 12 "kumi na mbili", 150 "mia moja na hamsini".
    reader = NumberReader("sw", {"12": "kumi na mbili", "150": "mia moja na hamsini"})
    assert reader.read("Nina ng'ombe 12 na mbuzi 150") == "Nina ng'ombe kumi na mbili na mbuzi mia moja na hamsini"
    bare = NumberReader("sw", {})
    assert bare.read("ng'ombe 12") == "ng'ombe 12" and bare.missing == ["12"]


# --- scripts ---------------------------------------------------------------------------

SCRIPTS = {
    "yo": "Ọjọ́ ọ̀la dára",  # Latin with tone marks and dots below
    "vi": "Tiếng Việt rất hay",  # Latin with stacked diacritics
    "am": "ሰላም ነው።",  # Ethiopic, caseless; ። is the Ethiopic full stop
    "ar": "السلام عليكم",  # Arabic, right to left, caseless
    "hi": "नमस्ते दुनिया",  # Devanagari with virama and vowel signs
}


@pytest.mark.parametrize("language", sorted(SCRIPTS))
def test_scripts_survive_normalisation(language: str) -> None:
    text = SCRIPTS[language]
    norm = normalise(text, verbalise_numbers=False, abbreviations={}, spell_initialisms=False)
    assert unicodedata.is_normalized("NFC", norm.text)
    expected = unicodedata.normalize("NFC", text.replace("።", "")).lower().split()
    assert list(norm.words) == expected  # marks kept, caseless scripts untouched, order kept
    engine = "epitran:vie-Latn" if language == "vi" else ""
    rules = RulePhones(language, engine)
    assert all(rules.phones(w) for w in norm.words), rules.problems


# --- the text stage --------------------------------------------------------------------

SWAHILI = {
    "s1": "Nina ng'ombe 12.",
    "s2": "Habari ya asubuhi, rafiki yangu.",
    "s3": "Nyumba yetu ina mlango mmoja.",
    "s4": "Nina mbuzi 7.",
}


def test_stage_in_swahili(tmp_path: Path) -> None:
    result, table = run_stage(tmp_path, SWAHILI, language="sw", number_words={"sw": {"12": "kumi na mbili"}})
    rows = {r["clip_id"]: r for r in table.to_pylist()}
    s1 = rows[clip("s1")]
    assert s1["language"] == "sw" and s1["norm_text"] == "nina ng'ombe kumi na mbili"
    assert s1["phones"][4] == "ŋ" and set(s1["word_backends"]) == {"rules"}
    for row in rows.values():
        assert all(segment(p) == (p,) for p in row["phones"])  # each a valid segment, as written
    (rejected,) = result.rejects
    assert rejected["reason"] == "unreadable_number" and "text.number_words" in rejected["detail"]
    assert "'7'" in rejected["detail"] and "seven" not in str(table.to_pylist())
    assert result.summary["languages"]["sw"]["engine"] == "epitran:swa-Latn"
    assert result.summary["languages"]["sw"]["oov_rate"] == 0.0


def test_english_default_on_swahili_warns(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    caplog.set_level("WARNING")
    result, _ = run_stage(tmp_path, SWAHILI, verbalise_numbers=False)
    info = result.summary["languages"]["en"]
    assert info["oov_rate"] > 0.3
    assert "do not look like 'en'" in caplog.text and f"{100 * info['oov_rate']:.1f} %" in caplog.text


def test_wrong_language_sentence_threshold() -> None:
    # 30 % is common practice for this check, not a published value.
    assert wrong_language_sentence("en", "english", 100, 30) is None
    assert "31.0 %" in wrong_language_sentence("en", "english", 100, 31)


def test_unknown_language_stops_with_a_clear_error(tmp_path: Path) -> None:
    with pytest.raises(ParameterError, match="text.engines"):
        run_stage(tmp_path, SWAHILI, language="zzz")


def test_metadata_language_column_sets_each_file_language(tmp_path: Path) -> None:
    from pipeline.core.config import build_config
    from pipeline.core.manifest import table_from_rows
    from pipeline.core.stage import StageContext
    from pipeline.stages import text
    from tests.test_text_stage import ingest_row

    raw = tmp_path / "raw"
    raw.mkdir()
    (raw / "meta.csv").write_text("path,transcript,lang\nspk/a.wav,The boat is late.,\n"
                                  "spk/b.wav,Nina ng'ombe 12.,sw\nspk/c.wav,El niño tiene 3 libros.,es\n",
                                  encoding="utf-8")
    rows = []
    for line, (name, transcript) in enumerate([("a", "The boat is late."), ("b", "Nina ng'ombe 12."),
                                               ("c", "El niño tiene 3 libros.")], start=2):
        rows.append({**ingest_row(name, transcript), "transcript_origin": "metadata", "metadata_line": line})
    config = build_config({"ingest": {"metadata": "meta.csv", "metadata_language_column": "lang"},
                           "text": {"number_words": {"sw": {"12": "kumi na mbili"}}}}, base_dir=str(tmp_path))
    ctx = StageContext(raw=raw, out=tmp_path / "out", config=config,
                       inputs={"ingest": table_from_rows("ingest", rows)}, workers=1)
    assert raw / "meta.csv" in text.extra_inputs(ctx)  # a changed language cell reruns the stage
    result = text.run(ctx)
    table = result.manifests["stages/text.parquet"][1].to_pylist()
    by_language = {r["language"]: r for r in table}
    assert set(by_language) == {"en", "sw", "es"}
    assert by_language["en"]["word_backends"][0] == "cmudict"  # English unchanged: ARPAbet from CMUdict
    assert by_language["sw"]["norm_text"] == "nina ng'ombe kumi na mbili"
    assert by_language["es"]["norm_text"] == "el niño tiene tres libros"  # not "three"
    assert "ɲ" in by_language["es"]["phones"]
    assert sorted(result.summary["languages"]) == ["en", "es", "sw"]
    meta = result.metadata
    assert meta["text.languages"] == "en,es,sw" and "espeak:es" in meta["g2p.es"]


SWAHILI_DUMP = {
    "s1": "Nina ng'ombe 12.", "s2": "Habari ya asubuhi, rafiki yangu.", "s3": "Nyumba yetu ina mlango mmoja.",
    "s4": "Mvua inanyesha leo jioni.", "s5": "Chai ya moto iko mezani.", "s6": "Watoto wanacheza nje.",
}


def _swahili_raw(tmp_path: Path) -> Path:
    import soundfile as sf

    from tests.conftest import speechlike

    raw = tmp_path / "raw"
    for i, (name, line) in enumerate(sorted(SWAHILI_DUMP.items())):
        folder = raw / ("spk_a" if i % 2 else "spk_b")
        folder.mkdir(parents=True, exist_ok=True)
        sf.write(folder / f"{name}.wav", speechlike(1.6 + 0.1 * i, 16000, seed=i + 1), 16000, subtype="PCM_16")
        (folder / f"{name}.txt").write_text(line + "\n", encoding="utf-8")
    return raw


def _prepare(raw: Path, out: Path, config_text: str) -> None:
    from pipeline.core.config import load_config
    from pipeline.core.runner import Runner
    from pipeline.stages import STAGES

    (out.parent / "c.toml").write_text(config_text, encoding="utf-8")
    config = load_config(out.parent / "c.toml")
    Runner(raw, out, config, stages=STAGES, workers=1).prepare()


def test_a_swahili_dump_end_to_end(tmp_path: Path) -> None:
    from pipeline.commands.report import build_summary
    from pipeline.commands.validate import format_table, validate_out

    raw = _swahili_raw(tmp_path)
    split = '[split]\nheldout = "0%"\nlabelled_budgets = ["1s"]\nledger = "ledger.tsv"\n'
    # The English default on a Swahili dump: validate warns with the figure, the report shows it.
    (tmp_path / "en").mkdir()
    _prepare(raw, tmp_path / "en" / "out", split)
    result = validate_out(tmp_path / "en" / "out")
    warned = [p for p in result.problems if p.check == "language_oov"]
    assert len(warned) == 1 and "do not look like 'en'" in warned[0].found
    assert result.languages["en"]["oov_rate"] > 0.3 and result.to_json()["languages"] == result.languages
    assert "languages: en 6 clips, OOV " in format_table(result).splitlines()[-2]
    assert build_summary(tmp_path / "en" / "out")["languages"]["en"]["oov_rate"] > 0.3
    # Set to Swahili: IPA phones from the rule engine, number words from the table, no warning.
    (tmp_path / "sw").mkdir()
    _prepare(raw, tmp_path / "sw" / "out", split + '[text]\nlanguage = "sw"\nnumber_words = { sw = { "12" = "kumi na mbili" } }\n')
    out = tmp_path / "sw" / "out"
    assert not [p for p in validate_out(out).problems if p.check == "language_oov"]
    import pyarrow.parquet as pq

    rows = pq.read_table(out / "stages" / "text.parquet").to_pylist()
    assert len(rows) == 6 and {r["language"] for r in rows} == {"sw"}
    assert all(segment(p) == (p,) for r in rows for p in r["phones"])
    assert "ŋ" in rows[0]["phones"] and "kumi" in rows[0]["words"]


def test_inventory_ids_survive_rebuilds(tmp_path: Path) -> None:
    from pipeline.stages.inventory import ids_path, read_ids, write_inventory

    ledger = tmp_path / "keep" / "ledger.tsv"
    ledger.parent.mkdir()
    first = write_inventory(tmp_path / "out", ledger, [(["ŋ", "o", "|", "m", "b", "e"], 1.25)], boundary="|")
    assert [(r["symbol"], r["id"]) for r in first] == [("b", 0), ("e", 1), ("m", 2), ("o", 3), ("|", 4), ("ŋ", 5)]
    assert {r["class"] for r in first} == {"vowel", "consonant", "boundary"}
    # OUT is deleted; new audio brings "a" and "ɲ" and no longer uses "b": old ids hold, new ones follow.
    (tmp_path / "out" / "lexicon" / "inventory.tsv").unlink()
    second = write_inventory(tmp_path / "out", ledger, [(["ɲ", "a", "m", "e"], 2.0)], boundary="|")
    ids = {r["symbol"]: r["id"] for r in second}
    assert {s: ids[s] for s in ("b", "e", "m", "o", "|", "ŋ")} == {"b": 0, "e": 1, "m": 2, "o": 3, "|": 4, "ŋ": 5}
    assert ids["a"] == 6 and ids["ɲ"] == 7
    assert next(r for r in second if r["symbol"] == "b")["count"] == 0
    assert read_ids(ids_path(ledger)) == ids
    assert (tmp_path / "out" / "lexicon" / "inventory.tsv").read_text(encoding="utf-8") == \
        ids_path(ledger).read_text(encoding="utf-8")


def test_grapheme_fallback_stays_in_the_lexicon_symbol_set(tmp_path: Path) -> None:
    # The lexicon writes IPA ("ya" -> j a); "yangu" spelled as letters would put "y" and
    # "g" (not lexicon symbols) beside IPA phones: the clip is rejected, saying why.
    (tmp_path / "lex.tsv").write_text("ya\tj a\nnina\tn i n a\nmbuzi\tm b u z i\n", encoding="utf-8")
    result, table = run_stage(tmp_path, {"a": "Nina ya yangu.", "b": "Nina nanu."}, backend="lexicon",
                              lexicon="lex.tsv", oov="graphemes", language="sw")
    (row,) = table.to_pylist()
    assert row["clip_id"] == clip("b") and row["phones"][-4:] == ["n", "a", "n", "u"]
    (rejected,) = result.rejects
    assert rejected["reason"] == "unpronounceable" and "would mix symbol sets" in rejected["detail"]
    assert "'y'" in rejected["detail"] and "'g'" in rejected["detail"]


def test_demo_build_has_two_languages_and_a_valid_inventory(demo_build: Path) -> None:
    import pyarrow.parquet as pq

    from pipeline.text.cmudict_index import cmudict_entries, strip_stress

    rows = pq.read_table(demo_build / "stages" / "text.parquet").to_pylist()
    swahili = [r for r in rows if r["language"] == "sw"]
    assert len(swahili) == 3 and all(set(r["word_backends"]) == {"rules"} for r in swahili)
    assert next(r for r in swahili if "kumi" in r["words"])["norm_text"] == "nina ng'ombe kumi na mbili shambani"
    # Every Swahili phone is a segment of panphon's feature table; every English one is
    # an ARPAbet phone of CMUdict (stress stripped).
    arpabet = {p for prons in cmudict_entries().values() for pron in prons for p in strip_stress(pron)}
    ipa = {p for r in swahili for p in r["phones"]}
    assert all(segment(p) == (p,) for p in ipa)
    assert {p for r in rows if r["language"] == "en" for p in r["phones"]} <= arpabet
    lines = (demo_build / "lexicon" / "inventory.tsv").read_text(encoding="utf-8").splitlines()
    assert lines[0] == "symbol\tid\tcount\tseconds\tclass"
    table = {f[0]: f for f in (line.split("\t") for line in lines[1:])}
    assert sorted(int(f[1]) for f in table.values()) == list(range(len(table)))
    for symbol, fields in table.items():
        assert symbol in arpabet or (symbol in ipa and fields[4] in ("vowel", "consonant")), symbol
    html = (demo_build / "report" / "index.html").read_text(encoding="utf-8")
    assert "<h2>Languages</h2>" in html and "<td>sw</td>" in html
    summary = json.loads((demo_build / "report" / "summary.json").read_text(encoding="utf-8"))
    assert sorted(summary["languages"]) == ["en", "sw"]
    assert summary["languages"]["en"]["oov_rate"] < 0.3 and summary["languages"]["sw"]["oov_rate"] is None


def test_loam_languages_lists_both_engines(capsys: pytest.CaptureFixture[str]) -> None:
    from pipeline.commands.cli import main

    assert main(["languages"]) == 0
    listing = capsys.readouterr().out
    assert "espeak   espeakng-loader" in listing and "epitran  epitran" in listing
    assert " sw " in listing and "yor-Latn" in listing and "sw -> epitran:swa-Latn" in listing


def test_grapheme_letters_get_no_phone_class(tmp_path: Path) -> None:
    from pipeline.stages.inventory import build_inventory

    # "c" is an IPA symbol (a voiceless palatal stop) but, as a grapheme, not a phone.
    rows = build_inventory([(["c", "a", "t"], 1.0)], boundary="", known={}, classify=False)
    assert [r["class"] for r in rows] == ["", "", ""]


def test_abbreviations_per_language(tmp_path: Path) -> None:
    # The built-in English list ("dr." -> "doctor") never reaches a Swahili transcript;
    # a Swahili list does, and only there.
    transcripts = {"a": "Bw. Juma ni dr. wa kijiji.", "b": "Dr. Okapi met Bw. Juma."}
    result, table = run_stage(tmp_path, {"a": transcripts["a"]}, language="sw",
                              language_abbreviations={"sw": {"bw.": "bwana"}})
    (row,) = table.to_pylist()
    assert row["norm_text"] == "bwana juma ni dr wa kijiji"
    result, table = run_stage(tmp_path, {"b": transcripts["b"]}, language_abbreviations={"sw": {"bw.": "bwana"}})
    (row,) = table.to_pylist()
    assert row["words"][:3] == ["doctor", "okapi", "met"] and "bwana" not in row["words"]


def test_inventory_ids_are_kept_when_new_audio_arrives(tmp_path: Path) -> None:
    # Invariant of issue 16's inventory: a rebuild after new audio keeps every existing id
    # and appends new symbols after them. The demo is prepared without its Swahili
    # speaker, then again once that speaker's recordings arrive.
    import shutil

    from pipeline.core.config import load_config
    from pipeline.core.runner import Runner
    from pipeline.stages import STAGES

    raw = tmp_path / "raw"
    shutil.copytree(DEMO, raw)
    # Without heron's read passage, whose aligned clips would fill the tiers before the
    # Swahili clips arrive (they would go to unlabelled and add no symbol).
    for passage in (raw / "heron").glob("heron_storm_log.*"):
        passage.unlink()
    arriving = tmp_path / "egret"
    shutil.move(raw / "egret", arriving)
    out = tmp_path / "out"

    def ids() -> dict[str, int]:
        lines = (out / "lexicon" / "inventory.tsv").read_text(encoding="utf-8").splitlines()
        header = lines[0].split("\t")
        rows = [dict(zip(header, line.split("\t"), strict=True)) for line in lines[1:]]
        return {r["symbol"]: int(r["id"]) for r in rows}

    # A tier larger than the demo's transcribed audio takes every eligible training clip,
    # so the arriving speaker's clips reach the inventory whichever side the split puts
    # that speaker on (held out or trained on).
    config = load_config(raw / "corpus.toml", overrides={"split.labelled_budgets": ["15s", "30s", "5m"]})
    Runner(raw, out, config, stages=STAGES, workers=1).prepare()
    before = ids()
    shutil.move(arriving, raw / "egret")
    Runner(raw, out, config, stages=STAGES, workers=1).prepare()
    after = ids()
    assert {s: after[s] for s in before} == before
    added = sorted(after[s] for s in after if s not in before)
    assert added, "the Swahili clips brought no new symbol; the test would prove nothing"
    assert added == list(range(max(before.values()) + 1, max(before.values()) + 1 + len(added)))


# --- the languages measure, columnar against a loop over the rows ---------------------


def _rates_by_rows(rows: list[dict]) -> dict[str, dict]:
    """The per-row definition of pipeline.commands.languages.language_rates."""
    dictionary = {"cmudict": "english", "neural": "english", "lexicon": "lexicon"}
    out: dict[str, dict] = {}
    sources: dict[str, set] = {}
    for row in rows:
        info = out.setdefault(row["language"], {"clips": 0, "word_tokens": 0, "dictionary_word_tokens": 0,
                                                "oov_word_tokens": 0, "backend": None})
        info["clips"] += 1
        info["word_tokens"] += len(row["words"])
        for word, source in zip(row["words"], row["word_backends"], strict=False):
            sources.setdefault(row["language"], set()).add(source)
            if source in dictionary:
                info["backend"] = info["backend"] or dictionary[source]
                info["dictionary_word_tokens"] += 1
                info["oov_word_tokens"] += word in set(row["oov_words"])
    for tag, info in out.items():
        d, o = info["dictionary_word_tokens"], info["oov_word_tokens"]
        info["oov_rate"] = round(o / d, 4) if d else None
        info["sources"] = sorted(sources.get(tag, ()))
    return dict(sorted(out.items()))


@pytest.mark.parametrize("offset", [0, 2])
def test_language_rates_agree_with_the_row_by_row_definition(offset: int) -> None:
    """Repeated words, an OOV word of another row, lists that disagree in length, a
    language with no dictionary backend, an empty table, and a sliced one."""
    import pyarrow as pa

    from pipeline.commands.languages import language_rates

    rows = [
        {"language": "en", "words": ["zorb", "a", "zorb"], "oov_words": ["zorb"],
         "word_backends": ["neural", "cmudict", "neural"]},
        {"language": "sw", "words": ["chai", "zorb"], "oov_words": [], "word_backends": ["rules", "rules"]},
        {"language": "en", "words": ["a", "zorb"], "oov_words": [], "word_backends": ["lexicon", "cmudict"]},
        {"language": "en", "words": ["b", "c", "zorb"], "oov_words": ["zorb", "c"], "word_backends": ["cmudict"]},
        {"language": "yo", "words": ["o"], "oov_words": ["o"], "word_backends": ["graphemes", "rules"]},
        {"language": "en", "words": ["x"], "oov_words": ["x"], "word_backends": ["lexicon"]},
    ]
    table = pa.Table.from_pylist(rows[:offset] + rows).slice(offset)
    assert language_rates(table) == _rates_by_rows(rows)
    assert language_rates(table.slice(0, 0)) == {}
