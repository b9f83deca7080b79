"""``loam validate --manifests-only`` and ``loam report`` on a prepared OUT, as separate
processes (start-up included), for the 100,000-source figures of ``make bench-scale``:
rows per second of validation and the report's seconds.

Rows per second are given two ways: over the subsets' rows (the clips a trainer reads;
what ``bench/bench_validate.py`` reports for its synthetic OUT) and over every manifest
row validate reads (subsets, rejects and the stages' own manifests: its "rows checked").
CPU seconds of each process are kept beside the wall time: on a shared machine they move
far less. Usage: ``python bench/bench_outputs.py OUT [--repeat N]``; the last line printed
is the figures as JSON.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from bench.run import CPU_SECONDS, LOAM, measured  # noqa: E402


def subset_rows(out: Path) -> int:
    """Rows of the three subset manifests (read from their Parquet footers)."""
    import pyarrow.parquet as pq

    from pipeline.core.names import SUBSETS, subset_manifest

    return sum(pq.ParquetFile(out / subset_manifest(name)).metadata.num_rows for name in SUBSETS)


def output_figures(out: Path, *, repeat: int = 1) -> dict[str, Any]:
    """The fastest of ``repeat`` runs of each command on ``out``, and their CPU seconds.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     output_figures(Path(tmp) / "missing")
    Traceback (most recent call last):
    ...
    SystemExit: bench_outputs: ... has no manifests/ (prepare it first)
    """
    out = Path(out)
    if not (out / "manifests").is_dir():
        raise SystemExit(f"bench_outputs: {out} has no manifests/ (prepare it first)")
    clips = subset_rows(out)
    found = json.loads(subprocess.run([*LOAM, "validate", "--manifests-only", "--json", str(out)],
                                      capture_output=True, text=True).stdout)
    walls: dict[str, list[float]] = {"validate": [], "report": []}
    for _ in range(repeat):
        # Exit status 1 is validate's verdict on the build (errors found), not a failed
        # run: the figure is how fast it checks, whatever it finds (the counts go beside).
        walls["validate"].append(measured([*LOAM, "validate", "--manifests-only", str(out)],
                                          label="validate", exit_codes=(0, 1))[0])
        walls["report"].append(measured([*LOAM, "report", str(out)], label="report")[0])
    validate_s, report_s = min(walls["validate"]), min(walls["report"])
    return {
        "subset_rows": clips, "rows_checked": found["rows_checked"],
        "validate_errors": found["errors"], "validate_warnings": found["warnings"],
        "validate_manifests_only_s": round(validate_s, 2),
        "validate_rows_per_s_subsets": round(clips / validate_s),
        "validate_rows_per_s_checked": round(found["rows_checked"] / validate_s),
        "validate_cpu_s": [round(c, 2) for c in CPU_SECONDS.get("validate", [])],
        "report_s": round(report_s, 2),
        "report_cpu_s": [round(c, 2) for c in CPU_SECONDS.get("report", [])],
    }


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("out", type=Path)
    parser.add_argument("--repeat", type=int, default=1)
    args = parser.parse_args()
    figures = output_figures(args.out, repeat=args.repeat)
    print(f"validate --manifests-only: {figures['validate_manifests_only_s']:.2f} s, "
          f"{figures['validate_rows_per_s_subsets']} subset rows/s ({figures['subset_rows']} rows; target >= 100,000), "
          f"{figures['validate_rows_per_s_checked']} rows checked/s ({figures['rows_checked']} rows); "
          f"it found {figures['validate_errors']} errors, {figures['validate_warnings']} warnings")
    print(f"report: {figures['report_s']:.2f} s (target < 30 s)")
    print(json.dumps(figures))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
