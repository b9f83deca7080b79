"""``make bench``: throughput, memory, rebuild costs and scaling of ``loam prepare``.

Prints a table and writes the same figures as JSON (``<out>/results.json``).
Every figure is measured in this run on this machine; nothing is a timed test.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from bench.workload import Spec, make_workload  # noqa: E402

LOAM = [sys.executable, "-m", "pipeline"]
LIBRARY_IMPORTS = "import numpy, pyarrow.compute, pyarrow.parquet"
MEASURE = (
    "import resource, subprocess, sys, time\n"
    "t = time.perf_counter(); rc = subprocess.run(sys.argv[1:]).returncode\n"
    "u = resource.getrusage(resource.RUSAGE_CHILDREN)\n"
    "print(time.perf_counter() - t, u.ru_maxrss, u.ru_utime + u.ru_stime, rc)\n"
)


CPU_SECONDS: dict[str, list[float]] = {}


def measured(cmd: list[str], *, label: str = "", exit_codes: tuple[int, ...] = (0,)) -> tuple[float, float]:
    """Wall seconds and peak RSS (MB, the largest process among the command's tree).

    The CPU seconds of the whole tree are kept under ``label``: on a shared virtual
    machine they vary far less than wall time, so cost shares are taken from them.
    ``exit_codes`` are the command's statuses that are a result, not a failure (1 from
    ``loam validate``: the build has errors, which it found and reported).

    The file systems' dirty pages are written out first (``os.sync``), so the command does
    not pay for writes made before it: the benchmark's own, such as the workload's files
    or the hard links that lay a rebuild round's OUT out again. Loam flushes OUT once
    before its manifests name the clips (``syncfs``), and that flush took them along: the
    100,000-source rebuild's audio stage took 2.36 and 2.49 s right after its starting
    state was copied in, 2.10 and 2.28 s with a flush between (two alternating rounds each).
    """
    os.sync()
    out = subprocess.run([sys.executable, "-c", MEASURE, *cmd], capture_output=True, text=True, check=True)
    wall, rss_kb, cpu, rc = out.stdout.split()[-4:]
    if int(rc) not in exit_codes:
        raise SystemExit(f"bench: {' '.join(cmd)} failed with exit code {rc}:\n{out.stderr[-3000:]}")
    if label:
        CPU_SECONDS.setdefault(label, []).append(float(cpu))
    return float(wall), int(rss_kb) / 1024


def prepare(raw: Path, out: Path, workers: int, *extra: str, label: str = "") -> tuple[float, float]:
    cmd = [*LOAM, "prepare", str(raw), str(out), "--config", str(REPO / "bench" / "bench.toml"),
           "--workers", str(workers), "--no-progress", "--set", f'split.ledger="{out / "ledger.tsv"}"', *extra]
    return measured(cmd, label=label)


def last_json_line(script: list[str]) -> dict:
    """Run a companion benchmark; its last output line is its figures as JSON."""
    done = subprocess.run([sys.executable, *script], capture_output=True, text=True)
    if done.returncode != 0:
        return {"error": done.stderr[-500:]}
    return json.loads(done.stdout.strip().splitlines()[-1])


def fresh_prepare(raw: Path, out: Path, workers: int, *extra: str, label: str = "") -> tuple[float, float]:
    shutil.rmtree(out, ignore_errors=True)
    return prepare(raw, out, workers, *extra, label=label)


def stage_seconds(out: Path) -> dict[str, float]:
    """Wall seconds per stage; a stage that ran in the driver while another stage's
    workers were busy is listed as "text (during audio)", its time inside the other's."""
    data = json.loads((out / "logs" / "last-run.json").read_text())
    return {(f"{s['name']} (during {s['during']})" if s.get("during") else s["name"]): s["seconds"]
            for s in data["stages"]}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--out", type=Path, default=REPO / "build" / "bench")
    parser.add_argument("--minutes", type=float, default=60.0, help="audio in the workload")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--skip-long", action="store_true", help="skip the 60-minute single-file memory case")
    parser.add_argument("--repeat", type=int, default=5,
                        help="rounds of every kind of run: wall times are the fastest of each kind, ratios the median of each round's")
    args = parser.parse_args()
    work = args.out.resolve()
    work.mkdir(parents=True, exist_ok=True)
    os.chdir(REPO)

    facts = make_workload(work / "workload", Spec(minutes=args.minutes, long_minutes=min(3.0, args.minutes / 10)))
    raw = work / "workload" / "raw"
    audio_s = float(facts["seconds"])
    results: dict[str, object] = {"audio_hours": audio_s / 3600, "files": facts["files"], "workers": args.workers}

    cold_out = work / "out"
    nogates_out = work / "out_nogates"
    one_out = work / "out_1worker"
    floor_cmd = [sys.executable, str(REPO / "bench" / "floor.py"), str(raw), str(args.workers)]
    handwritten_cmd = [sys.executable, str(REPO / "bench" / "handwritten.py"), str(raw), str(args.workers)]
    # 5 % new audio: the old files are hard links (same inode and mtime), the new ones copies.
    grown = work / "raw_grown"
    shutil.rmtree(grown, ignore_errors=True)
    shutil.copytree(raw, grown, copy_function=os.link)
    for src in sorted((work / "workload" / "extra").rglob("*")):
        if src.is_file():
            dst = grown / src.relative_to(work / "workload" / "extra")
            dst.parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(src, dst)

    # librosa compiles its numba functions on first use and keeps them in its package's
    # __pycache__: the first hand-written run after an install paid 25 s of wall time
    # where later ones take 9 s. A user pays that once, so it is paid here, untimed, on
    # the few files of extra/.
    subprocess.run([sys.executable, str(REPO / "bench" / "handwritten.py"), str(work / "workload" / "extra"),
                    str(args.workers)], capture_output=True, check=True)

    # The runs are interleaved, round after round; the fastest of each kind is kept:
    # on a shared virtual machine speed drifts over minutes, and a slow spell should
    # hit every kind of run alike rather than all the runs of one kind.
    timings: dict[str, list[float]] = {"cold": [], "floor": [], "rerun": [], "rebuild": [], "nogates": [], "one": [],
                                       "handwritten": [], "imports": []}
    peak_rss: list[float] = []
    cold_stages: list[dict[str, float]] = []
    rebuild_stages: list[dict[str, float]] = []
    for _ in range(args.repeat):
        wall, rss = fresh_prepare(raw, cold_out, args.workers, label="cold")
        timings["cold"].append(wall)
        peak_rss.append(rss)
        cold_stages.append(stage_seconds(cold_out))
        timings["rerun"].append(prepare(raw, cold_out, args.workers)[0])
        # The rebuild starts from this round's cold run, which the next round replaces.
        timings["rebuild"].append(prepare(grown, cold_out, args.workers)[0])
        rebuild_stages.append(stage_seconds(cold_out))
        timings["floor"].append(measured(floor_cmd, label="floor")[0])
        # What a user would write by hand (bench/handwritten.py), same files and workers.
        timings["handwritten"].append(measured(handwritten_cmd, label="handwritten")[0])
        # The quality gates' share: the same cold run with the per-clip measures off.
        timings["nogates"].append(fresh_prepare(raw, nogates_out, args.workers, "--set",
                                                "audio.quality_measures=false", label="nogates")[0])
        timings["one"].append(fresh_prepare(raw, one_out, 1)[0])
        # What any run that reads a manifest imports, in a fresh interpreter: part of
        # every rebuild whatever Loam's own code does.
        timings["imports"].append(measured([sys.executable, "-c", LIBRARY_IMPORTS])[0])
    shutil.rmtree(nogates_out, ignore_errors=True)
    shutil.rmtree(one_out, ignore_errors=True)
    # The per-file path alone, in one process: steadier than end-to-end runs. cold_out
    # holds the last rebuild, whose ingest manifest lists the grown dump's files.
    results["per_file"] = last_json_line([str(REPO / "bench" / "bench_per_file.py"), str(cold_out), str(grown)])
    shutil.rmtree(grown, ignore_errors=True)
    best = {k: min(v) for k, v in timings.items()}
    cpu = {k: min(v) for k, v in CPU_SECONDS.items()}
    cold = best["cold"]

    def paired(numerator: list[float], denominator: list[float]) -> float:
        # The median over rounds of a ratio taken within one round: both runs of a
        # pair share that round's speed of the machine, which the fastest-of-each-kind
        # ratio does not (a fast spell for one kind alone skews it).
        return statistics.median(a / b for a, b in zip(numerator, denominator, strict=True))

    results.update(cold_wall_s=cold, x_real_time=audio_s / cold, peak_rss_mb=max(peak_rss),
                   stage_seconds=cold_stages[timings["cold"].index(cold)])
    results.update(floor_wall_s=best["floor"], pipeline_over_floor=paired(timings["cold"], timings["floor"]))
    results.update(handwritten_wall_s=best["handwritten"],
                   handwritten_over_cold=paired(timings["handwritten"], timings["cold"]),
                   handwritten_over_floor=paired(timings["handwritten"], timings["floor"]),
                   handwritten_over_cold_cpu=paired(CPU_SECONDS["handwritten"], CPU_SECONDS["cold"]),
                   handwritten_over_floor_cpu=paired(CPU_SECONDS["handwritten"], CPU_SECONDS["floor"]))
    results.update(rerun_wall_s=best["rerun"], rerun_over_cold=paired(timings["rerun"], timings["cold"]))
    results.update(rebuild_5pct_wall_s=best["rebuild"], rebuild_over_cold=paired(timings["rebuild"], timings["cold"]),
                   rebuild_stage_seconds=rebuild_stages[timings["rebuild"].index(best["rebuild"])])
    results.update(cold_without_gates_wall_s=best["nogates"], cpu_seconds=cpu,
                   gates_over_cold_without=paired(CPU_SECONDS["cold"], CPU_SECONDS["nogates"]) - 1,
                   pipeline_over_floor_cpu=paired(CPU_SECONDS["cold"], CPU_SECONDS["floor"]))
    results.update(one_worker_wall_s=best["one"], speedup_1_to_2=paired(timings["one"], timings["cold"]),
                   all_runs_wall_s=timings, all_runs_cpu_s=CPU_SECONDS,
                   ratios_method="median over rounds of the ratio within each round")
    results["limits"] = limits(timings, cold_stages, new_share=float(facts["extra_seconds"]) / audio_s)

    from bench.bench_validate import bench_validate

    with tempfile.TemporaryDirectory(dir=work) as scratch:
        results["validate"] = bench_validate(100_000, Path(scratch))

    results["text"] = last_json_line([str(REPO / "bench" / "bench_text.py")])
    results["fingerprint"] = last_json_line([str(REPO / "bench" / "bench_fingerprint.py")])
    if not args.skip_long:
        results["long_file"] = last_json_line([str(REPO / "bench" / "bench_long_file.py")])

    (work / "results.json").write_text(json.dumps(results, indent=2) + "\n")
    print_table(results)
    print(json.dumps(results))
    return 0


def limits(timings: dict[str, list[float]], cold_stages: list[dict[str, float]], *,
           new_share: float) -> dict[str, float]:
    """How far the wall-time targets could go with the work they cannot avoid, from
    this run's own rounds (each ratio the median of the rounds' ratios).

    - ``audio_over_floor``: the cold run's audio stage alone (the per-file work on the
      workers, as the pipeline does it) over the floor's whole run; the cold run cannot
      come nearer the floor than this while that work stays what it is.
    - ``cold_for_handwritten_s``: the cold run that would put the hand-written script
      at 3 times it (its fastest run / 3), beside ``audio_s``, the fastest audio stage.
    - ``rebuild_unavoidable_over_cold``: the imports every run needs plus the new
      files' share of the cold audio stage (their own processing), over the cold run;
      ``rebuild_room_s`` what the <= 0.10 target leaves for everything else, and
      ``rebuild_rest_s`` what everything else took (the fastest rebuild less the same).

    Example
    -------
    >>> t = {"cold": [4.0, 4.2], "floor": [2.0, 2.1], "handwritten": [9.0, 9.3], "rebuild": [0.6, 0.7],
    ...      "imports": [0.15, 0.16]}
    >>> out = limits(t, [{"audio": 3.0}, {"audio": 3.15}], new_share=0.05)
    >>> out["audio_over_floor"], out["cold_for_handwritten_s"], out["audio_s"]
    (1.5, 3.0, 3.0)
    >>> round(out["rebuild_unavoidable_over_cold"], 4), round(out["rebuild_room_s"], 3), round(out["rebuild_rest_s"], 3)
    (0.0753, 0.1, 0.3)
    """
    audio = [stages["audio"] for stages in cold_stages]
    unavoidable = [imports + seconds * new_share for imports, seconds in zip(timings["imports"], audio, strict=True)]
    fastest = min(range(len(audio)), key=audio.__getitem__)
    return {
        "audio_over_floor": statistics.median(a / f for a, f in zip(audio, timings["floor"], strict=True)),
        "cold_for_handwritten_s": min(timings["handwritten"]) / 3,
        "audio_s": audio[fastest],
        "rebuild_unavoidable_over_cold": statistics.median(
            u / c for u, c in zip(unavoidable, timings["cold"], strict=True)),
        "rebuild_room_s": 0.10 * min(timings["cold"]) - min(unavoidable),
        "rebuild_rest_s": min(timings["rebuild"]) - min(unavoidable),
    }


def print_table(r: dict) -> None:
    targets = {
        "pipeline_over_floor": ("<= 1.3", lambda v: v <= 1.3),
        "handwritten_over_cold": (">= 3", lambda v: v >= 3),
        "speedup_1_to_2": (">= 1.7", lambda v: v >= 1.7),
        "rerun_over_cold": ("<= 0.02", lambda v: v <= 0.02),
        "rebuild_over_cold": ("<= 0.10", lambda v: v <= 0.10),
    }
    rows = [
        ("audio hours", f"{r['audio_hours']:.3f}", ""),
        ("cold wall (s)", f"{r['cold_wall_s']:.1f}", ""),
        ("x real time", f"{r['x_real_time']:.1f}", ""),
        ("peak RSS (MB)", f"{r['peak_rss_mb']:.0f}", ""),
        ("floor wall (s)", f"{r['floor_wall_s']:.1f}", ""),
    ]
    for key, label in [("pipeline_over_floor", "pipeline / floor"),
                       ("handwritten_over_cold", "hand-written script / pipeline"),
                       ("speedup_1_to_2", "1 -> 2 worker speedup"),
                       ("rerun_over_cold", "no-change rerun / cold"), ("rebuild_over_cold", "rebuild +5 % / cold")]:
        target, ok = targets[key]
        rows.append((label, f"{r[key]:.3f}", f"target {target}: {'met' if ok(r[key]) else 'MISSED'}"))
    rows.append(("pipeline / floor, CPU seconds", f"{r['pipeline_over_floor_cpu']:.3f}", ""))
    rows.append(("hand-written script wall (s)", f"{r['handwritten_wall_s']:.1f}", "bench/handwritten.py"))
    rows.append(("hand-written / floor", f"{r['handwritten_over_floor']:.3f}", ""))
    rows.append(("hand-written / pipeline, CPU seconds", f"{r['handwritten_over_cold_cpu']:.3f}", ""))
    rows.append(("hand-written / floor, CPU seconds", f"{r['handwritten_over_floor_cpu']:.3f}", ""))
    rows.append(("no-change rerun (s)", f"{r['rerun_wall_s']:.2f}", ""))
    for name, sec in r["stage_seconds"].items():
        rows.append((f"  stage {name} (s)", f"{sec:.2f}", ""))
    lim = r.get("limits", {})
    if lim:
        rows.append(("what the targets leave, from this run:", "", ""))
        rows.append(("  audio stage alone / floor", f"{lim['audio_over_floor']:.3f}",
                     "the least pipeline / floor can be with the per-file work as it is (target <= 1.3)"))
        rows.append(("  cold wall the hand-written target needs (s)", f"{lim['cold_for_handwritten_s']:.2f}",
                     f"the audio stage alone took {lim['audio_s']:.2f} s"))
        rows.append(("  rebuild: imports + new files' share / cold", f"{lim['rebuild_unavoidable_over_cold']:.3f}",
                     f"target <= 0.10 leaves {lim['rebuild_room_s']:.2f} s for the rest, "
                     f"which took {lim['rebuild_rest_s']:.2f} s"))
    if "gates_over_cold_without" in r:
        ok = r["gates_over_cold_without"] <= 0.25
        rows.append(("gates' cost / cold run without (CPU)", f"{r['gates_over_cold_without']:.3f}",
                     f"target <= 0.25: {'met' if ok else 'MISSED'}"))
    pf = r.get("per_file", {})
    if "per_file_over_floor" in pf:
        rows.append(("per-file work / floor (CPU, one process)", f"{pf['per_file_over_floor']:.3f}", ""))
        rows.append(("  the same without the gates", f"{pf['per_file_over_floor_without_gates']:.3f}", ""))
        rows.append(("  gates' share of the per-file work", f"{pf['gates_over_per_file_without']:.3f}", ""))
    v = r.get("validate", {})
    for key, label in (("rows_per_second_with_headers", "validate rows/s (with audio headers)"),
                       ("rows_per_second_manifests_only", "validate rows/s (manifests only)")):
        if key in v:
            rows.append((label, f"{v[key]:.0f}", f"target >= 20000: {'met' if v[key] >= 20000 else 'MISSED'}"))
    t = r.get("text", {})
    for run in ("cold", "warm"):
        if run in t:
            rows.append((f"text sentences/s ({run}, 10,000)", f"{t[run]['sentences_per_s']:.0f}",
                         f"word cache hits {t[run]['hit_rate_distinct']:.2f} per distinct OOV word"))
    fp = r.get("fingerprint", {})
    for column in ("before", "after"):
        if column in fp:
            f = fp[column]
            copies = {k: v for k, v in f.items() if isinstance(v, dict)}
            worst = min(copies, key=lambda k: (copies[k]["recall"], copies[k]["lowest_similarity"]))
            rows.append((f"fingerprint {column}: lowest recall of copies", f"{copies[worst]['recall']:.3f}",
                         f"{worst}; target: after >= before (bench/bench_fingerprint.py prints the table)"))
            rows.append((f"fingerprint {column}: same-speaker false matches", f"{f['false_matches']}",
                         f"of {f['same_speaker_pairs']} pairs; highest score {f['highest_unrelated_similarity']:.3f}"))
    lf = r.get("long_file", {})
    for key in ("x_real_time", "peak_rss_mb"):
        if key in lf:
            rows.append((f"60-min 48 kHz stereo {key}", f"{lf[key]:.1f}", "target < 500 MB" if "rss" in key else ""))
    width = max(len(a) for a, _, _ in rows)
    for a, b, c in rows:
        print(f"{a:<{width}}  {b:>10}  {c}")


if __name__ == "__main__":
    raise SystemExit(main())
