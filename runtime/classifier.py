"""The device-side classifier: tokenizer + deployment vocabulary + a backend."""

from __future__ import annotations

import os
from functools import cached_property
from collections.abc import Sequence

import numpy as np

from .backends import BACKENDS, open_backend
from .bundle import Bundle, read_bundle
from .encode import Encoder
from .errors import BundleError, DanpackError
from .fastpath import MIN_TEXTS, NativeCertifier, NativeEncoder
from .forward import encode_batch
from .tokenize import Tokenizer

PROBE_TOLERANCE = 1e-4  # float32 differences between backends are ~1e-7; damage is far larger
# Texts per backend call: a batch pads every text to its longest one, so memory grows with
# batch x longest text (up to 512 tokens); 256 keeps that under ~20 MB and costs nothing in speed.
CALL_TEXTS = 256
MAX_THREADS = 256  # intra-op threads: far above any device's cores, below onnxruntime's own limits


def as_texts(texts: object) -> list[str]:
    """The `texts` argument as a list of str: a lone string or a non-str item is a caller's mistake, said plainly."""
    if isinstance(texts, (str, bytes)):
        raise DanpackError(f"texts must be a list of strings, found a single {type(texts).__name__}; "
                           "wrap it: predict([text])")
    try:
        items = list(texts)  # type: ignore[call-overload]
    except TypeError as e:
        raise DanpackError(f"texts must be a list of strings, found {type(texts).__name__}") from e
    for i, text in enumerate(items):
        if not isinstance(text, str):
            raise DanpackError(f"texts[{i}] is {type(text).__name__}, expected str (decode bytes first)")
    return items


class Classifier:
    """Classifies texts with a verified bundle; safe to call from several threads at once."""

    def __init__(self, bundle: Bundle, backend: str = "onnxruntime", threads: int = 1,
                 native_path: str | os.PathLike | None = None) -> None:
        self.bundle = bundle
        self.encoder = Encoder(Tokenizer(bundle.tokenizer), bundle.vocab, bundle.oov_row)
        self.backend = open_backend(bundle, backend, threads)
        self._check_probe()
        # the compiled fast path (runtime/fastpath.py) reads the same file; the Python encoder when it cannot
        self.native, self.fast_path = (NativeEncoder.open(native_path) if native_path is not None
                                       else (None, "python (no bundle file to hand to the native runtime)"))

    @property
    def _native_forward(self) -> bool:
        """Whether calls of fewer than fastpath.MIN_TEXTS texts run the native forward pass: with the numpy backend
        only (its answers depend on the batch at the 1e-7 level already; onnxruntime is kept as chosen)."""
        return self.native is not None and self.backend.name == "numpy"

    def describe(self) -> dict:
        """What runs: the backend, which encoder (the native fast path or Python, and why), which forward pass, which
        certification arithmetic (predict_certified: native with the fast path, else numpy), the bundle's sha256."""
        forward = (f"native below {MIN_TEXTS} texts in predict/predict_proba, else {self.backend.name}"
                   if self._native_forward else self.backend.name)
        return {"backend": self.backend.name, "encoder": self.fast_path, "forward": forward,
                "certify": "native" if self.native is not None else "numpy",
                "labels": list(self.labels), "sha256": self.bundle.sha256}

    def _encode(self, texts: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
        """(B,) texts -> (B, T) ids and (B,) counts: natively when the fast path is open, else in Python."""
        if self.native is not None:
            encoded = self.native.encode(texts)
            if encoded is not None:
                return encoded
        return self.encoder.encode(texts)

    def _encode_known(self, texts: Sequence[str]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """As _encode, with each text's count of tokens the bundle knows (Encoder.encode_known)."""
        if self.native is not None:
            encoded = self.native.encode_known(texts)
            if encoded is not None:
                return encoded
        return self.encoder.encode_known(texts)

    def _check_probe(self) -> None:
        """Re-run the packer's probe: its id sequences (a backend that computes differently is refused at load),
        then its texts through tokenizer, vocabulary and backend (a permuted or edited vocabulary is refused)."""
        probe = self.bundle.manifest["probe"]
        self._check_probe_part(encode_batch(probe["ids"]), probe["probs"], "probe")
        if probe["texts"]:
            self._check_probe_part(self.encoder.encode(probe["texts"]), probe["text_probs"], "probe texts")

    def _check_probe_part(self, encoded: tuple[np.ndarray, np.ndarray], expected_probs: list, what: str) -> None:
        expected = np.asarray(expected_probs, dtype=np.float32)  # (P, C)
        ids, counts = encoded  # (P, T), (P,)
        try:
            probs = np.asarray(self.backend.run(ids, counts)[0])  # (P, C)
        except Exception as e:  # onnxruntime raises Fail / InvalidArgument for a graph that fails only when run
            raise BundleError(f"the bundle's graph fails when run by the {self.backend.name} backend "
                              f"({type(e).__name__}: {str(e)[:200]}); repack the model with `danpack pack`") from e
        if probs.shape != expected.shape:
            raise BundleError(f"the bundle's graph answers the probe with shape {probs.shape}, expected "
                              f"{expected.shape}; repack the model with `danpack pack`")
        if not np.isfinite(probs).all():
            raise BundleError(f"the bundle's graph answers the {what} with a non-finite probability (NaN or Inf) on "
                              f"the {self.backend.name} backend; the bundle is damaged or crafted: repack the model")
        worst = float(np.abs(probs - expected).max(initial=0.0))
        if not worst <= PROBE_TOLERANCE:
            cause = (" (its vocabulary or tokenizer is not the one the packer used)" if what == "probe texts"
                     else "")
            raise BundleError(f"the {self.backend.name} backend disagrees with the packer on the bundle's {what} "
                              f"(max difference {worst:.2e} > {PROBE_TOLERANCE}){cause}; the bundle or the runtime "
                              "is damaged (the probe: inputs the packer stored with the answers it computed, re-run "
                              "at every load)")

    @property
    def labels(self) -> tuple[str, ...]:
        return self.bundle.labels

    def _label_names(self, probs: np.ndarray) -> list[str]:
        """(B, C) probabilities -> the B best labels (the label tuple built once, not once per text)."""
        labels = self.labels
        return [labels[i] for i in probs.argmax(axis=1).tolist()]

    @property
    def manifest(self) -> dict:
        return self.bundle.manifest

    def run(self, texts: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
        """(B,) texts -> ((B, C) probabilities, (B, C) logits), CALL_TEXTS texts per backend call; fewer than
        MIN_TEXTS texts on the numpy backend in one native call when the compiled part is there (describe())."""
        texts = as_texts(texts)
        if len(texts) < MIN_TEXTS and texts and self._native_forward:  # e.g. one text: one C call, no numpy pass
            answered = self.native.classify(texts, len(self.labels))
            if answered is not None:
                return answered
        if len(texts) <= CALL_TEXTS:
            return self.backend.run(*self._encode(texts))  # (B, T) ids, (B,) counts in
        parts = [self.backend.run(*self._encode(texts[i : i + CALL_TEXTS]))
                 for i in range(0, len(texts), CALL_TEXTS)]
        return np.concatenate([p for p, _ in parts]), np.concatenate([z for _, z in parts])  # (B, C) each

    def predict_proba(self, texts: Sequence[str]) -> np.ndarray:
        """(B,) texts -> (B, C) probabilities in label order."""
        return self.run(texts)[0]

    def predict(self, texts: Sequence[str]) -> list[str]:
        """(B,) texts -> B labels."""
        probs = self.predict_proba(texts)
        return self._label_names(probs)

    def predict_known(self, texts: Sequence[str]) -> tuple[list[str], np.ndarray, np.ndarray]:
        """(B,) texts -> (B labels, (B, C) probabilities, (B,) int64 known-token counts). A text with 0 known
        tokens got the model's answer to an empty text: route it to a fallback rather than trust its label."""
        texts = as_texts(texts)
        probs_parts, known_parts = [], []
        for i in range(0, max(len(texts), 1), CALL_TEXTS):
            ids, counts, known = self._encode_known(texts[i : i + CALL_TEXTS])  # (b, T), (b,), (b,)
            probs_parts.append(self.backend.run(ids, counts)[0])  # (b, C)
            known_parts.append(known)
        probs, known = np.concatenate(probs_parts), np.concatenate(known_parts)  # (B, C), (B,)
        return self._label_names(probs), probs, known

    @cached_property
    def box_bound(self):
        """The bundle's certification terms, computed on first use: callers who never certify pay nothing."""
        from .certify import box_bound

        return box_bound(self.bundle)

    @cached_property
    def _native_certifier(self):
        """runtime/certify.py certify_box in C (runtime/fastpath.py NativeCertifier) when the fast path serves this
        bundle; None: the numpy code (the reference) certifies."""
        return NativeCertifier.open(self.box_bound) if self.native is not None else None

    def predict_certified(self, texts: Sequence[str]) -> tuple[list[str], np.ndarray, np.ndarray]:
        """(B,) texts -> (B labels, (B, C) probabilities, (B,) bool): True where the float original provably
        predicts the same label, whatever int8 quantisation and pruning changed (see runtime/certify.py). A text with
        no token the bundle knows is never certified: its answer says nothing about the text."""
        from .certify import certify_packed, encode_unknown

        bound, texts, certifier = self.box_bound, as_texts(texts), self._native_certifier
        probs_parts, certified_parts = [], []
        for i in range(0, max(len(texts), 1), CALL_TEXTS):
            ids, counts, unknown = encode_unknown(self.encoder, texts[i : i + CALL_TEXTS], bound.envelope,
                                                 self.native)  # (b, T), (b,), (b,) or (b, U)
            probs, logits = self.backend.run(ids, counts)  # (b, C), (b, C)
            top = logits.argmax(axis=1)  # (b,)
            certified = (certifier.certify(top, ids, counts, unknown) if certifier is not None
                         else certify_packed(bound, logits, ids, counts, unknown))  # (b,)
            certified_parts.append(certified & (probs.argmax(axis=1) == top))
            probs_parts.append(probs)
        probs, certified = np.concatenate(probs_parts), np.concatenate(certified_parts)  # (B, C), (B,)
        return self._label_names(probs), probs, certified


def load(path: str | os.PathLike, backend: str = "onnxruntime", threads: int = 1) -> Classifier:
    """Read, verify and open a bundle. Raises BundleError (a DanpackError) on any bad bundle."""
    if backend not in BACKENDS:
        raise DanpackError(f"backend {backend!r} is not one of {BACKENDS}")
    if not isinstance(threads, int) or isinstance(threads, bool) or not 1 <= threads <= MAX_THREADS:
        raise DanpackError(f"threads must be an integer from 1 to {MAX_THREADS}, found {threads!r}")
    return Classifier(read_bundle(path), backend, threads, native_path=path)
