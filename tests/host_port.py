"""An independent host for the exported ONNX, written from the README's host steps alone.

It imports no danpack: only the standard library (re, unicodedata, json), numpy and onnxruntime, and reads
everything it needs from the .onnx file's own metadata (the danpack.* metadata_props) and graph. The keyword
switches turn it into the deliberately naive ports the golden kit must catch (tests/test_golden.py):
`ascii_word` (an ASCII-only \\w, as JavaScript's), `case` (e.g. casefold instead of lower), `skip_normalization`.
"""

from __future__ import annotations

import bisect
import json
import re
import unicodedata

import numpy as np
import onnxruntime as ort

PREFIX = "danpack."


class Host:
    def __init__(self, onnx_path, *, ascii_word: bool = False, case: str | None = None,
                 skip_normalization: bool = False, pin: bool = True) -> None:
        self.session = ort.InferenceSession(str(onnx_path), providers=["CPUExecutionProvider"])
        meta = self.session.get_modelmeta().custom_metadata_map
        if meta.get(PREFIX + "export_version") != "1":
            raise ValueError("not a danpack export of version 1")
        self.labels = json.loads(meta[PREFIX + "labels"])
        spec = json.loads(meta[PREFIX + "tokenizer"])
        if spec["unicode_version"] != unicodedata.unidata_version:
            raise ValueError(f"this host's tables are {unicodedata.unidata_version}, the export pins {spec['unicode_version']}")
        self.normalization = None if skip_normalization or spec["normalization"] == "none" else spec["normalization"]
        self.case = case or spec["case"]
        self.regex = re.compile(spec["regex"], re.ASCII if ascii_word else 0)
        self.max_tokens = spec["max_tokens"]
        ranges = json.loads(meta[PREFIX + "unicode_unassigned"])
        self.first, self.last = [a for a, _ in ranges], [b for _, b in ranges]
        self.pin = pin
        oov = json.loads(meta[PREFIX + "oov"])
        self.oov_row = None if oov["policy"] == "skip" else oov["row"]
        self.rows = {token: row for row, token in enumerate(json.loads(meta[PREFIX + "vocab"]))}

    def unassigned(self, c: str) -> bool:
        i = bisect.bisect_right(self.first, ord(c)) - 1
        return i >= 0 and ord(c) <= self.last[i]

    def normalize(self, text: str) -> str:
        # 1. pin Unicode: code points unassigned in the pinned version become spaces
        if self.pin:
            text = "".join(" " if self.unassigned(c) else c for c in text)
        # 2. normalise, 3. case
        if self.normalization:
            text = unicodedata.normalize(self.normalization, text)
        return {"lower": str.lower, "casefold": str.casefold, "keep": str}[self.case](text)

    def classify(self, text: str) -> dict:
        normalized = self.normalize(text)
        # 4. split (non-empty matches), 5. cap
        tokens = [t for t in (m.group() for m in self.regex.finditer(normalized)) if t][: self.max_tokens]
        # 6. map: unknown tokens to the oov row, or dropped under "skip"
        ids = [self.rows.get(t, self.oov_row) for t in tokens]
        ids = [i for i in ids if i is not None]
        # 7. pad with 0 and pass the count, 8. run, 9. read probs in label order
        feed = {"ids": np.array([ids or [0]], dtype=np.int64), "counts": np.array([len(ids)], dtype=np.int64)}
        probs = self.session.run(["probs"], feed)[0][0]
        return {"normalized": normalized, "tokens": tokens, "ids": ids, "probs": [float(p) for p in probs],
                "label": self.labels[int(np.argmax(probs))]}


def run_golden(host: Host, golden_path, out_path) -> None:
    """Classify each golden record's input (its UTF-8 bytes when given) and write one output line per record."""
    with open(golden_path, encoding="utf-8") as f:
        records = [json.loads(line) for line in f][1:]  # line 1 is the header
    with open(out_path, "w", encoding="utf-8") as f:
        for r in records:
            text = bytes.fromhex(r["utf8_hex"]).decode("utf-8", "replace") if "utf8_hex" in r else r["text"]
            f.write(json.dumps(host.classify(text)) + "\n")
