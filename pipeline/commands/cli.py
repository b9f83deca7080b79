"""The ``loam`` command line.

Exit codes: 0 done, 1 data problems stopped the run (or validation found errors),
2 usage or configuration error.
"""

from __future__ import annotations

import argparse
import json
import sys
import traceback
from pathlib import Path
from typing import TYPE_CHECKING, Any

from pipeline import __version__
from pipeline.core.allocator import adapt_process
from pipeline.core.collector import collect_less_often
from pipeline.core.errors import LoamError, UsageError
from pipeline.core.startup import exit_without_teardown, limit_blas_threads

if TYPE_CHECKING:
    from pipeline.core.raw_walk import RawWalk

EPILOG = """\
exit codes: 0 done; 1 data problems stopped the run (validate: errors found);
2 usage or configuration error.

Voice recordings are personal data: prepare only audio you have consent and a
licence to use, and follow the data-protection law that applies to you.
"""


def _parse_override(text: str) -> tuple[str, Any]:
    """``section.key=value`` with the value read as TOML (falls back to a plain string)."""
    if "=" not in text:
        raise UsageError(f"--set {text!r}: expected KEY=VALUE, e.g. --set audio.sample_rate=22050")
    key, value = text.split("=", 1)
    # Not pipeline.core.config's: importing that module (its dataclasses) cost 0.017 s
    # of a no-change rerun, which never reads the config.
    if sys.version_info >= (3, 11):
        import tomllib
    else:  # pragma: no cover - exercised on 3.10 only
        import tomli as tomllib

    try:
        parsed = tomllib.loads(f"v = {value}")["v"]
    except tomllib.TOMLDecodeError:
        parsed = value
    return key.strip(), parsed


def _overrides(args: argparse.Namespace) -> tuple[dict[str, Any], dict[str, str]]:
    """Config overrides from the command line (dotted key -> value), and for each key the
    option as typed, so a message about a bad value can name it."""
    out: dict[str, Any] = {}
    flags: dict[str, str] = {}
    for text in getattr(args, "set", None) or []:
        key, value = _parse_override(text)
        out[key] = value
        flags[key] = f"--set {text.strip()}"
    if getattr(args, "workers", None) is not None:
        out["run.workers"] = args.workers
        flags["run.workers"] = f"--workers {args.workers}"
    if getattr(args, "scheduler", None):
        out["run.scheduler"] = args.scheduler
        flags["run.scheduler"] = f"--scheduler {args.scheduler}"
    if getattr(args, "no_progress", False):
        out["run.progress"] = False
        flags["run.progress"] = "--no-progress"
    return out, flags


def _add_run_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("raw", type=Path, metavar="RAW", help="the raw dump (never modified)")
    p.add_argument("out", type=Path, metavar="OUT", help="output folder")
    p.add_argument("--config", type=Path, metavar="FILE", help="corpus config (TOML); defaults apply without one")
    p.add_argument("--workers", type=int, metavar="N", help="worker processes for per-file work (default: all cores)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="run per-file work on a dask.distributed scheduler, e.g. tcp://10.0.0.5:8786")
    p.add_argument("--set", action="append", metavar="KEY=VALUE", help="override one config value, e.g. --set audio.sample_rate=22050 (repeatable)")
    p.add_argument("--no-cache", action="store_true", help="ignore and do not fill the per-file caches under OUT/cache")
    p.add_argument("--no-progress", action="store_true", help="no progress bars")


def build_parser() -> argparse.ArgumentParser:
    """The ``loam`` argument parser: ``prepare``, ``stage``, ``validate`` and ``report``.

    Returns
    -------
    argparse.ArgumentParser
        The parser; ``args.command`` names the sub-command chosen.

    Examples
    --------
    >>> args = build_parser().parse_args(["validate", "build/demo", "--strict"])
    >>> args.command, str(args.out), args.strict
    ('validate', 'build/demo', True)
    """
    parser = argparse.ArgumentParser(
        prog="loam",
        description="Turn a raw dump of speech recordings into clean audio, phoneme transcriptions and "
        "speaker-disjoint labelled / unlabelled / held-out Parquet manifests.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"loam {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("prepare", help="run every stage: ingest, audio, text, split",
                       description="Run every stage on RAW and write manifests, audio and rejects into OUT. "
                       "Stages whose inputs, parameters and code are unchanged are reused.",
                       epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    _add_run_options(p)
    p.add_argument("--fresh", action="store_true", help="ignore the split ledger and assign every clip anew")

    p = sub.add_parser("stage", help="run one stage (its inputs must already be in OUT)",
                       description="Run a single stage; the manifests of the stages before it must exist in OUT.",
                       epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("name", metavar="NAME", help="ingest, audio, text or split")
    _add_run_options(p)
    p.add_argument("--fresh", action="store_true", help="(split) ignore the split ledger")

    p = sub.add_parser("validate", help="check the manifests and audio of OUT before training",
                       description="Check every manifest against its schema, the audio files against the manifests, "
                       "and the split for leaks between held-out and training.",
                       epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("out", type=Path, metavar="OUT", help="a folder written by loam prepare")
    p.add_argument("--json", action="store_true", help="print a machine-readable report")
    p.add_argument("--manifests-only", action="store_true",
                   help="check the manifests alone, without opening the audio files (fastest)")
    p.add_argument("--deep", action="store_true", help="also decode every clip, re-hash it and re-measure its loudness")
    p.add_argument("--strict", action="store_true", help="warnings count as errors for the exit code")

    p = sub.add_parser("report", help="write OUT/report/index.html, summary.json and datasheet.md",
                       description="Summarise OUT in a self-contained HTML page and a JSON file, and write "
                                   "its datasheet (answers from the config's [datasheet] section).",
                       epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("out", type=Path, metavar="OUT", help="a folder written by loam prepare")

    p = sub.add_parser("locate", help="the RAW file or speaker behind a reference of a pseudonymised build",
                       description="Resolve a source reference (src-...) or speaker pseudonym (spk-...) through "
                       "the private mapping in OUT's cache, or through --mapping (privacy.mapping_file).",
                       epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("ref", metavar="REF", help="a source_path (src-...) or speaker (spk-...) of a manifest")
    p.add_argument("out", type=Path, metavar="OUT", nargs="?", help="a folder written by loam prepare")
    p.add_argument("--mapping", type=Path, metavar="FILE", help="the mapping file privacy.mapping_file names")

    p = sub.add_parser("review", help="serve a local page to listen to flagged clips and record decisions",
                       description="Serve a page on 127.0.0.1 listing the clips that need a person (flags, gates, "
                       "near-duplicates, guessed pronunciations, rewritten transcripts, a spot-check sample). "
                       "Decisions are appended to a file beside the split ledger; the next `loam prepare` applies "
                       "them. The first line printed is the page's URL, with its access token.",
                       epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("out", type=Path, metavar="OUT", help="a folder written by loam prepare")
    p.add_argument("--port", type=int, default=0, metavar="N", help="port on 127.0.0.1 (default: any free port)")
    p.add_argument("--spot-checks", type=int, default=20, metavar="N",
                   help="ordinary labelled clips drawn at random (seeded by the build's seed) for spot checks")

    sub.add_parser("languages", help="list the languages and pronunciation engines of this install",
                   description="List the espeak-ng voices and epitran rule sets the rules backend can use.")
    return parser


def _nothing_changed(args: argparse.Namespace, invocation: str, raw_walk: RawWalk | None = None) -> bool:
    """End a ``prepare`` at once when RAW, OUT, config and code are exactly as the last
    finished run left them (``pipeline.core.snapshot``); False means do the full run.
    ``raw_walk`` gives RAW's listing when the check needs it."""
    from pipeline.core import snapshot
    from pipeline.core.fsio import write_text_atomic
    from pipeline.core.lock import output_lock
    from pipeline.core.runlog import setup_logging

    state = snapshot.load(args.out) if args.out.is_dir() else None
    if state is None:
        return False
    with output_lock(args.out):
        if not snapshot.unchanged(state, invocation=invocation, raw=args.raw, out=args.out,
                                  raw_listing=None if raw_walk is None else raw_walk.listing):
            return False
        log, log_path = setup_logging(args.out, args.command)
        log.info("loam %s %s %s -> %s (log: %s)", __version__, args.command, args.raw, args.out, log_path)
        log.info("nothing changed since the last run (RAW, OUT, config and code are as it left them): "
                 "every stage reused")
        for note in state.get("notes", []):
            log.info("%s", note)
        write_text_atomic(args.out / "logs" / "last-run.json", json.dumps({
            "stages": [], "unchanged_since_last_run": True}, indent=2) + "\n")
    return True


def _cmd_prepare(args: argparse.Namespace, stages: tuple[str, ...] | None = None) -> int:
    if not args.raw.is_dir():
        raise UsageError(f"RAW {str(args.raw)!r} is not a folder")
    if args.out.resolve() == args.raw.resolve() or args.raw.resolve() in args.out.resolve().parents:
        raise UsageError(f"OUT {str(args.out)!r} must not be inside RAW {str(args.raw)!r}: the raw dump is never written to")
    overrides, override_flags = _overrides(args)
    if stages is None and not args.fresh and not args.no_cache and (args.config is None or args.config.is_file()):
        from pipeline.core import snapshot
        from pipeline.core.raw_walk import RawWalk

        invocation = snapshot.invocation_digest(raw=args.raw, out=args.out, config_path=args.config,
                                                overrides=overrides, version=__version__)
        # RAW's listing begins now, in a helper process, while this one imports and
        # loads what the run needs (pipeline.core.raw_walk).
        raw_walk = RawWalk(args.raw)
        try:
            if _nothing_changed(args, invocation, raw_walk):
                return 0
            return _run_prepare(args, stages, overrides, override_flags, invocation=invocation, raw_walk=raw_walk)
        finally:
            raw_walk.close()
    return _run_prepare(args, stages, overrides, override_flags)


def _run_prepare(args: argparse.Namespace, stages: tuple[str, ...] | None, overrides: dict[str, Any],
                 override_flags: dict[str, str], *, invocation: str | None = None,
                 raw_walk: RawWalk | None = None) -> int:
    """The full run (``invocation`` and ``raw_walk``: a snapshot is recorded at its end)."""
    from pipeline.core import names
    from pipeline.core.config import load_config
    from pipeline.core.runlog import setup_logging
    from pipeline.core.runner import Runner
    from pipeline.stages import STAGES

    config = load_config(args.config, overrides=overrides, override_flags=override_flags,
                         checked=None if args.no_cache else args.out / names.CONFIG_CHECKS)
    try:
        args.out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise UsageError(f"OUT {str(args.out)!r}: cannot create the folder ({exc.strerror})") from exc
    log, log_path = setup_logging(args.out, args.command)
    log.info("loam %s %s %s -> %s (log: %s)", __version__, args.command, args.raw, args.out, log_path)
    runner = Runner(args.raw, args.out, config, stages=STAGES, workers=config.run.workers,
                    scheduler=config.run.scheduler,
                    use_cache=not args.no_cache, options={"fresh": getattr(args, "fresh", False)}, log=log,
                    invocation=invocation, raw_listing=None if raw_walk is None else raw_walk.listing)
    runner.prepare(stages)
    return 0


def _cmd_stage(args: argparse.Namespace) -> int:
    from pipeline.stages import STAGES

    STAGES[args.name]  # UsageError for a name that is not a stage
    return _cmd_prepare(args, stages=(args.name,))


def _cmd_validate(args: argparse.Namespace) -> int:
    from pipeline.commands.validate import exit_code, format_table, validate_out

    if args.deep and args.manifests_only:
        raise UsageError("--deep and --manifests-only exclude each other")
    result = validate_out(args.out, deep=args.deep, audio_files=not args.manifests_only)
    if args.json:
        print(json.dumps(result.to_json(), indent=2, ensure_ascii=False))
    else:
        print(format_table(result))
        found = sum(p.check == "privacy_names" and p.severity == "error" for p in result.problems)
        print(_share_note(args.out, names_found=found, pseudonymised=result.pseudonymised))
    return exit_code(result, strict=args.strict)


def _share_note(out: Path, *, names_found: int = 0, pseudonymised: bool | None = None) -> str:
    """Which files under ``out`` are safe to share, from its resolved config (or
    ``pseudonymised``, when the caller has read it) and the ``privacy_names`` errors a
    validation found."""
    from pipeline.commands.shareable import share_note
    from pipeline.commands.validate import load_resolved_config

    if pseudonymised is None:
        config, problems = load_resolved_config(out)
        pseudonymised = not problems and config.privacy.pseudonymise
    return share_note(pseudonymised=pseudonymised, names_found=names_found)


def _cmd_report(args: argparse.Namespace) -> int:
    from pipeline.commands.report import write_report

    index = write_report(args.out)
    print(f"report: {index}")
    print(_share_note(args.out))
    return 0


def _cmd_locate(args: argparse.Namespace) -> int:
    from pipeline.commands.shareable import locate

    kind, name = locate(args.ref, out=args.out, mapping_file=args.mapping)
    print(f"{args.ref}\t{kind}\t{name}")
    return 0


def _cmd_review(args: argparse.Namespace) -> int:
    from pipeline.commands.review import serve

    return serve(args.out, port=args.port, spot_checks=args.spot_checks)


def _cmd_languages(args: argparse.Namespace) -> int:
    from pipeline.commands.languages import languages_listing

    print(languages_listing())
    return 0


COMMANDS = {"prepare": _cmd_prepare, "stage": _cmd_stage, "validate": _cmd_validate, "report": _cmd_report,
            "locate": _cmd_locate, "languages": _cmd_languages, "review": _cmd_review}


def main(argv: list[str] | None = None) -> int:
    """Run one ``loam`` command and return its exit status; never raises.

    Parameters
    ----------
    argv : list of str, optional
        The arguments after ``loam`` (``sys.argv[1:]`` when None).

    Returns
    -------
    int
        0 done; 1 data problems stopped the run (``validate``: errors found), a file
        could not be written, or an internal error (its traceback is printed); 2 usage
        or configuration error; 130 interrupted. Messages go to standard error.

    Examples
    --------
    >>> import contextlib, io, os
    >>> from unittest import mock
    >>> with mock.patch.dict(os.environ), contextlib.redirect_stderr(io.StringIO()) as err:
    ...     code = main(["validate", "/nonexistent/out"])
    >>> code, err.getvalue().strip()
    (2, "loam: error: OUT '/nonexistent/out' does not exist")
    """
    limit_blas_threads()
    collect_less_often()
    adapt_process()  # glibc's malloc thresholds, when the environment fixed them (pipeline.core.allocator)
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse exits 2 on usage errors, 0 on --help
        return int(exc.code or 0)
    if not args.command:
        parser.print_help()
        return 2
    try:
        return COMMANDS[args.command](args)
    except LoamError as exc:
        print(f"loam: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except OSError as exc:  # disk full, permissions: the environment, not the data
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"loam: error: {where}{exc.strerror or exc}; nothing half-written was left under a final name",
              file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("loam: interrupted", file=sys.stderr)
        return 130
    except Exception:  # a bug: say so plainly, keep the traceback for the report
        print("loam: internal error (please report it with this traceback):", file=sys.stderr)
        traceback.print_exc()
        return 1


def console() -> None:
    """The ``loam`` command: :func:`main`, then exit without tearing the interpreter down
    (:func:`pipeline.core.startup.exit_without_teardown`)."""
    exit_without_teardown(main())
