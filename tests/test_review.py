"""`loam review` without a browser: the server's refusals, the queue, and the decisions file."""

from __future__ import annotations

import http.client
import json
import multiprocessing
import shutil
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pyarrow.parquet as pq
import pytest

from pipeline.commands.review_queue import build_queue
from pipeline.commands.review_server import ReviewState, make_server
from pipeline.core.config import build_config
from pipeline.core.names import HELDOUT, subset_manifest
from pipeline.core.stage import StageContext
from pipeline.stages.decisions import append_decision, effective, read_decisions
from pipeline.stages.review_apply import split_exclusions
from pipeline.stages.review_text import plan_text

TOKEN = "t0ken-for-tests"


@pytest.fixture(scope="module")
def server(demo_build: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[ReviewState]:
    # A copy: the server writes pictures under OUT, and the demo build is shared.
    out = tmp_path_factory.mktemp("review") / "out"
    shutil.copytree(demo_build, out)
    queue = build_queue(out, spot_checks=3, seed=7)
    decisions = tmp_path_factory.mktemp("decisions") / "ledger.decisions.jsonl"
    state = ReviewState(queue, out=out, decisions=decisions, token=TOKEN, backend_of=lambda language: "english")
    httpd = make_server(state, port=0)
    thread = threading.Thread(target=httpd.serve_forever, daemon=True)
    thread.start()
    yield state
    httpd.shutdown()
    httpd.server_close()


def ask(state: ReviewState, method: str, path: str, *, headers: dict[str, str] | None = None,
        body: bytes | None = None) -> tuple[int, bytes]:
    conn = http.client.HTTPConnection("127.0.0.1", state.port, timeout=30)
    sent = {"Host": f"127.0.0.1:{state.port}", **(headers or {})}
    conn.request(method, path, body=body, headers=sent)
    reply = conn.getresponse()
    data = reply.read()
    conn.close()
    return reply.status, data


def post(state: ReviewState, record: dict[str, Any], **headers: str) -> tuple[int, bytes]:
    sent = {"Origin": f"http://127.0.0.1:{state.port}", "Content-Type": "application/json", **headers}
    return ask(state, "POST", f"/{TOKEN}/api/decide", headers=sent, body=json.dumps(record).encode())


def test_page_and_queue_need_the_token(server: ReviewState) -> None:
    assert ask(server, "GET", f"/{TOKEN}/")[0] == 200
    assert ask(server, "GET", "/")[0] == 403
    assert ask(server, "GET", "/wrong-token/api/queue")[0] == 403
    assert ask(server, "GET", f"/{TOKEN}x/api/queue")[0] == 403


def test_other_hosts_origins_and_sites_are_refused(server: ReviewState) -> None:
    # A page elsewhere that rebinds its name to 127.0.0.1 sends its own Host (DNS rebinding).
    assert ask(server, "GET", f"/{TOKEN}/api/queue", headers={"Host": "attacker.example"})[0] == 403
    assert ask(server, "GET", f"/{TOKEN}/api/queue", headers={"Origin": "http://attacker.example"})[0] == 403
    assert ask(server, "GET", f"/{TOKEN}/api/queue", headers={"Sec-Fetch-Site": "cross-site"})[0] == 403
    assert ask(server, "GET", f"/{TOKEN}/api/queue", headers={"Sec-Fetch-Site": "same-origin"})[0] == 200
    clip = server.queue.items[0]["clip_id"]
    status, _ = post(server, {"decision": "keep", "clip_id": clip}, Origin="http://attacker.example")
    assert status == 403
    # Without an Origin header a POST did not come from the page.
    status, _ = ask(server, "POST", f"/{TOKEN}/api/decide", headers={"Content-Type": "application/json"},
                    body=json.dumps({"decision": "keep", "clip_id": clip}).encode())
    assert status == 403
    # A form post (no preflight from another site) is not JSON: refused.
    status, _ = post(server, {"decision": "keep", "clip_id": clip}, **{"Content-Type": "text/plain"})
    assert status == 415
    assert not server.decisions.exists() or clip not in server.decisions.read_text()


def test_only_the_clips_of_the_manifests_are_served(server: ReviewState) -> None:
    item = server.queue.items[0]
    status, data = ask(server, "GET", f"/{TOKEN}/audio/{item['clip_id']}")
    assert status == 200 and data[:4] == b"fLaC"
    status, data = ask(server, "GET", f"/{TOKEN}/audio/{item['clip_id']}", headers={"Range": "bytes=4-9"})
    assert status == 206 and len(data) == 6
    for path in ("../config.resolved.json", "..%2f..%2fetc%2fpasswd", "%2e%2e/ledger.tsv",
                 f"{item['clip_id']}/../../ledger.tsv", "audio/" + item["clip_id"]):
        assert ask(server, "GET", f"/{TOKEN}/audio/{path}")[0] == 404, path
    assert ask(server, "GET", f"/{TOKEN}/../ledger.tsv")[0] in (403, 404)
    status, data = ask(server, "GET", f"/{TOKEN}/picture/{item['clip_id']}")
    # PNG signature (ISO/IEC 15948, section 5.2).
    assert status == 200 and data[:8] == b"\x89PNG\r\n\x1a\n"
    assert [p.parent for p in server.out.rglob("*.png")] == [server.out / "review" / "pictures"]


def test_replies_forbid_scripts_from_elsewhere_and_sniffing(server: ReviewState) -> None:
    conn = http.client.HTTPConnection("127.0.0.1", server.port, timeout=30)
    conn.request("GET", f"/{TOKEN}/", headers={"Host": f"127.0.0.1:{server.port}"})
    reply = conn.getresponse()
    reply.read()
    assert "script-src 'self'" in reply.getheader("Content-Security-Policy")
    assert reply.getheader("X-Content-Type-Options") == "nosniff"
    assert reply.getheader("Referrer-Policy") == "no-referrer"
    conn.close()


def test_a_decision_takes_its_hashes_from_the_queue(server: ReviewState) -> None:
    item = next(it for it in server.queue.items if it["whole_file"])
    status, _ = post(server, {"decision": "exclude", "clip_id": item["clip_id"], "reason": "other",
                              "note": "<script>x</script>", "source_sha256": "0" * 64})
    assert status == 200
    found, bad = read_decisions(server.decisions)
    mine = [d for d in found if d.clip_id == item["clip_id"]][-1]
    assert bad == [] and mine.source_sha256 == item["source_sha256"] and mine.note == "<script>x</script>"
    assert post(server, {"decision": "keep", "clip_id": "nobody-0000000000"})[0] == 400
    assert post(server, {"decision": "pronunciation", "clip_id": item["clip_id"], "word": "notoov",
                         "phones": ["N"]})[0] == 400
    oov = next(it for it in server.queue.items if it["oov"])
    word = oov["oov"][0]["word"]
    status, data = post(server, {"decision": "pronunciation", "clip_id": oov["clip_id"], "word": word,
                                 "phones": ["s", "l", "ɪ"]})
    assert status == 400 and "not ARPAbet phones" in json.loads(data)["error"]


def _append_many(path: str, worker: int) -> None:
    for i in range(50):
        append_decision(Path(path), {"decision": "keep", "clip_id": f"c{worker}-{i}"})


def test_two_reviewers_appending_at_once_lose_nothing(tmp_path: Path) -> None:
    path = tmp_path / "d.jsonl"
    procs = [multiprocessing.get_context("fork").Process(target=_append_many, args=(str(path), w)) for w in range(2)]
    for p in procs:
        p.start()
    for p in procs:
        p.join()
    found, bad = read_decisions(path)
    assert bad == [] and len(found) == 100 and len({d.clip_id for d in found}) == 100
    assert path.read_text().count("loam_review_decisions") == 1


def _ctx(demo_build: Path) -> StageContext:
    return StageContext(raw=Path("/nonexistent-raw"), out=demo_build, config=build_config({}), inputs={}, workers=1)


def test_stale_superseded_and_unreadable_decisions_are_counted_not_applied(demo_build: Path, tmp_path: Path,
                                                                           monkeypatch: pytest.MonkeyPatch) -> None:
    import pyarrow.parquet as pq

    ingest = pq.read_table(demo_build / "stages" / "ingest.parquet").to_pylist()
    row = next(r for r in ingest if r["transcript"])
    path = tmp_path / "ledger.decisions.jsonl"
    monkeypatch.setattr("pipeline.stages.review_apply.decisions_file", lambda ctx: path)
    monkeypatch.setattr("pipeline.stages.review_text.decisions_file", lambda ctx: path)
    base = {"clip_id": row["source_id"], "source_path": row["source_path"], "source_sha256": row["sha256"]}
    append_decision(path, {**base, "decision": "fix_transcript", "transcript": "first try"})
    append_decision(path, {**base, "decision": "fix_transcript", "transcript": "second try"})
    # The recording at the same path was replaced: its clip id is another now.
    append_decision(path, {**base, "clip_id": "old-take-0123456789", "decision": "wrong_transcript"})
    append_decision(path, {"decision": "exclude", "clip_id": "gone-9999999999"})
    with path.open("a") as fh:
        fh.write("{not json\n")
    plan = plan_text(_ctx(demo_build), ingest)
    assert plan.fixes[row["source_id"]].transcript == "second try"
    assert dict(plan.tally.not_applied) == {"audio_changed": 1}
    assert any("is now clip " + row["source_id"] in s for s in plan.tally.sentences)
    # The split stage counts the exclusion of a clip this build does not have, the
    # superseded line and the unreadable one.
    rejects, excluded, tally, _ = split_exclusions(_ctx(demo_build), [])
    assert rejects == [] and excluded == set()
    assert dict(tally.not_applied) == {"clip_gone": 1, "superseded": 1, "unreadable": 1}


def test_a_later_verdict_replaces_an_earlier_one_of_another_kind() -> None:
    from pipeline.stages.decisions import check_decision

    first = check_decision({"decision": "exclude", "clip_id": "a-0123456789"})
    second = check_decision({"decision": "keep", "clip_id": "a-0123456789"})
    verdicts, _, superseded = effective([first, second])
    assert verdicts["a-0123456789"].decision == "keep" and superseded == [first]


def test_the_text_stage_applies_fixes_wrong_transcripts_and_pronunciations(tmp_path: Path) -> None:
    from tests.test_text_stage import ENGLISH, ingest_row, run_stage

    path = tmp_path / "out" / "ledger.decisions.jsonl"
    path.parent.mkdir()

    def decide(name: str, **fields: Any) -> None:
        row = ingest_row(name, "")
        append_decision(path, {"clip_id": row["source_id"], "source_sha256": row["sha256"], **fields})

    decide("b_ferry", decision="wrong_transcript")
    decide("f_none", decision="fix_transcript", transcript="The tide is out.")  # untranscribed until now
    decide("e_nordic", decision="fix_transcript", transcript="Two smørbrød, thanks.")  # still bad characters
    decide("a_zorb", decision="pronunciation", language="en", word="kravost", phones=["K", "R", "AA1", "V", "OW0", "S", "T"])
    decide("a_zorb", decision="pronunciation", language="en", word="zorblax", phones=["z", "o"])
    result, table = run_stage(tmp_path, ENGLISH)
    rows = {r["clip_id"]: r for r in table.to_pylist()}
    rejects = {r["clip_id"]: r for r in result.rejects}
    ferry, tide, zorb = (ingest_row(n, "")["source_id"] for n in ("b_ferry", "f_none", "a_zorb"))
    assert ferry not in rows and rejects[ferry]["reason"] == "review_transcript_wrong"
    assert rows[tide]["transcript"] == "The tide is out." and rows[tide]["transcript_origin"] == "review"
    assert rows[zorb]["transcript_origin"] == "sidecar"
    words = dict(zip(rows[zorb]["words"], rows[zorb]["word_backends"], strict=True))
    assert words["kravost"] == "override" and words["zorblax"] == "neural"
    review = result.summary["review"]
    assert review["applied"] == {"fix_transcript": 1, "pronunciation": 1, "wrong_transcript": 1}
    assert review["not_applied"] == {"invalid_phones": 1, "transcript_rejected": 1}


def test_queue_items_carry_the_part_of_their_held_out_row(server: ReviewState) -> None:
    # Issue 20 asks for each clip's subset, part and tiers; the part is the held-out row's own.
    rows = {r["clip_id"]: r for r in pq.read_table(server.out / subset_manifest(HELDOUT)).to_pylist()}
    held = [it for it in server.queue.items if it["subset"] == HELDOUT]
    assert held, "the demo queues held-out clips"
    assert all(it["part"] == rows[it["clip_id"]]["part"] and it["part"] for it in held)
    assert all(it["part"] is None for it in server.queue.items if it["subset"] != HELDOUT)
