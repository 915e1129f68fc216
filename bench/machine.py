"""The machine a run happened on: CPU model, cores, memory, library versions, thread settings, date."""

from __future__ import annotations

import datetime as dt
import os
import platform
import sys
from importlib import metadata

LIBRARIES = ("numpy", "onnxruntime", "onnx", "msgpack", "torch", "safetensors")
THREAD_VARS = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_CORETYPE")


def cpu_model() -> str:
    """The 'model name' line of /proc/cpuinfo (platform.processor() elsewhere)."""
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as f:
            for line in f:
                if line.lower().startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def memory_bytes() -> int | None:
    """MemTotal of /proc/meminfo in bytes, when readable."""
    try:
        with open("/proc/meminfo", encoding="utf-8") as f:
            for line in f:
                if line.startswith("MemTotal:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


def library_versions() -> dict[str, str]:
    """Installed versions of the libraries the figures depend on ('absent' when not installed)."""
    out = {"python": platform.python_version()}
    for name in LIBRARIES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "absent"
    return out


def machine_info() -> dict:
    """Everything RESULTS.md states about where and when it was measured."""
    affinity = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else None
    return {
        "date": dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
        "cpu": cpu_model(),
        "cores": os.cpu_count(),
        "usable_cores": affinity,
        "memory": memory_bytes(),
        "system": f"{platform.system()} {platform.release()} ({platform.machine()})",
        "libraries": library_versions(),
        "threads": {name: os.environ.get(name, "unset") for name in THREAD_VARS},
        "load_average": os.getloadavg() if hasattr(os, "getloadavg") else None,
        "executable": sys.executable,
    }
