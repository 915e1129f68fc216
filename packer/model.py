"""The float model directory ("the float original"): load with full validation, save atomically.

Layout (format `danpack-float`, version 1):
  dan.json        format, version, labels, embedding_dim, hidden_sizes, activation,
                     tokenizer spec, oov policy ({"policy": "skip"} or {"policy": "unk", "token": T})
  tokens.txt          UTF-8, one token per line, line i is row i of the table
  weights.npz | weights.safetensors
                     embedding [V, D], hidden.{i}.weight [out, in], hidden.{i}.bias [out],
                     output.weight [C, H], output.bias [C]; float32 or float16
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import shutil
import tempfile
import zipfile
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from danpack.runtime.encode import Encoder
from danpack.runtime.errors import DanpackError, ModelError, TokenizerError
from danpack.runtime.forward import ACTIVATIONS, Layer, forward_logits, softmax
from danpack.runtime.safe_text import labels_problem, token_problem
from danpack.runtime.stream_records import (MAX_JSON_DEPTH, _bounded_int, _decode_json, _finite_float,
                                            _reject_constant, nests_deeper)
from danpack.runtime.tokenize import Tokenizer, TokenizerSpec

from danpack.files import current_umask, feed_file

FORMAT_NAME = "danpack-float"
FORMAT_VERSION = 1
WEIGHT_FILES = ("weights.safetensors", "weights.npz")
MAX_CONFIG_BYTES = 16 << 20  # dan.json: a few hundred bytes plus metadata
NPY_HEADER_SLACK = 1 << 16  # bytes an .npy member may hold beyond its array data (its header)
MODEL_FILES = ("dan.json", "tokens.txt", *WEIGHT_FILES)  # every file a model directory may hold


def model_files(model_dir: str | os.PathLike) -> dict[str, Path]:
    """The model directory's files by name (present or not), for messages and overwrite checks."""
    return {name: Path(model_dir) / name for name in MODEL_FILES}
CONFIG_KEYS = {
    "format", "version", "labels", "embedding_dim", "hidden_sizes", "activation",
    "tokenizer", "oov", "metadata",
}
OOV_POLICIES = ("skip", "unk")


@dataclass(frozen=True)
class FloatModel:
    """A validated float DAN: vocabulary, table, layers, labels, tokenizer, OOV policy."""

    vocab: tuple[str, ...]  # row i of `embedding` is vocab[i]
    embedding: np.ndarray  # (V, D) float32
    layers: tuple[Layer, ...]  # hidden layers (activation set), then the output layer (None)
    labels: tuple[str, ...]  # output order
    tokenizer: TokenizerSpec = field(default_factory=TokenizerSpec)
    oov_policy: str = "skip"  # "skip": unknown tokens leave the mean; "unk": they use `unk_token`
    unk_token: str | None = None
    metadata: dict = field(default_factory=dict)  # free-form, carried along (trainer, seed, ...)

    @property
    def activation(self) -> str:
        hidden = [layer.activation for layer in self.layers[:-1]]
        return hidden[0] if hidden else "relu"

    @property
    def hidden_sizes(self) -> tuple[int, ...]:
        return tuple(int(layer.bias.shape[0]) for layer in self.layers[:-1])

    def encoder(self) -> Encoder:
        """The text -> ids mapping of this model (full vocabulary, its own OOV policy)."""
        oov_id = self.vocab.index(self.unk_token) if self.oov_policy == "unk" else None
        return Encoder(Tokenizer(self.tokenizer), self.vocab, oov_id)

    def predict_logits(self, texts: Sequence[str], encoder: Encoder | None = None) -> np.ndarray:
        """(B,) texts -> (B, C) float32 logits through the reference numpy forward pass."""
        ids, counts = (encoder or self.encoder()).encode(texts)
        return forward_logits(self.embedding, self.layers, ids, counts)

    def predict_proba(self, texts: Sequence[str], encoder: Encoder | None = None) -> np.ndarray:
        """(B,) texts -> (B, C) probabilities in label order."""
        return softmax(self.predict_logits(texts, encoder))


def _fail(path: Path, what: str, fix: str = "") -> ModelError:
    return ModelError(f"{path}: {what}" + (f"; {fix}" if fix else ""))


def _read_config(path: Path) -> dict:
    try:
        if path.stat().st_size > MAX_CONFIG_BYTES:
            raise _fail(path, f"is {path.stat().st_size:,} bytes, more than any model description "
                        f"({MAX_CONFIG_BYTES:,} max)", "check that this is the model's dan.json")
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError as e:
        raise _fail(path, "missing", "a model directory needs dan.json, tokens.txt and weights.npz or weights.safetensors") from e
    except (OSError, UnicodeDecodeError) as e:
        raise _fail(path, f"cannot be read as UTF-8 text ({e})") from e
    config = load_json_text(text, path)
    if not isinstance(config, dict):
        raise _fail(path, f"must hold a JSON object, found {type(config).__name__}")
    if config.get("format") != FORMAT_NAME:
        raise _fail(path, f"field 'format' is {config.get('format')!r}, expected {FORMAT_NAME!r}",
                    "is this a danpack float model directory?")
    version = config.get("version")
    if type(version) is not int or version != FORMAT_VERSION:
        raise _fail(path, f"field 'version' is {version!r}; this danpack reads version {FORMAT_VERSION}",
                    "upgrade danpack or re-save the model with this version")
    unknown = set(config) - CONFIG_KEYS
    if unknown:
        raise _fail(path, f"unknown fields {sorted(unknown)}", f"allowed fields are {sorted(CONFIG_KEYS)}")
    return config


def load_json_text(text: str, path: Path, error: type[DanpackError] = ModelError, **hooks):
    """Strict, bounded JSON for the files a model folder or a user hands in (dan.json, JSON vocabularies, label
    files and maps): nesting deeper than MAX_JSON_DEPTH, integers of more than 4,000 digits, NaN / Infinity and
    malformed text are each an `error` naming the file, never a traceback. `hooks` go to the JSON decoder
    (e.g. object_pairs_hook)."""

    def fail(what: str) -> DanpackError:
        return error(f"{path}: {what}")

    if nests_deeper(text):
        raise fail(f"nests arrays or objects deeper than {MAX_JSON_DEPTH} levels")
    decode = json.JSONDecoder(parse_constant=_reject_constant, parse_float=_finite_float, parse_int=_bounded_int,
                              **hooks).decode if hooks else _decode_json
    try:
        return decode(text)
    except json.JSONDecodeError as e:
        raise fail(f"is not valid JSON (line {e.lineno}, column {e.colno}: {e.msg})") from e
    except RecursionError as e:
        raise fail("is not valid JSON (nested too deeply)") from e
    except ValueError as e:  # NaN / Infinity, numbers out of range, over-long integers
        raise fail(f"is not valid JSON ({e})") from e


def _config_field(config: dict, path: Path, key: str, check, expected: str):
    if key not in config:
        raise _fail(path, f"field {key!r} is missing", f"expected {expected}")
    value = config[key]
    if not check(value):
        shown = repr(value)  # repr escapes control characters; cut, whatever size the file gives
        raise _fail(path, f"field {key!r} is {shown[:200] + '...' if len(shown) > 200 else shown}, expected {expected}")
    return value


def _is_int(v, low: int = 1) -> bool:
    return isinstance(v, int) and not isinstance(v, bool) and v >= low


def _read_vocab(path: Path) -> tuple[str, ...]:
    try:
        data = path.read_bytes()
    except FileNotFoundError as e:
        raise _fail(path, "missing", "write one token per line, line i naming row i of the embedding") from e
    except OSError as e:
        raise _fail(path, f"cannot be read ({e})") from e
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as e:
        line = data[: e.start].count(b"\n") + 1
        raise _fail(path, f"line {line} is not valid UTF-8", "save the vocabulary as UTF-8") from e
    text = text.removeprefix("\ufeff")  # a byte-order mark (Windows editors) is no part of the first token
    if text.endswith("\n"):
        text = text[:-1]
    tokens = text.split("\n") if text else []
    seen: dict[str, int] = {}
    for line, token in enumerate(tokens, start=1):
        if token == "" or token.strip() == "":
            raise _fail(path, f"line {line} holds an empty or blank token", "every row needs a distinct, non-empty token")
        if token != token.strip():
            hint = " (Windows line endings? save with \\n endings)" if token.endswith("\r") else ""
            raise _fail(path, f"line {line} token {token!r} has leading or trailing whitespace{hint}",
                        "strip the token; whitespace can never be part of a token")
        if token in seen:
            raise _fail(path, f"line {line} repeats the token {token!r} of line {seen[token]}",
                        "tokens must be unique: merge or drop the duplicate row")
        seen[token] = line
    if not tokens:
        raise _fail(path, "holds no tokens")
    problem = token_problem(tokens)
    if problem is not None:
        raise _fail(path, problem, "drop or shorten the token")
    return tuple(tokens)


def _read_npz(path: Path, budgets: dict[str, int]) -> dict[str, np.ndarray | None]:
    """The arrays of an npz, each member sized from the zip directory and its .npy header before it is inflated.

    `budgets` gives the elements each expected tensor declares (dan.json and tokens.txt); a member may hold at
    most 8 bytes per declared element plus a header (float64 is the widest dtype worth a clear message later),
    so a small deflated file can never inflate to gigabytes. An unexpected member is never inflated: it maps to
    None, and load_model refuses it by name.
    """
    arrays: dict[str, np.ndarray | None] = {}
    with zipfile.ZipFile(path) as archive:
        for member in archive.infolist():
            name = member.filename.removesuffix(".npy")
            if name not in budgets:
                arrays[name] = None
                continue
            limit = 8 * budgets[name] + NPY_HEADER_SLACK
            if member.file_size > limit:
                raise _fail(path, f"tensor {name!r} inflates to {member.file_size:,} bytes, far more than its "
                            f"declared shape needs ({budgets[name]:,} elements)", "re-save the weights")
            try:
                with archive.open(member) as f:
                    version = np.lib.format.read_magic(f)
                    read_header = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                                   else np.lib.format.read_array_header_2_0)
                    shape, _fortran, dtype = read_header(f)
                    if dtype.hasobject:
                        raise _fail(path, f"cannot be read: tensor {name!r} holds Python objects (pickled data is "
                                    "never loaded)", "save float32 arrays")
                    need = math.prod(shape) * dtype.itemsize
                    if need > limit:
                        raise _fail(path, f"tensor {name!r} has shape {tuple(shape)} ({need:,} bytes), far more than "
                                    f"its declared shape needs ({budgets[name]:,} elements)", "re-save the weights")
                with archive.open(member) as f:
                    arrays[name] = np.lib.format.read_array(f, allow_pickle=False)
            except ModelError:
                raise
            except (OSError, ValueError, EOFError, zipfile.BadZipFile, RuntimeError) as e:
                raise _fail(path, f"cannot be read as npz weights (tensor {name!r}: {type(e).__name__}: {e})",
                            "re-save the weights; the file may be truncated") from e
    return arrays


def _read_weights(model_dir: Path, budgets: dict[str, int] | None = None) -> tuple[Path, dict[str, np.ndarray]]:
    present = [model_dir / name for name in WEIGHT_FILES if (model_dir / name).exists()]
    if not present:
        raise _fail(model_dir, f"no weights file: expected one of {list(WEIGHT_FILES)}")
    if len(present) > 1:
        raise _fail(model_dir, f"both {present[0].name} and {present[1].name} exist", "keep exactly one weights file")
    path = present[0]
    try:
        if path.suffix == ".npz" and budgets is not None:
            arrays = _read_npz(path, budgets)
        elif path.suffix == ".npz":
            with np.load(path, allow_pickle=False) as npz:
                arrays = {key: npz[key] for key in npz.files}
        else:
            if budgets is not None and path.stat().st_size > 8 * sum(budgets.values()) + NPY_HEADER_SLACK:
                raise _fail(path, f"is {path.stat().st_size:,} bytes, far more than the tensors dan.json and "
                            f"tokens.txt declare ({sum(budgets.values()):,} elements)", "re-save the weights")
            from safetensors.numpy import load_file

            arrays = load_file(str(path))
    except ModelError:
        raise
    except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile, RuntimeError, MemoryError) as e:
        raise _fail(path, f"cannot be read as {path.suffix[1:]} weights ({type(e).__name__}: {e})",
                    "re-save the weights; the file may be truncated") from e
    except Exception as e:  # safetensors raises its own SafetensorError for damaged headers
        raise _fail(path, f"cannot be read ({type(e).__name__}: {e})", "re-save the weights") from e
    return path, arrays


def _take_tensor(path: Path, arrays: dict, name: str, ndim: int) -> np.ndarray:
    if name not in arrays:
        raise _fail(path, f"tensor {name!r} is missing", f"tensors present: {sorted(arrays)}")
    a = arrays[name]
    if not isinstance(a, np.ndarray):
        raise _fail(path, f"tensor {name!r} is not an array (found {type(a).__name__})", "save it with numpy or safetensors")
    if a.dtype not in (np.float32, np.float16):
        raise _fail(path, f"tensor {name!r} has dtype {a.dtype}, expected float32 or float16")
    if a.ndim != ndim:
        raise _fail(path, f"tensor {name!r} has shape {tuple(a.shape)}, expected {ndim} dimensions")
    a = np.ascontiguousarray(a, dtype=np.float32)
    if not np.isfinite(a).all():
        bad = np.argwhere(~np.isfinite(a))[0]
        raise _fail(path, f"tensor {name!r} holds NaN or Inf (first at index {tuple(int(i) for i in bad)})",
                    "retrain or repair the weights")
    return a


def load_model(model_dir: str | os.PathLike) -> FloatModel:
    """Read and validate a float model directory; every problem is a ModelError naming file and field."""
    root = Path(model_dir)
    if not root.is_dir():
        raise _fail(root, "is not a directory" if root.exists() else "no such directory",
                    "pass the model directory holding dan.json, tokens.txt and weights")
    config_path = root / "dan.json"
    config = _read_config(config_path)
    labels = _config_field(config, config_path, "labels",
                           lambda v: isinstance(v, list) and all(isinstance(x, str) for x in v),
                           "a list of at least 2 non-empty label strings")
    problem = labels_problem(labels)
    if problem is not None:
        raise _fail(config_path, f"field 'labels' {problem}",
                    "expected a list of at least 2 non-empty, unique, printable label strings")
    dim = _config_field(config, config_path, "embedding_dim", _is_int, "a positive integer")
    hidden_sizes = _config_field(config, config_path, "hidden_sizes",
                                 lambda v: isinstance(v, list) and all(_is_int(x) for x in v),
                                 "a list of positive integers (may be empty)")
    activation = _config_field(config, config_path, "activation", lambda v: v in ACTIVATIONS,
                               f"one of {list(ACTIVATIONS)}")
    try:
        spec = TokenizerSpec.from_dict(config.get("tokenizer", {}))
    except TokenizerError as e:
        raise _fail(config_path, f"field 'tokenizer': {e}") from e
    oov = config.get("oov", {"policy": "skip"})
    if not isinstance(oov, dict) or oov.get("policy") not in OOV_POLICIES:
        raise _fail(config_path, f"field 'oov' is {oov!r}",
                    'expected {"policy": "skip"} or {"policy": "unk", "token": "<unk>"}')
    unk_token = oov.get("token") if oov["policy"] == "unk" else None
    if oov["policy"] == "unk" and (not isinstance(unk_token, str) or not unk_token):
        raise _fail(config_path, f"field 'oov' token is {unk_token!r}, expected the unknown-token string, e.g. \"<unk>\"")
    extra_oov = set(oov) - {"policy", "token"}
    if extra_oov:
        raise _fail(config_path, f"field 'oov' has unknown keys {sorted(extra_oov)}", "allowed: policy, token")
    metadata = config.get("metadata", {})
    if not isinstance(metadata, dict):
        raise _fail(config_path, f"field 'metadata' must be an object, found {type(metadata).__name__}")

    vocab = _read_vocab(root / "tokens.txt")
    if oov["policy"] == "unk" and unk_token not in set(vocab):
        raise _fail(config_path, f"field 'oov' names unknown-token {unk_token!r}, which is not in tokens.txt",
                    "add the token to the vocabulary or use the 'skip' policy")

    shapes = {"embedding": (len(vocab), dim)}
    width = dim
    for name, size in zip([f"hidden.{i}" for i in range(len(hidden_sizes))] + ["output"], [*hidden_sizes, len(labels)]):
        shapes[f"{name}.weight"], shapes[f"{name}.bias"], width = (size, width), (size,), size
    weights_path, arrays = _read_weights(root, {name: math.prod(s) for name, s in shapes.items()})
    embedding = _take_tensor(weights_path, arrays, "embedding", 2)
    if embedding.shape[0] != len(vocab):
        raise _fail(weights_path, f"tensor 'embedding' has {embedding.shape[0]} rows but tokens.txt has {len(vocab)} tokens",
                    "the vocabulary and the table must describe the same rows")
    if embedding.shape[1] != dim:
        raise _fail(weights_path, f"tensor 'embedding' has width {embedding.shape[1]}, dan.json says embedding_dim {dim}")

    layers: list[Layer] = []
    names = [f"hidden.{i}" for i in range(len(hidden_sizes))] + ["output"]
    sizes = list(hidden_sizes) + [len(labels)]
    width = dim
    for name, size in zip(names, sizes):
        w = _take_tensor(weights_path, arrays, f"{name}.weight", 2)
        b = _take_tensor(weights_path, arrays, f"{name}.bias", 1)
        if w.shape != (size, width):
            what = "the label count" if name == "output" else "hidden_sizes"
            raise _fail(weights_path, f"tensor '{name}.weight' has shape {tuple(w.shape)}, expected {(size, width)} "
                        f"(from {what} and the previous layer's width)")
        if b.shape != (size,):
            raise _fail(weights_path, f"tensor '{name}.bias' has shape {tuple(b.shape)}, expected {(size,)}")
        layers.append(Layer(w, b, activation if name != "output" else None))
        width = size
    extra = set(arrays) - {"embedding"} - {f"{n}.{p}" for n in names for p in ("weight", "bias")}
    if extra:
        raise _fail(weights_path, f"unexpected tensors {sorted(extra)}",
                    "hidden_sizes in dan.json may not match the layers saved")
    return FloatModel(tuple(vocab), embedding, tuple(layers), tuple(labels), spec, oov["policy"], unk_token, metadata)


def model_config(model: FloatModel) -> dict:
    """The dan.json content of a model."""
    oov = {"policy": model.oov_policy} if model.oov_policy == "skip" else {"policy": "unk", "token": model.unk_token}
    return {
        "format": FORMAT_NAME,
        "version": FORMAT_VERSION,
        "labels": list(model.labels),
        "embedding_dim": int(model.embedding.shape[1]),
        "hidden_sizes": list(model.hidden_sizes),
        "activation": model.activation,
        "tokenizer": model.tokenizer.to_dict(),
        "oov": oov,
        "metadata": model.metadata,
    }


def model_tensors(model: FloatModel, dtype=np.float32) -> dict[str, np.ndarray]:
    """The weights file content of a model, in the documented tensor names."""
    tensors = {"embedding": model.embedding}
    for i, layer in enumerate(model.layers):
        name = "output" if i == len(model.layers) - 1 else f"hidden.{i}"
        tensors[f"{name}.weight"] = layer.weight
        tensors[f"{name}.bias"] = layer.bias
    return {k: np.ascontiguousarray(v, dtype=dtype) for k, v in tensors.items()}


def save_model(model: FloatModel, model_dir: str | os.PathLike, weights_format: str = "npz") -> Path:
    """Write a model directory atomically: a sibling temp dir, then rename into place."""
    if weights_format not in ("npz", "safetensors"):
        raise ModelError(f"weights format {weights_format!r} is not 'npz' or 'safetensors'")
    target = Path(model_dir)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.", dir=target.parent))
    except OSError as e:
        raise ModelError(f"{target}: cannot write a model directory here ({e.strerror or e}); "
                         "choose another output path") from e
    os.chmod(tmp, 0o777 & ~current_umask())  # mkdtemp makes 0700 directories; a model gets the usual permissions
    backup = None
    try:
        (tmp / "dan.json").write_text(json.dumps(model_config(model), indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
        (tmp / "tokens.txt").write_text("".join(t + "\n" for t in model.vocab), encoding="utf-8")
        tensors = model_tensors(model)
        if weights_format == "npz":
            with open(tmp / "weights.npz", "wb") as f:
                np.savez(f, **tensors)
        else:
            from safetensors.numpy import save_file

            save_file(tensors, str(tmp / "weights.safetensors"))
        if target.exists():
            backup = target.with_name(f".{target.name}.old-{os.getpid()}")
            os.replace(target, backup)
        os.replace(tmp, target)
        if backup is not None:
            shutil.rmtree(backup, ignore_errors=True)
    except BaseException as e:
        shutil.rmtree(tmp, ignore_errors=True)
        if backup is not None and backup.exists() and not target.exists():
            os.replace(backup, target)  # the final rename failed: put the old model back
        if isinstance(e, OSError):
            raise ModelError(f"{target}: writing the model failed ({e.strerror or e}); "
                             "the previous directory, if any, is intact") from e
        raise
    return target


def model_digest(model_dir: str | os.PathLike) -> str:
    """sha256 over the model directory's files (names and bytes), for the bundle manifest."""
    root = Path(model_dir)
    h = hashlib.sha256()
    for name in MODEL_FILES:
        path = root / name
        if path.exists():
            h.update(name.encode() + b"\0")
            feed_file(h, path)
    return h.hexdigest()


def model_bytes(model_dir: str | os.PathLike) -> int:
    """Bytes on disk of the model's files."""
    root = Path(model_dir)
    return sum((root / n).stat().st_size for n in MODEL_FILES if (root / n).exists())
