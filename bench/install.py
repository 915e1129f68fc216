"""Case 5: what each install costs — size on disk, resident memory after `runtime.load`, and how fast the
`danpack` command starts.

The wheel is built from this checkout (`pip wheel --no-deps`) and installed into fresh virtual environments:
the device install (`pip install danpack`: numpy, msgpack), the device install with the onnxruntime backend
(`danpack[onnxruntime]`) and the workstation install (`danpack[packer]`). Sizes are the environment's
site-packages minus an empty environment's (pip and its kin). Start-up runs interleaved in this checkout's
environment, as ratios to `python -c pass` measured in the same rounds.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

from .config import BenchConfig
from .probes import REPO, ONE_THREAD
from .results import CaseReport
from .stats import fmt_bytes, fmt_ratio, fmt_seconds, summarize
from .tables import make_table
from .workdata import say

# name -> (folder, pip extra, backends to load, what a reader types)
INSTALLS = {
    "device, numpy backend": ("device", "", ("numpy",), "pip install danpack"),
    "device, onnxruntime backend": ("device-ort", "[onnxruntime]", ("numpy", "onnxruntime"),
                                    "pip install 'danpack[onnxruntime]'"),
    "workstation (packer)": ("workstation", "[packer]", ("onnxruntime",), "pip install 'danpack[packer]'"),
}
# Loads a bundle in the device environment: the packer's libraries must be absent, the answer must come back.
LOAD_SCRIPT = """
import json, sys
def hwm():
    with open("/proc/self/status") as f:
        fields = dict(line.split(":", 1) for line in f)
    return {k: int(fields[k].split()[0]) * 1024 for k in ("VmHWM", "VmRSS")}
from importlib.util import find_spec
absent = [m for m in ("onnx", "typer", "safetensors", "torch") if find_spec(m) is None]
from danpack import runtime
clf = runtime.load(sys.argv[1], backend=sys.argv[2])
label = clf.predict(["the charger was quick and easy"])[0]
print(json.dumps({"label": label, "absent": absent, **hwm()}))
"""


def _run(cmd: list[str], **kw) -> subprocess.CompletedProcess:
    done = subprocess.run(cmd, capture_output=True, text=True, **kw)
    if done.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} exited {done.returncode}: {done.stderr.strip()[-800:]}")
    return done


def _tree_bytes(root: Path) -> int:
    return sum(p.stat().st_size for p in root.rglob("*") if p.is_file() and not p.is_symlink())


def _site_packages(venv: Path) -> Path:
    return next((venv / "lib").glob("python3*/site-packages"))


def build_wheel(out: Path) -> Path:
    """The danpack wheel of this checkout (bench/ and tests/ are not in it)."""
    shutil.rmtree(out, ignore_errors=True)
    out.mkdir(parents=True)
    _run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "-q", "-w", str(out), str(REPO)])
    return next(out.glob("danpack-*.whl"))


def make_venv(path: Path, requirement: str | None) -> Path:
    """A fresh virtual environment with `requirement` installed (None: empty); its python."""
    shutil.rmtree(path, ignore_errors=True)
    _run([sys.executable, "-m", "venv", str(path)])
    python = path / "bin" / "python"
    if requirement:
        _run([str(python), "-m", "pip", "install", "-q", "--disable-pip-version-check", requirement])
    return python


def startup_ratios(rounds: int) -> dict[str, list[float]]:
    """Wall time of each command over `rounds` interleaved rounds, in this environment."""
    bindir = Path(sys.executable).parent
    commands = {
        "python -c pass": [sys.executable, "-c", "pass"],
        "danpack --help": [str(bindir / "danpack"), "--help"],
        "danpack --version": [str(bindir / "danpack"), "--version"],
        "danpack-run --help": [str(bindir / "danpack-run"), "--help"],
    }
    times: dict[str, list[float]] = {k: [] for k in commands}
    names = list(commands)
    for i in range(rounds + 2):
        for name in names[i % len(names):] + names[: i % len(names)]:
            start = time.perf_counter()
            subprocess.run(commands[name], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=True)
            if i >= 2:  # two rounds warm the page cache
                times[name].append(time.perf_counter() - start)
    return times


def install_case(config: BenchConfig, bundle: Path) -> CaseReport:
    """Install sizes, memory after load per backend, and start-up ratios."""
    report = CaseReport("install", "5. Installs: size on disk, memory after load, start-up")
    say(f"case {report.title}")
    work = config.work / "install"
    wheel = build_wheel(work / "wheel")
    say(f"  wheel {wheel.name} ({fmt_bytes(wheel.stat().st_size)}); fresh environments for {len(INSTALLS)} installs")
    make_venv(work / "empty", None)
    empty = _tree_bytes(_site_packages(work / "empty"))
    size_rows, memory_rows = [], []
    env = {**os.environ, **ONE_THREAD}
    env.pop("PYTHONPATH", None)
    for name, (folder, extra, backends, command) in INSTALLS.items():
        venv = work / folder
        python = make_venv(venv, f"{wheel}{extra}")
        size = _tree_bytes(_site_packages(venv)) - empty
        report.figures[f"install.{name}"] = size
        size_rows.append((name, f"`{command}`", fmt_bytes(size)))
        for backend in backends:
            runs = [json.loads(_run([str(python), "-c", LOAD_SCRIPT, str(bundle), backend], env=env, cwd=work)
                               .stdout.strip().splitlines()[-1]) for _ in range(config.cold_reps)]
            peak = summarize([r["VmHWM"] for r in runs]).median
            rss = summarize([r["VmRSS"] for r in runs]).median
            absent = ", ".join(runs[0]["absent"]) or "none"
            memory_rows.append((name, backend, fmt_bytes(rss), fmt_bytes(peak), absent))
            report.figures[f"rss.{name}.{backend}"] = rss
    report.tables.append(make_table(
        "Size on disk of each install", ["install", "command", "site-packages beyond an empty environment"],
        size_rows, "a fresh virtual environment per install, the wheel built from this checkout"))
    report.tables.append(make_table(
        "Resident memory after `runtime.load` and one answer (demo sentiment bundle)",
        ["install", "backend", "resident (VmRSS)", "peak (VmHWM)", "packer libraries absent"], memory_rows,
        f"median of {config.cold_reps} fresh interpreters each; onnx, typer, safetensors, torch checked absent"))
    say(f"  start-up: {config.startup_rounds} interleaved rounds")
    times = startup_ratios(config.startup_rounds)
    base = summarize(times["python -c pass"]).median
    rows = []
    for name, values in times.items():
        median = summarize(values).median
        rows.append((f"`{name}`", fmt_seconds(median), fmt_ratio(median / base)))
        report.figures[f"startup.{name}"] = median / base
    report.tables.append(make_table(
        "Start-up of the commands", ["command", "wall time (median)", "ratio to `python -c pass`"], rows,
        f"{config.startup_rounds} interleaved rounds after 2 warm-up rounds, in the checkout's environment"))
    return report
