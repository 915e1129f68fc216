"""The parent side of subprocess measurements: cold start, peak memory, pack time, danpack-run throughput.

Each measurement runs in a fresh interpreter (`bench.worker`) with one intra-op thread
(OPENBLAS/OMP/MKL_NUM_THREADS=1; OPENBLAS_CORETYPE is passed through as set). Peak resident
memory is the child's own VmHWM from /proc/self/status. The ru_maxrss that wait4 reports for a
child is no use here: on Linux it starts from the forking parent's high-water mark (measured on
this machine: /bin/true spawned by a 300 MB Python process reports 300 MB, even via posix_spawn).
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
ONE_THREAD = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


class ProbeError(RuntimeError):
    """A measurement child failed; the message carries its exit status and the end of its stderr."""


def child_env() -> dict[str, str]:
    env = dict(os.environ)
    env.update(ONE_THREAD)
    env["PYTHONPATH"] = str(REPO) + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    return env


def run_worker(request: dict) -> dict:
    """One bench.worker request in a fresh interpreter: its JSON answer plus 'wall' (whole process, seconds)."""
    start = time.perf_counter()
    run = subprocess.run([sys.executable, "-m", "bench.worker", json.dumps(request)], capture_output=True,
                         env=child_env(), cwd=REPO, stdin=subprocess.DEVNULL)
    wall = time.perf_counter() - start
    if run.returncode != 0:
        tail = run.stderr.decode("utf-8", "replace").strip()[-800:]
        raise ProbeError(f"bench.worker {request['kind']} exited {run.returncode}: {tail}")
    answer = json.loads(run.stdout.decode("utf-8").strip().splitlines()[-1])
    answer["wall"] = wall
    return answer


SUMMARY = re.compile(r"([\d,]+) records, ([\d,]+) errors, ([\d,]+) batches, ([\d.]+) s, ([\d,]+) lines/s")


def stream_run(bundle: Path, lines: Path, backend: str = "onnxruntime", extra: tuple[str, ...] = ()) -> dict:
    """danpack-run over a file, output discarded: its own lines/s (load excluded), whole-process rate, peak memory."""
    answer = run_worker({"kind": "stream", "bundle": str(bundle), "lines": str(lines), "backend": backend,
                         "extra": list(extra)})
    match = SUMMARY.search(answer["summary"])
    if answer["status"] != 0 or match is None:
        raise ProbeError(f"danpack-run exited {answer['status']}: {answer['summary'].strip()[-800:]}")
    records = int(match.group(1).replace(",", ""))
    return {"records": records, "errors": int(match.group(2).replace(",", "")), "seconds": float(match.group(4)),
            "lines_per_s": float(match.group(5).replace(",", "")), "wall": answer["wall"],
            "wall_lines_per_s": records / answer["wall"], "hwm": answer["hwm"]}
