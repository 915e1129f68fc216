"""The native runtime against the bare C floor and the Python paths, side by side on the demo sentiment bundle.

    python -m bench.native [--lines 200000] [--rounds 5] [--out bench/NATIVE.md]

Demo sentiment model (models_demo/shipped/sentiment) packed with the demo deployment stream as corpus (default
options); texts: that stream (models_demo.scenario.generate_stream), one comment per line. Each round runs every
contender once, in turn (interleaved), each as its own process with its output discarded; figures are medians.
Peak resident memory is the child's ru_maxrss (os.wait4). Work files go to bench/out/native/ (gitignored).
"""

from __future__ import annotations

import argparse
import os
import platform
import re
import shutil
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
NATIVE = REPO / "runtime" / "native"
WORK = REPO / "bench" / "out" / "native"
NOTES = "<!-- notes: kept when the figures above are rewritten -->"
CFLAGS = ["-std=c99", "-O2", "-Wall", "-Wextra", "-Werror"]


# A child's ru_maxrss on Linux includes the parent's memory at fork, so each program reports its own VmHWM (the
# C program and the floor print it; the Python stream runs under this wrapper, which prints it after main()).
PEAK = re.compile(r"peak resident (\d+) kB")
PY_WRAPPER = ("import re, sys\nfrom danpack.runtime.stream import main\ncode = main(sys.argv[1:])\n"
              "hwm = re.search(r'VmHWM:\\s*(\\d+)', open('/proc/self/status').read())\n"
              "print(f'peak resident {hwm.group(1)} kB', file=sys.stderr)\nsys.exit(code)\n")


STREAM_RATE = re.compile(r"([\d,]+) lines/s")  # danpack-run --verbose: lines/s inside the stream (start-up left out)
ISSUE_LINES_PER_S = 102_000  # danpack-run as issue 17 measured it before the native runtime


def run(cmd: list[str], env: dict | None = None) -> tuple[float, int, float, float | None]:
    """(wall seconds, peak resident kB, CPU seconds, the program's own lines/s or None) of one child process,
    output discarded. CPU time (user + system, from os.wait4) is the steadier figure on a shared machine."""
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            env=None if env is None else {**os.environ, **env})
    err = proc.stderr.read()
    proc.stderr.close()
    _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)
    wall = time.perf_counter() - start
    found = PEAK.search(err.decode(errors="replace"))
    if proc.returncode not in (0, 1) or found is None:
        raise RuntimeError(f"{cmd[0]} exited {proc.returncode}: {err.decode(errors='replace')[-500:]}")
    rate = STREAM_RATE.search(err.decode(errors="replace"))
    return wall, int(found.group(1)), usage.ru_utime + usage.ru_stime, (
        float(rate.group(1).replace(",", "")) if rate else None)


def prepare(lines: int) -> dict:
    from danpack.models_demo.scenario import generate_stream
    from danpack.pack.build import PackOptions, pack_model
    from danpack.runtime import load

    WORK.mkdir(parents=True, exist_ok=True)
    subprocess.run(["make", "-s", "-C", str(NATIVE)], check=True)
    floor = WORK / "native_floor"
    subprocess.run(["cc", *CFLAGS, "-o", str(floor), str(REPO / "bench" / "native_floor.c"), "-lm"], check=True)
    texts = [r["text"].replace("\n", " ") for r in generate_stream(lines)]
    corpus = WORK / "stream.txt"
    corpus.write_text("\n".join(texts) + "\n", encoding="utf-8")
    one = WORK / "one.txt"
    one.write_text(texts[0] + "\n", encoding="utf-8")
    bundle = WORK / "sentiment.bundle"
    pack_model(REPO / "models_demo" / "shipped" / "sentiment", bundle, PackOptions(corpora=(str(corpus),)))
    dump = WORK / "sentiment.floor"
    write_floor_dump(load(bundle, backend="numpy").bundle, dump)
    return {"texts": texts, "corpus": corpus, "one": one, "bundle": bundle, "dump": dump, "floor": floor}


def write_floor_dump(bundle, path: Path) -> None:
    """The bundle's table, scales, layers and tokens in native_floor.c's raw layout."""
    t = bundle.tensors
    layers = bundle.manifest["layers"]
    width = t["table"].shape[1]
    parts = [np.array([t["table"].shape[0], width, len(layers)], dtype="<i4").tobytes()]
    dims = []
    for i, spec in enumerate(layers):
        out = t[f"layer.{i}.bias"].shape[0]
        act = {None: 0, "relu": 1, "tanh": 2}[spec["activation"]]
        parts.append(np.array([width, out, int(spec["weight"]), act], dtype="<i4").tobytes())
        dims.append(out)
        width = out
    parts += [t["table"].astype("i1").tobytes(), t["scales"].astype("<f4").tobytes()]
    for i, spec in enumerate(layers):
        if spec["weight"]:
            parts.append(t[f"layer.{i}.weight"].astype("<f4").tobytes())
        parts.append(t[f"layer.{i}.bias"].astype("<f4").tobytes())
    parts.append("\n".join(bundle.vocab).encode("utf-8"))
    path.write_bytes(b"".join(parts))


def python_api(bundle: Path, texts: list[str], batch: int, backend: str, native: bool = True) -> float:
    """Texts per second through runtime.load(...).predict_proba in this process (median of 5 passes); native=False
    turns the fast path off (the Python encoder)."""
    from danpack.runtime import load

    clf = load(bundle, backend=backend)
    if not native:
        clf.native = None
    texts = texts[: 25_600 if batch > 1 else 2_000]
    rates = []
    for _ in range(5):
        start = time.perf_counter()
        for i in range(0, len(texts), batch):
            clf.predict_proba(texts[i : i + batch])
        rates.append(len(texts) / (time.perf_counter() - start))
    return statistics.median(rates)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--lines", type=int, default=200_000)
    p.add_argument("--rounds", type=int, default=5)
    p.add_argument("--out", type=Path, default=REPO / "bench" / "NATIVE.md")
    args = p.parse_args(argv)
    w = prepare(args.lines)
    prog = str(NATIVE / "danpack-run-native")
    py_run = [sys.executable, "-c", PY_WRAPPER]
    py_off = "danpack-run, numpy backend, Python records (DANPACK_NATIVE=0)"
    contenders = {
        "C program (danpack-run-native)": [prog, str(w["bundle"]), str(w["corpus"]), "--verbose"],
        "bare C floor (bench/native_floor.c)": [str(w["floor"]), str(w["dump"]), str(w["corpus"])],
        "danpack-run, numpy backend": [*py_run, str(w["bundle"]), str(w["corpus"]), "--backend", "numpy", "--batch", "256", "--lenient", "--verbose"],
        "danpack-run, onnxruntime backend": [*py_run, str(w["bundle"]), str(w["corpus"]), "--batch", "256", "--lenient", "--verbose"],
        py_off: [*py_run, str(w["bundle"]), str(w["corpus"]), "--backend", "numpy", "--batch", "256", "--lenient", "--verbose"],
    }
    envs = {py_off: {"DANPACK_NATIVE": "0"}}
    cold = {
        "C program": [prog, str(w["bundle"]), str(w["one"]), "--verbose"],
        "bare C floor": [str(w["floor"]), str(w["dump"]), str(w["one"])],
        "danpack-run, numpy backend": [*py_run, str(w["bundle"]), str(w["one"]), "--backend", "numpy"],
        "danpack-run, onnxruntime backend": [*py_run, str(w["bundle"]), str(w["one"])],
    }
    stream = {k: [] for k in contenders}
    start = {k: [] for k in cold}
    for r in range(args.rounds):
        for key, cmd in contenders.items():
            stream[key].append(run(cmd, envs.get(key)))
        for key, cmd in cold.items():
            for _ in range(5 if "C" in key else 1):
                start[key].append(run(cmd))
        print(f"round {r + 1}/{args.rounds} done", file=sys.stderr)
    n = len(w["texts"])
    rate = {k: n / statistics.median(x[0] for x in v) for k, v in stream.items()}
    cpu_rate = {k: n / statistics.median(x[2] for x in v) for k, v in stream.items()}
    api = {(b, be, nat): python_api(w["bundle"], w["texts"], b, be, nat)
           for b in (1, 32, 256) for be in ("numpy", "onnxruntime") for nat in (True, False)}
    binary = Path(prog).stat().st_size
    stripped = WORK / "danpack-run-native.stripped"
    shutil.copy(prog, stripped)
    strip_ok = subprocess.run(["strip", str(stripped)], capture_output=True).returncode == 0
    c_key, floor_key = "C program (danpack-run-native)", "bare C floor (bench/native_floor.c)"
    lines = [
        "# Native runtime bench", "",
        f"`python -m bench.native --lines {args.lines} --rounds {args.rounds}` on {platform.machine()}, "
        f"{os.cpu_count()} cores shared, Python {platform.python_version()}; demo sentiment bundle "
        f"({w['bundle'].stat().st_size:,} bytes) over {n:,} demo stream comments. Medians of {args.rounds} interleaved rounds; "
        "each program is a fresh process with its output discarded (rates include start-up).", "",
        "| contender | lines/s (wall) | lines per CPU second | CPU time vs C program | in-stream lines/s (--verbose) | peak resident |",
        "|---|---:|---:|---:|---:|---:|",
    ]
    inner = {k: statistics.median(x[3] for x in v) if all(x[3] for x in v) else None for k, v in stream.items()}
    for key in contenders:
        hwm = statistics.median(x[1] for x in stream[key])
        own = f"{inner[key]:,.0f}" if inner[key] else "-"
        lines.append(f"| {key} | {rate[key]:,.0f} | {cpu_rate[key]:,.0f} | {cpu_rate[c_key] / cpu_rate[key]:.2f}x | "
                     f"{own} | {hwm / 1024:.1f} MB |")
    lines += ["", "| cold start: load + first answer (one line, whole process) | wall | CPU | peak resident |",
              "|---|---:|---:|---:|"]
    for key, v in start.items():
        lines.append(f"| {key} | {statistics.median(x[0] for x in v) * 1000:.1f} ms | "
                     f"{statistics.median(x[2] for x in v) * 1000:.1f} ms | {statistics.median(x[1] for x in v) / 1024:.1f} MB |")
    lines += ["", "| Python API `predict_proba`, in process | batch 1 | batch 32 | batch 256 |", "|---|---:|---:|---:|"]
    for be in ("numpy", "onnxruntime"):
        for nat in (True, False):
            name = f"{be} backend, " + ("native fast path" if nat else "Python encoder (DANPACK_NATIVE=0)")
            lines.append(f"| {name} | " + " | ".join(f"{api[(b, be, nat)]:,.0f} texts/s" for b in (1, 32, 256)) + " |")
    lines += [
        "", f"- C program per text (CPU): {cpu_rate[floor_key] / cpu_rate[c_key]:.2f}x the bare floor's time "
        f"(target within 1.5x); {cpu_rate[c_key] / cpu_rate['danpack-run, onnxruntime backend']:.1f}x `danpack-run` "
        f"(onnxruntime), {cpu_rate[c_key] / cpu_rate['danpack-run, numpy backend']:.1f}x (numpy) (target >= 10x).",
        f"- `danpack-run` in the stream (--verbose, start-up left out): {inner['danpack-run, numpy backend'] or 0:,.0f} lines/s "
        f"(numpy), {inner['danpack-run, onnxruntime backend'] or 0:,.0f} (onnxruntime): "
        f"{(inner['danpack-run, numpy backend'] or 0) / ISSUE_LINES_PER_S:.2f}x / "
        f"{(inner['danpack-run, onnxruntime backend'] or 0) / ISSUE_LINES_PER_S:.2f}x the issue's {ISSUE_LINES_PER_S:,} "
        f"(target >= 2.5x); {(inner['danpack-run, numpy backend'] or 0) / (inner[py_off] or 1):.2f}x the Python records "
        "(DANPACK_NATIVE=0) in this run.",
        f"- Python API at batch 1: {api[(1, 'numpy', True)] / api[(1, 'numpy', False)]:.2f}x (numpy, native forward "
        f"pass) and {api[(1, 'onnxruntime', True)] / api[(1, 'onnxruntime', False)]:.2f}x (onnxruntime) the Python "
        "path's throughput (target >= 2x).",
        f"- Binary: {binary:,} bytes as built"
        + (f", {stripped.stat().st_size:,} bytes stripped" if strip_ok else "") + " (Unicode tables included; target <= 300 KB).",
    ]
    text = "\n".join(lines) + "\n"
    if args.out.exists() and NOTES in args.out.read_text(encoding="utf-8"):  # hand-written notes below the marker stay
        text += "\n" + NOTES + args.out.read_text(encoding="utf-8").split(NOTES, 1)[1]
    args.out.write_text(text, encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
