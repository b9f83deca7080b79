"""``loam review OUT``: build the queue, print the page's URL, serve until interrupted."""

from __future__ import annotations

import sys
from dataclasses import replace
from pathlib import Path

from pipeline.commands.review_queue import build_queue
from pipeline.commands.review_server import ReviewState, make_server, new_token
from pipeline.core.errors import UsageError
from pipeline.stages.decisions import decisions_path


def serve(out: Path, *, port: int, spot_checks: int) -> int:
    """Serve the review page of ``out`` on 127.0.0.1 until interrupted; the URL is the first line printed."""
    from pipeline.commands.validate import load_resolved_config

    if not out.is_dir():
        raise UsageError(f"OUT {str(out)!r} does not exist")
    if spot_checks < 0:
        raise UsageError(f"--spot-checks {spot_checks}: expected 0 or more")
    if not 0 <= port <= 65535:
        raise UsageError(f"--port {port}: expected 0 (any free port) to 65535")
    out = out.resolve()
    config, _ = load_resolved_config(out)
    queue = build_queue(out, spot_checks=spot_checks, seed=config.seed)
    if queue.ledger_path is None:
        raise UsageError(f"OUT {str(out)!r}: stages/split.summary.json does not say where the split ledger is; "
                         "run `loam prepare` first")
    state = ReviewState(queue, out=out, decisions=decisions_path(queue.ledger_path), token=new_token(),
                        backend_of=lambda language: replace(config.text, language=language).resolved_backend
                        if language else "")
    try:
        server = make_server(state, port=port)
    except OSError as exc:
        raise UsageError(f"--port {port}: cannot listen on 127.0.0.1 ({exc.strerror})") from exc
    print(f"http://127.0.0.1:{state.port}/{state.token}/", flush=True)
    print(f"review: {len(queue.items)} clips queued; decisions go to {state.decisions}; "
          "the next `loam prepare` applies them. Ctrl+C ends the server.", flush=True)
    try:
        server.serve_forever()
    except KeyboardInterrupt:
        print("review: stopped", file=sys.stderr)
    finally:
        server.server_close()
    return 0
