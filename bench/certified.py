"""The certified path's cost and reach: `predict_certified` against plain `predict`, side by side.

```sh
python -m bench.certified                      # the shipped demo models (sentiment, topic)
python -m bench.certified --model glove=DIR    # any float model directory (task from its name: sentiment|topic)
python -m bench.certified --envelopes 0/0,16/0,0/1,16/1 --no-timing   # envelope options side by side
```

Each model is packed with the demo deployment stream (50,000 comments) at the default options; its 2,000
demo test comments are answered in calls of 256 texts, `predict` and `predict_certified` interleaved round
by round (bench/timing.py), for both runtime backends, the bundle opened from its file with `runtime.load` as
a user opens it (the native fast path when the compiled part is built; `DANPACK_NATIVE=0` for the Python one). Printed: the median seconds per call, the median of
the round-by-round ratios, the certified shares (all texts, texts whose tokens are all kept, texts with a
token the bundle does not know), certified texts whose label differs from the float original's (always 0),
and the bytes the manifest's `unknown` envelope adds to the bundle. `--envelopes` packs each model once per
envelope setting BUCKETS/MIN_COUNT[/TAIL[/BITS[/SPREAD]]] (hash buckets; list corpus tokens the float model never
knew seen at least MIN_COUNT times, 0: no list, as fingerprints with SPREAD values per float token; outlier filter
for rows beyond the TAIL quantiles, BITS per row; no TAIL: none) and prints them side by side, with the share the pre-envelope bound certified
("before": the drift bound on texts whose tokens are all kept, no text with an unknown token).
"""

from __future__ import annotations

import argparse
from pathlib import Path

import msgpack
import numpy as np

from .stats import paired_ratios, summarize
from .timing import interleave

BATCH = 256
ROUNDS = 80


def envelope_bytes(bundle) -> int:
    """Bytes the manifest's `unknown` field takes in the payload (its msgpack key and value)."""
    field = bundle.manifest.get("unknown")
    return 0 if field is None else len(msgpack.packb("unknown")) + len(msgpack.packb(field))


def measure(name: str, model_dir: Path, task: str, work: Path, envelopes: list[str], timing: bool,
            fixed_rules: bool = False) -> None:
    from danpack.check.bound import certify_texts
    from danpack.model import load_model
    from danpack.models_demo import scenario
    from danpack.pack.build import PackOptions, pack_model
    from danpack.pack.envelope import EnvelopeOptions
    from danpack.runtime import certify
    from danpack.runtime.bundle import decode_bundle
    from danpack.runtime.classifier import Classifier, load

    stream = work / "stream.txt"
    if not stream.exists():
        work.mkdir(parents=True, exist_ok=True)
        stream.write_text("".join(r["text"] + "\n" for r in scenario.generate_stream(50_000)), encoding="utf-8")
    texts = [r["text"] for r in scenario.generate_split(task, "test", 2000)]
    model = load_model(model_dir)
    for setting in envelopes or [""]:
        options = EnvelopeOptions()
        if setting:
            parts = setting.split("/")
            options = EnvelopeOptions(buckets=int(parts[0]), absent_min_count=int(parts[1]),
                                      outlier_tail=float(parts[2]) if len(parts) > 2 else 0.0,
                                      outlier_bits=int(parts[3]) if len(parts) > 3 else options.outlier_bits,
                                      absent_spread=int(parts[4]) if len(parts) > 4 else options.absent_spread)
        packed = pack_model(model_dir, None, PackOptions(corpora=(str(stream),), envelope=options,
                                                         measure=not fixed_rules)).data
        bundle = decode_bundle(packed)
        report = certify_texts(model, bundle, texts)
        clf = Classifier(bundle, "numpy")
        ids, counts, unknown = certify.encode_unknown(clf.encoder, texts)  # (B,) counts: the drift bound's view
        logits = clf.backend.run(ids, counts)[1]
        before = certify.certify_margins(logits, certify.logit_bounds(certify.drift_bound(bundle), ids, counts))
        before &= unknown == 0
        field = bundle.manifest.get("unknown") or {}
        envelope = certify.read_envelope(bundle)
        listed = 0 if envelope is None else envelope.absent.size  # the runtime's own reading of the list
        print(f"## {name} [buckets {options.buckets}, absent min count {options.absent_min_count}, outlier tail "
              f"{options.outlier_tail}, {options.outlier_bits} bits, spread {options.absent_spread}]: "
              f"{bundle.size:,} bytes, {len(bundle.vocab):,} rows, envelope {envelope_bytes(bundle):,} bytes "
              f"({envelope_bytes(bundle) / bundle.size:.2%}; {listed:,} absent tokens, outlier filter {len((field.get('outliers') or {}).get('filter', b'')):,} B); "
              f"before {before.mean():.2%}, certified {report.share:.2%} of {report.texts:,} "
              f"(all kept {float(report.certified[report.covered].mean()):.2%}, with unknown tokens "
              f"{report.share_of_uncovered or 0.0:.2%}); certified with another label than the float original: "
              f"{report.certified_disagreements}", flush=True)
    if not timing:
        return
    batches = [texts[i : i + BATCH] for i in range(0, len(texts) - BATCH + 1, BATCH)]
    path = work / f"{name}.danpack"
    path.write_bytes(packed)
    for backend in ("onnxruntime", "numpy"):
        clf = load(path, backend)  # as a user opens it: the native fast path when the compiled part is there
        calls = {"predict": lambda i: clf.predict(batches[i % len(batches)]),
                 "predict_certified": lambda i: clf.predict_certified(batches[i % len(batches)])}
        times = interleave(calls, ROUNDS, warmup=3)
        ratio = summarize(paired_ratios(times["predict_certified"], times["predict"]))
        print(f"{backend:12s} [{clf.describe()['encoder']}] batch {BATCH}: predict {np.median(times['predict']) * 1e3:.2f} ms, "
              f"predict_certified {np.median(times['predict_certified']) * 1e3:.2f} ms, "
              f"ratio {ratio.median:.2f}x (IQR {ratio.q1:.2f}-{ratio.q3:.2f})", flush=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--model", action="append", default=[], help="NAME=DIR of a float model (repeatable)")
    parser.add_argument("--work", default="bench/out/certified", help="where the deployment stream is written")
    parser.add_argument("--envelopes", default="", help="BUCKETS/MIN_COUNT[/TAIL[/BITS[/SPREAD]]] settings, comma-separated (default: the "
                        "packer's default only); timing runs on the last")
    parser.add_argument("--no-timing", action="store_true", help="certified shares only")
    parser.add_argument("--no-measure", action="store_true", help="pack with the fixed rules (coverage 0.995), "
                        "as the README's first bound table was measured")
    args = parser.parse_args()
    envelopes = [e for e in args.envelopes.split(",") if e]
    shipped = Path(__file__).resolve().parents[1] / "models_demo" / "shipped"
    models = [(m.split("=", 1)[0], Path(m.split("=", 1)[1])) for m in args.model] or [
        ("shipped sentiment", shipped / "sentiment"), ("shipped topic", shipped / "topic")]
    for name, model_dir in models:
        task = "topic" if "topic" in name else "sentiment"
        measure(name, model_dir, task, Path(args.work), envelopes, not args.no_timing, args.no_measure)


if __name__ == "__main__":
    main()
