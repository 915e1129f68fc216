"""The child side of subprocess measurements: `python -m bench.worker '<json request>'` -> one JSON line.

A fresh interpreter per measurement gives honest cold starts and peak memory. Imports happen
first and are not timed; each kind imports only what its side needs (the packed side imports
the runtime alone, never the packer or PyTorch). Peak resident memory is the kernel's VmHWM.
"""

from __future__ import annotations

import json
import sys
import time


def status_bytes(field: str) -> int | None:
    """A memory line of /proc/self/status (VmHWM: peak resident set, VmRSS: current) in bytes."""
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith(field + ":"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


def _texts(path: str | None, limit: int) -> list[str]:
    if not path:
        return []
    with open(path, encoding="utf-8") as f:
        return [line.rstrip("\n") for _, line in zip(range(limit), f)]


def cold(request: dict) -> dict:
    """Time from before loading to after the first answer; then answer more texts and report peak memory."""
    what, text = request["what"], request["text"]
    texts = _texts(request.get("texts_path"), request.get("texts_limit", 0))
    batch = request.get("batch", 64)
    if what == "packed":
        import numpy  # noqa: F401  (imported before the clock starts, as on a device after boot)

        import danpack.runtime.classifier  # noqa: F401  (the runtime's own modules too: runtime's __init__ is lazy)
        from danpack import runtime

        if request["backend"] == "onnxruntime":
            import onnxruntime  # noqa: F401  (the backend imports it on load; the numpy backend never does)

        base = status_bytes("VmHWM")
        start = time.perf_counter()
        clf = runtime.load(request["path"], backend=request["backend"], threads=1)
        first = clf.predict_proba([text])
        seconds = time.perf_counter() - start
        predict = clf.predict_proba
    elif what == "float-numpy":
        from danpack.model import load_model

        base = status_bytes("VmHWM")
        start = time.perf_counter()
        model = load_model(request["path"])
        encoder = model.encoder()
        first = model.predict_proba([text], encoder)
        seconds = time.perf_counter() - start

        def predict(batch_texts):
            return model.predict_proba(batch_texts, encoder)
    elif what == "torch-eager":
        import torch

        from bench.torch_baselines import build_bag_module, flat_inputs
        from danpack.model import load_model

        torch.set_num_threads(1)
        base = status_bytes("VmHWM")
        start = time.perf_counter()
        model = load_model(request["path"])
        module = build_bag_module(model)
        encoder = model.encoder()

        def predict(batch_texts):
            ids, offsets = flat_inputs(encoder, batch_texts)
            with torch.inference_mode():
                return module(torch.from_numpy(ids), torch.from_numpy(offsets)).numpy()

        first = predict([text])
        seconds = time.perf_counter() - start
    else:
        raise ValueError(f"unknown cold-start kind {what!r}")
    load_peak = status_bytes("VmHWM")
    for i in range(0, len(texts), batch):
        predict(texts[i : i + batch])
    return {"seconds": seconds, "hwm_imports": base, "hwm_load": load_peak, "hwm": status_bytes("VmHWM"),
            "answered": len(texts) + 1, "first": [float(x) for x in first[0]]}


def pack(request: dict) -> dict:
    """pack_model on a model directory; time and peak memory of the call."""
    from danpack.pack.build import PackOptions, pack_model

    options = PackOptions(**{k: tuple(v) if isinstance(v, list) else v for k, v in request["options"].items()})
    base = status_bytes("VmHWM")
    start = time.perf_counter()
    result = pack_model(request["model_dir"], request.get("out"), options)
    seconds = time.perf_counter() - start
    return {"seconds": seconds, "hwm_imports": base, "hwm": status_bytes("VmHWM"), "bytes": result.bytes,
            "rows": result.rows, "width": result.width, "folded": result.folded, "policy": result.policy,
            "coverage": result.plan.coverage, "source_rows": result.source_rows, "source_bytes": result.source_bytes,
            "breakdown": result.breakdown}


def stream(request: dict) -> dict:
    """danpack-run's own entry point (danpack.runtime.stream.main, what the console script calls), output to /dev/null."""
    import io
    import os

    from danpack.runtime.stream import main as run_main

    argv = [request["bundle"], request["lines"], "--verbose", "--backend", request["backend"], *request.get("extra", [])]
    saved, devnull = os.dup(1), os.open(os.devnull, os.O_WRONLY)
    captured, real_stderr = io.StringIO(), sys.stderr
    os.dup2(devnull, 1)
    sys.stderr = captured
    start = time.perf_counter()
    try:
        status = run_main(argv)
        sys.stdout.flush()
    finally:
        seconds = time.perf_counter() - start
        sys.stderr = real_stderr
        os.dup2(saved, 1)
        os.close(devnull)
        os.close(saved)
    return {"status": status, "summary": captured.getvalue(), "main_seconds": seconds, "hwm": status_bytes("VmHWM")}


KINDS = {"cold": cold, "pack": pack, "stream": stream}


def main(argv: list[str] | None = None) -> int:
    request = json.loads((argv if argv is not None else sys.argv[1:])[0])
    result = KINDS[request["kind"]](request)
    sys.stdout.write(json.dumps(result) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
