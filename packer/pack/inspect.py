"""What a bundle holds: manifest, size breakdown, checksum; and a self-describing ONNX export."""

from __future__ import annotations

import json

import onnx
from onnx import TensorProto, numpy_helper

from danpack.runtime.bundle import FORMAT_NAME, FORMAT_VERSION, Bundle
from danpack.runtime.unicode_pinned import UNASSIGNED

# The export's own metadata (ONNX metadata_props): every key under one prefix, every value a string (JSON for
# structured values). README "Running the exported ONNX on another host" documents each key and the steps.
METADATA_PREFIX = "danpack."
EXPORT_VERSION = 1  # version of this set of keys
METADATA_KEYS = {
    "export_version": "version of these keys (1)",
    "bundle_sha256": "sha256 of the bundle's payload, as `danpack inspect` prints it",
    "bundle_format": "the bundle's format name and version, e.g. \"danpack-bundle 1\"",
    "packer": "the danpack version that packed the bundle",
    "labels": "JSON array: the labels in the order of the probs and logits columns",
    "tokenizer": "JSON object: normalization, case, pattern (preset name or custom), regex (the full Python `re` "
                 "pattern), max_tokens, unicode_version",
    "unicode_unassigned": "JSON array of [first, last] code points unassigned in unicode_version; each becomes U+0020",
    "oov": "JSON object: policy (skip | unk | rest) and row (the row an unknown token maps to; null for skip)",
    "vocab": "JSON array: element i is the token of table row i",
}


def size_breakdown(bundle: Bundle) -> dict[str, int]:
    """Bytes by part: table, scales, layers, vocab, graph, other (framing and manifest); sums to the file size."""
    t = bundle.tensors
    parts = {
        "table": t["table"].nbytes,
        "scales": t["scales"].nbytes if "scales" in t else 0,
        "layers": sum(a.nbytes for n, a in t.items() if n.startswith("layer.")),
        "vocab": bundle.vocab_bytes,
        "graph": len(bundle.graph),
    }
    parts["other"] = bundle.size - sum(parts.values())
    return parts


def describe_bundle(bundle: Bundle, vocab: bool = False) -> dict:
    """A JSON-ready description for `danpack inspect`; `vocab` adds the tokens (element i names row i)."""
    manifest = {k: v for k, v in bundle.manifest.items() if k != "probe"}
    if isinstance(manifest.get("unknown"), dict):  # its byte parts as their sizes: JSON holds no bytes
        manifest["unknown"] = _sized(manifest["unknown"])
    info = {
        "sha256": bundle.sha256,
        "bytes": bundle.size,
        "labels": list(bundle.labels),
        "tokens": len(bundle.vocab),
        "breakdown": size_breakdown(bundle),
        "manifest": manifest,
    }
    if bundle.manifest["table"]["dtype"] == "int8":
        from danpack.check.bound import worst_case_bound

        info["drift_bound"] = worst_case_bound(bundle)
    if vocab:
        info["vocab"] = list(bundle.vocab)
    return info


def export_metadata(bundle: Bundle) -> dict[str, str]:
    """What a host needs beside the graph, as ONNX metadata_props (keys METADATA_KEYS under METADATA_PREFIX)."""
    spec = bundle.tokenizer
    tokenizer = {"normalization": spec.normalization, "case": spec.case, "pattern": spec.pattern, "regex": spec.regex,
                 "max_tokens": spec.max_tokens, "unicode_version": spec.unicode_version}
    oov = bundle.manifest["oov"]

    def compact(value: object) -> str:
        return json.dumps(value, ensure_ascii=False, separators=(",", ":"))

    values = {
        "export_version": str(EXPORT_VERSION),
        "bundle_sha256": bundle.sha256,
        "bundle_format": f"{FORMAT_NAME} {FORMAT_VERSION}",
        "packer": str(bundle.manifest["packer"]),
        "labels": compact(list(bundle.labels)),
        "tokenizer": compact(tokenizer),
        "unicode_unassigned": compact([list(pair) for pair in UNASSIGNED]),
        "oov": compact({"policy": oov["policy"], "row": oov["row"]}),
        "vocab": compact(list(bundle.vocab)),
    }
    return {METADATA_PREFIX + key: values[key] for key in METADATA_KEYS}


def export_onnx(bundle: Bundle) -> onnx.ModelProto:
    """The bundle's graph with every external tensor embedded and the host's metadata: a standalone ONNX model."""
    model = onnx.ModelProto()
    model.ParseFromString(bundle.graph)
    for i, init in enumerate(model.graph.initializer):
        if init.data_location == TensorProto.EXTERNAL:
            model.graph.initializer[i].CopyFrom(numpy_helper.from_array(bundle.tensors[init.name].copy(), init.name))
    del model.metadata_props[:]
    for key, value in export_metadata(bundle).items():
        model.metadata_props.add(key=key, value=value)
    model.doc_string = ("danpack export: ids (int64 [batch, tokens], padded with 0) and counts (int64 [batch]) in; "
                        "probs and logits out. Labels, tokenizer, vocabulary and unknown-word row are in the "
                        "danpack.* metadata_props; the host steps are in danpack's README.")
    return model


def _sized(field: dict) -> dict:
    """A manifest map with every bytes value (nested maps too) shown as its size."""
    return {k: f"{len(v)} bytes" if isinstance(v, bytes) else _sized(v) if isinstance(v, dict) else v
            for k, v in field.items()}
