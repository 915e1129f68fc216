"""PyTorch state_dict (or .safetensors of the same keys) -> float model directory.

The checkpoint is read as weights only (torch.load(weights_only=True), or safetensors
without torch), the DAN layout is found from shapes and names (one 2-D table, then
Linear layers chaining its width to the label count), and anything ambiguous is
refused with the candidates listed. What a state_dict cannot record (activation,
EmbeddingBag mode, max_norm) must come from the caller.
"""

from __future__ import annotations

import json
import os
import re
import struct
import zipfile
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from danpack.runtime.errors import DanpackError
from danpack.runtime.forward import ACTIVATIONS, Layer
from danpack.runtime.tokenize import Tokenizer, TokenizerSpec

from danpack.files import file_sha256
from danpack.model import FORMAT_NAME, FloatModel, OOV_POLICIES, load_json_text, load_model, save_model

TORCH_PIN = "torch==2.13.0"
BAG_MODES = ("mean", "sum", "max")
# Tokens that name a padding row (common practice in NLP vocabularies; list from memory).
PAD_TOKENS = frozenset({"<pad>", "<PAD>", "[PAD]", "[pad]", "<padding>", "__pad__", "<blank>", "<PADDING>"})
# Last name component that marks the classifier layer (common practice in module names; from memory).
OUTPUT_NAMES = frozenset({"out", "output", "head", "classifier", "logits", "fc_out"})
MAX_ORDERINGS = 200  # stop enumerating layer orders past this many (a DAN has a handful of layers)
MAX_LAYOUT_STATES = 200_000  # partial orders the layout search may try (about a second), then --layer-keys
SHOWN_CANDIDATES = 6  # orderings or tables listed in an ambiguity error


class CheckpointError(DanpackError):
    """A PyTorch checkpoint, or the vocabulary/labels given with it, cannot be converted."""


@dataclass(frozen=True)
class ConvertOptions:
    """Everything the state_dict itself cannot say; defaults match a plain DAN."""

    activation: str | None = None  # "relu"/"tanh"; required when there are hidden layers (not recorded in a state_dict)
    bag_mode: str = "mean"  # nn.EmbeddingBag mode; only "mean" fits this architecture
    embedding_key: str | None = None  # name the table when several 2-D tensors could be it
    layer_keys: tuple[str, ...] | None = None  # name the Linear layers in forward order (hidden..., output)
    ignore_keys: tuple[str, ...] = ()  # tensors (or module prefixes) the model does not use
    state_key: str | None = None  # entry holding the state_dict inside a training checkpoint dict
    padding_row: int | None = None  # table row to drop as padding (negative counts from the end)
    detect_padding: bool = True  # drop an all-zero row whose token is a pad token like "<pad>"
    tokenizer: TokenizerSpec = field(default_factory=TokenizerSpec)  # written into dan.json
    oov_policy: str = "auto"  # "auto" (unk when the vocabulary has an unknown-word token, else skip), "skip" or "unk"
    unk_token: str | None = None  # the row unknown tokens use under "unk"; None: the usual spelling found
    token_sample: str | None = None  # JSONL of texts and the user's own tokens or ids, reproduced before writing
    weights_format: str = "npz"  # "npz" or "safetensors"


@dataclass(frozen=True)
class Checkpoint:
    """The tensors of a checkpoint as numpy, in file order, with their original dtypes."""

    path: Path
    kind: str  # "torch" or "safetensors"
    tensors: dict[str, np.ndarray]  # floating tensors as float32 (float16/bfloat16/float64 widened or narrowed)
    dtypes: dict[str, str]  # every entry's original dtype, floating or not
    shapes: dict[str, tuple[int, ...]]  # every entry's shape
    key_order_kept: bool  # torch.save keeps registration order; safetensors sorts keys

    @property
    def keys(self) -> list[str]:
        return list(self.shapes)


@dataclass(frozen=True)
class LinearSlot:
    """One nn.Linear found in the checkpoint: weight (out, in) and optional bias (out,)."""

    weight_key: str
    bias_key: str | None
    out_dim: int
    in_dim: int

    @property
    def prefix(self) -> str:
        return _module_prefix(self.weight_key)

    def describe(self) -> str:
        return f"{self.weight_key} ({self.out_dim}x{self.in_dim})"


@dataclass(frozen=True)
class Layout:
    """Where the DAN's tensors are: the table key, then Linear slots in forward order."""

    embedding_key: str
    layers: tuple[LinearSlot, ...]
    ignored: tuple[str, ...]  # keys left out on request
    notes: tuple[str, ...]  # how the order was decided


@dataclass(frozen=True)
class DroppedRow:
    row: int
    token: str | None  # None when the vocabulary had no token for this row
    reason: str


@dataclass(frozen=True)
class ConversionReport:
    """What was found, how it was mapped, and what was written."""

    checkpoint: Checkpoint
    layout: Layout
    mapping: tuple[tuple[str, str, tuple[int, ...]], ...]  # (our tensor name, checkpoint key, shape)
    table_rows: int
    vocab_size: int
    embedding_dim: int
    hidden_sizes: tuple[int, ...]
    labels: tuple[str, ...]
    activation: str
    dropped: tuple[DroppedRow, ...]
    warnings: tuple[str, ...]
    output_dir: Path
    weights_format: str
    bytes_written: int
    tokenizer: TokenizerSpec | None = None  # the pipeline written into dan.json
    oov_choice: str = ""  # the unknown-word policy chosen, and why
    token_sample: str = ""  # what the token sample proved ("" when none was given)


# ---------------------------------------------------------------- reading the checkpoint


def _import_torch(purpose: str):
    """torch is optional: import it only where a torch file must be read."""
    try:
        import torch
    except ImportError as e:
        raise CheckpointError(
            f"{purpose} needs PyTorch, which is not installed; install it with `pip install {TORCH_PIN}` "
            "(or the danpack[torch] extra), or save the state_dict as .safetensors, which danpack reads without torch"
        ) from e
    return torch


def _is_safetensors(path: Path) -> bool:
    """True for a .safetensors name or the format's header: u64 little-endian length, then '{'."""
    if path.suffix == ".safetensors":
        return True
    with open(path, "rb") as f:
        head = f.read(9)
    if len(head) < 9 or head[8:9] != b"{":
        return False
    (n,) = struct.unpack("<Q", head[:8])
    return 0 < n <= path.stat().st_size - 8


def read_checkpoint(path: str | os.PathLike, state_key: str | None = None) -> Checkpoint:
    """Read a torch.save'd state_dict (weights only) or a .safetensors file into numpy arrays."""
    path = Path(path)
    if not path.is_file():
        raise CheckpointError(f"{path}: " + ("is not a file" if path.exists() else "no such file"))
    if _is_safetensors(path):
        if state_key is not None:
            raise CheckpointError(f"{path}: --state-key {state_key!r} applies to torch.save files; "
                                  "a .safetensors file is already a flat state_dict")
        return _read_safetensors(path)
    return _read_torch(path, state_key)


def _read_safetensors(path: Path) -> Checkpoint:
    from safetensors.numpy import load_file

    try:
        raw = load_file(str(path))
    except TypeError as e:
        if "bfloat16" not in str(e):
            raise CheckpointError(f"{path}: cannot be read as safetensors ({e})") from e
        torch = _import_torch(f"{path}: reading bfloat16 tensors (numpy has no bfloat16)")
        from safetensors.torch import load_file as load_torch

        return _from_torch_dict(path, "safetensors", load_torch(str(path)), torch, key_order_kept=False)
    except Exception as e:  # SafetensorError (damaged/truncated header) is not a public class to catch by name
        raise CheckpointError(f"{path}: cannot be read as safetensors ({type(e).__name__}: {e}); "
                              "the file may be truncated: save it again") from e
    tensors, dtypes, shapes = {}, {}, {}
    for key in sorted(raw):
        a = raw[key]
        dtypes[key], shapes[key] = str(a.dtype), tuple(int(s) for s in a.shape)
        if np.issubdtype(a.dtype, np.floating):
            tensors[key] = np.ascontiguousarray(a, dtype=np.float32)
    return Checkpoint(path, "safetensors", tensors, dtypes, shapes, key_order_kept=False)


def _check_zip_records(path: Path) -> None:
    """Size a torch.save archive's records before torch reads them: torch inflates a deflated record into memory
    before any tensor can be checked (a 40 KB file held 16 MiB of zeros), while torch.save stores its records
    uncompressed, so together they never declare more bytes than the file holds (zip central directory)."""
    with path.open("rb") as f:
        if f.read(4) != b"PK\x03\x04":  # torch reads any other file as its older, uncompressed format
            return
    try:
        with zipfile.ZipFile(path) as archive:
            declared = sum(info.file_size for info in archive.infolist())
    except Exception as e:  # zipfile raises BadZipFile, NotImplementedError, struct.error ... on damaged headers
        raise CheckpointError(f"{path}: cannot be read as a torch.save checkpoint (zip: {type(e).__name__}: {e}); "
                              "the file may be truncated: save model.state_dict() again") from e
    size = path.stat().st_size
    if declared > size:
        raise CheckpointError(f"{path}: its zip records inflate to {declared:,} bytes, more than the file's {size:,} "
                              "(torch.save stores records uncompressed; a compressed one is sized before it is "
                              "inflated and refused): save model.state_dict() again with torch.save")


def _read_torch(path: Path, state_key: str | None) -> Checkpoint:
    torch = _import_torch(f"{path}: reading a torch.save checkpoint")
    _check_zip_records(path)
    try:
        obj = torch.load(str(path), map_location="cpu", weights_only=True)
    except Exception as e:  # the weights-only unpickler's refusal, or RuntimeError/EOFError/KeyError on damage
        found = re.search(r"GLOBAL ([\w.]+)", str(e))
        if type(e).__name__ == "UnpicklingError" and found:
            raise CheckpointError(
                f"{path}: holds a pickled Python object of class {found.group(1)}, not only weights; it is refused "
                "because loading it could run code (torch.load(weights_only=True)). Save model.state_dict(), "
                "not the model: torch.save(model.state_dict(), 'model.pt')"
            ) from e
        raise CheckpointError(
            f"{path}: cannot be read as a torch.save checkpoint ({type(e).__name__}: {str(e)[:200]}); "
            "the file may be truncated or not written by torch.save: save model.state_dict() again"
        ) from e
    state = _pick_state_dict(path, obj, state_key, torch)
    return _from_torch_dict(path, "torch", state, torch, key_order_kept=True)


def _describe_value(value, torch) -> str:
    if isinstance(value, torch.Tensor):
        return f"tensor {tuple(value.shape)}"
    if isinstance(value, dict):
        return f"dict of {len(value)}"
    return type(value).__name__


def _pick_state_dict(path: Path, obj, state_key: str | None, torch) -> dict:
    """The flat name -> tensor mapping inside what torch.load returned, or a refusal saying what was found."""
    if isinstance(obj, torch.Tensor):
        raise CheckpointError(f"{path}: holds a single tensor {tuple(obj.shape)}, not a state_dict; "
                              "save model.state_dict() (a name -> tensor mapping)")
    if not isinstance(obj, dict):
        raise CheckpointError(f"{path}: holds a {type(obj).__name__}, not a state_dict; save model.state_dict()")
    if {"state", "param_groups"} <= set(obj):
        raise CheckpointError(f"{path}: holds an optimizer state (keys 'state', 'param_groups'), which has no model "
                              "weights; save model.state_dict(), not optimizer.state_dict()")
    if not obj:
        raise CheckpointError(f"{path}: holds an empty dict; save model.state_dict() of the trained model")
    nested = [k for k, v in obj.items() if isinstance(v, dict) and v and _all_tensors(v, torch)]
    if state_key is not None:
        if state_key not in obj:
            raise CheckpointError(f"{path}: --state-key {state_key!r} is not an entry; entries: {list(obj)[:20]}")
        if state_key not in nested:
            raise CheckpointError(f"{path}: entry {state_key!r} is a {_describe_value(obj[state_key], torch)}, "
                                  f"not a name -> tensor dict; entries holding tensors: {nested or 'none'}")
        return obj[state_key]
    if _all_tensors(obj, torch):
        return obj
    entries = ", ".join(f"{k!r} ({_describe_value(v, torch)})" for k, v in list(obj.items())[:12])
    if nested:
        raise CheckpointError(f"{path}: holds a training checkpoint with entries {entries}, not a bare state_dict; "
                              f"pass --state-key {nested[0]} to read the model weights in it, or save "
                              "model.state_dict() alone")
    raise CheckpointError(f"{path}: holds a dict whose entries are not all named tensors: {entries}; "
                          "save model.state_dict()")


def _all_tensors(d: dict, torch) -> bool:
    return all(isinstance(k, str) and isinstance(v, torch.Tensor) for k, v in d.items())


def _from_torch_dict(path: Path, kind: str, state: dict, torch, key_order_kept: bool) -> Checkpoint:
    tensors, dtypes, shapes = {}, {}, {}
    budget = 4 * path.stat().st_size + (1 << 20)  # float32 copies of what the file holds, plus a little
    for key, t in state.items():
        t = t.detach()
        if t.layout == torch.strided and t.numel():
            # a view may claim far more elements than its storage holds (stride 0 repeats one value): size it
            # from shape and strides before anything is made contiguous
            reach = (1 + sum((n - 1) * abs(st) for n, st in zip(t.shape, t.stride()))) * t.element_size()
            stored = t.untyped_storage().nbytes() - t.storage_offset() * t.element_size()
            if t.numel() * t.element_size() > stored or reach > stored:
                raise CheckpointError(
                    f"{path}: tensor {key!r} of shape {tuple(t.shape)} (strides {tuple(t.stride())}) claims "
                    f"{t.numel() * t.element_size():,} bytes over a storage of {stored:,}: a view that repeats or "
                    "overlaps data, never a trained weight; save real tensors (tensor.contiguous()) in the state_dict")
        budget -= 4 * t.numel() if t.is_floating_point() else 0
        if budget < 0:
            raise CheckpointError(f"{path}: its tensors would take more than 4 times the file's {path.stat().st_size:,} "
                                  "bytes as float32 (tensors that share one storage); save each weight once")
        dtypes[key] = str(t.dtype).removeprefix("torch.")
        shapes[key] = tuple(int(s) for s in t.shape)
        if t.is_floating_point():
            if t.layout != torch.strided:
                t = t.to_dense()
            tensors[key] = np.ascontiguousarray(t.to(torch.float32).cpu().numpy())  # bf16/f16/f64 -> float32
    return Checkpoint(path, kind, tensors, dtypes, shapes, key_order_kept)


# ---------------------------------------------------------------- finding the layout


def _module_prefix(key: str) -> str:
    return key[: -len(".weight")] if key.endswith(".weight") else key


def _name_parts(prefix: str) -> tuple[tuple[str, ...], tuple[int, ...]]:
    """'mlp.2' -> (('mlp.', ''), (2,)): the non-numeric skeleton and the numbers in a name."""
    pieces = re.split(r"(\d+)", prefix)
    return tuple(pieces[0::2]), tuple(int(p) for p in pieces[1::2])


def _resolve_key(ck: Checkpoint, name: str, option: str) -> str:
    for key in (name, f"{name}.weight"):
        if key in ck.shapes:
            return key
    two_d = [k for k, s in ck.shapes.items() if len(s) == 2]
    raise CheckpointError(f"{ck.path}: {option} {name!r} names no tensor; 2-D tensors present: {two_d}")


def _ignored(ck: Checkpoint, ignore: Sequence[str]) -> set[str]:
    out: set[str] = set()
    for name in ignore:
        hits = {k for k in ck.shapes if k == name or k.startswith(name + ".")}
        if not hits:
            raise CheckpointError(f"{ck.path}: --ignore-key {name!r} matches no tensor; keys: {ck.keys}")
        out |= hits
    return out


def _tensor_line(ck: Checkpoint, key: str) -> str:
    return f"{key} {ck.shapes[key]} {ck.dtypes[key]}"


def _linear_slots(ck: Checkpoint, keys: list[str]) -> dict[str, LinearSlot]:
    """Every 2-D floating tensor as a possible Linear weight, paired with its '.bias' when present."""
    slots = {}
    for key in keys:
        if key not in ck.tensors or ck.tensors[key].ndim != 2:
            continue
        bias = _module_prefix(key) + ".bias" if key.endswith(".weight") else None
        if bias not in ck.shapes or bias not in keys:
            bias = None
        elif ck.shapes[bias] != (ck.shapes[key][0],) or bias not in ck.tensors:
            raise CheckpointError(f"{ck.path}: {_tensor_line(ck, bias)} does not fit {_tensor_line(ck, key)}: "
                                  f"a Linear bias must be a float vector of {ck.shapes[key][0]}")
        slots[key] = LinearSlot(key, bias, *ck.shapes[key])
    return slots


def _chains(slots: list[LinearSlot], width: int, n_out: int, where: object = "checkpoint") -> list[tuple[LinearSlot, ...]]:
    """Every order of all `slots` whose shapes chain width -> ... -> n_out (up to MAX_ORDERINGS)."""
    found: list[tuple[LinearSlot, ...]] = []
    states = [0]

    def walk(path: list[LinearSlot], left: list[LinearSlot], w: int) -> None:
        if len(found) >= MAX_ORDERINGS:
            return
        states[0] += 1
        if states[0] > MAX_LAYOUT_STATES:  # interchangeable layers make the orders factorial: stop, say how to name them
            raise CheckpointError(
                f"{where}: {len(slots)} Linear layers can be chained in too many orders to search (more than "
                f"{MAX_LAYOUT_STATES:,} partial orders tried; layers of equal shapes are interchangeable): name the "
                "order with --layer-keys (hidden layers first, output last), or --ignore-key tensors the model "
                "does not use")
        if not left:
            if w == n_out and path:
                found.append(tuple(path))
            return
        for i, s in enumerate(left):
            if s.in_dim == w:
                walk(path + [s], left[:i] + left[i + 1:], s.out_dim)

    walk([], list(slots), width)
    return found


def _name_consistent(chain: tuple[LinearSlot, ...]) -> bool:
    """Numbers in same-skeleton names ascend along the chain; an 'out'/'head'-named layer comes last."""
    parts = [_name_parts(s.prefix) for s in chain]
    for i in range(len(chain)):
        for j in range(i + 1, len(chain)):
            if parts[i][0] == parts[j][0] and parts[i][1] > parts[j][1]:
                return False
    last_names = [s.prefix.rsplit(".", 1)[-1] in OUTPUT_NAMES for s in chain]
    return not (sum(last_names) == 1 and not last_names[-1])


def _key_order(ck: Checkpoint, chain: tuple[LinearSlot, ...]) -> bool:
    order = [ck.keys.index(s.weight_key) for s in chain]
    return order == sorted(order)


def _suggest(ck: Checkpoint, chains: list[tuple[LinearSlot, ...]]) -> str:
    ranked = sorted(chains, key=lambda c: not (ck.key_order_kept and _key_order(ck, c)))
    lines = [f"  {i + 1}) " + " -> ".join(s.describe() for s in c) for i, c in enumerate(ranked[:SHOWN_CANDIDATES])]
    if len(ranked) > SHOWN_CANDIDATES:
        lines.append(f"  ... and {len(ranked) - SHOWN_CANDIDATES} more")
    hint = ",".join(s.prefix for s in ranked[0])
    source = " (the checkpoint's key order)" if ck.key_order_kept and _key_order(ck, ranked[0]) else ""
    return "\n".join(lines) + f"\nname the order with --layer-keys, e.g. --layer-keys {hint}{source}"


def find_layout(ck: Checkpoint, n_labels: int, options: ConvertOptions = ConvertOptions()) -> Layout:
    """Locate the table and the Linear chain table width -> ... -> n_labels; refuse ambiguity, never guess."""
    ignored = _ignored(ck, options.ignore_keys)
    live = [k for k in ck.keys if k not in ignored]
    if not any(k in ck.tensors for k in live):
        raise CheckpointError(f"{ck.path}: holds no floating-point tensors (found: "
                              f"{[_tensor_line(ck, k) for k in live] or 'nothing'}); save model.state_dict()")
    not_float = [k for k in live if k not in ck.tensors and len(ck.shapes[k]) == 2]
    if not_float:
        raise CheckpointError(f"{ck.path}: 2-D tensors that are not floating point: "
                              f"{[_tensor_line(ck, k) for k in not_float]}; a table or Linear weight must be float "
                              "(float32, float16, bfloat16 or float64): save the float model's state_dict "
                              "(not a quantised one), or --ignore-key tensors the model does not use")
    slots = _linear_slots(ck, live)
    notes: list[str] = []

    # 1. The table: named, or every 2-D tensor without a bias.
    if options.embedding_key is not None:
        key = _resolve_key(ck, options.embedding_key, "--embedding-key")
        if key in ignored or key not in slots:
            raise CheckpointError(f"{ck.path}: --embedding-key {key!r} is {_tensor_line(ck, key)}, "
                                  "expected a 2-D float tensor (rows x dim) that is not ignored")
        tables = [key]
    else:
        tables = [k for k, s in slots.items() if s.bias_key is None]
        if not tables:
            raise CheckpointError(f"{ck.path}: found no embedding table (a 2-D weight without a bias); 2-D tensors: "
                                  f"{[s.describe() for s in slots.values()] or 'none'}; pass --embedding-key")

    # 2. The chain: named, or every remaining 2-D tensor ordered by shape, then by names.
    solutions: list[tuple[str, list[tuple[LinearSlot, ...]]]] = []
    refusals: list[CheckpointError] = []  # a named chain that does not fit one candidate table
    for table in tables:
        rest = {k: s for k, s in slots.items() if k != table}
        if options.layer_keys is not None:
            try:
                chain = _named_chain(ck, rest, options.layer_keys, ck.shapes[table][1], n_labels)
            except CheckpointError as e:
                refusals.append(e)
                continue
            solutions.append((table, [chain]))
            continue
        chains = _chains(list(rest.values()), ck.shapes[table][1], n_labels, ck.path)
        if chains:
            solutions.append((table, chains))

    if not solutions and refusals:
        raise refusals[0]
    if not solutions:
        raise CheckpointError(_no_chain_message(ck, tables, slots, n_labels))
    if len(solutions) > 1:
        listed = "\n".join(f"  {t}: {_tensor_line(ck, t)}" for t, _ in solutions[:SHOWN_CANDIDATES])
        raise CheckpointError(f"{ck.path}: {len(solutions)} tensors could be the embedding table:\n{listed}\n"
                              "name it with --embedding-key (and leave unused tensors out with --ignore-key)")
    table, chains = solutions[0]
    if len(chains) >= MAX_ORDERINGS:
        raise CheckpointError(f"{ck.path}: {MAX_ORDERINGS} or more orders of the layers fit the shapes; "
                              "name the order with --layer-keys (hidden layers first, output last)")
    if len(chains) == 1 and options.layer_keys is None and not _name_consistent(chains[0]):
        notes.append("the numbers in the layer names disagree with the only order the shapes allow; shapes were used")
    if len(chains) > 1:
        by_name = [c for c in chains if _name_consistent(c)]
        if len(by_name) == 1:
            chains = by_name
            notes.append("layers the shapes could not order were ordered by their names "
                         "(ascending numbers; an out/head/classifier layer last)")
        else:
            shown = by_name or chains
            raise CheckpointError(f"{ck.path}: {len(chains)} orders of the layers fit "
                                  f"{ck.shapes[table][1]} -> ... -> {n_labels} and their names do not settle it:\n"
                                  + _suggest(ck, shown))
    chain = chains[0]
    used = {table} | {s.weight_key for s in chain} | {s.bias_key for s in chain if s.bias_key}
    unused = [k for k in live if k not in used]
    if unused:
        raise CheckpointError(
            f"{ck.path}: tensors with no place in a DAN (table -> Linear layers): "
            f"{[_tensor_line(ck, k) for k in unused]}; layers such as LayerNorm or BatchNorm change the forward "
            "pass and are not supported. If the model does not use them, pass --ignore-key for each")
    for s in chain:
        if s.bias_key is None:
            notes.append(f"{s.weight_key} has no bias: zeros used")
    return Layout(table, chain, tuple(k for k in ck.keys if k in ignored), tuple(notes))


def _named_chain(ck: Checkpoint, rest: dict[str, LinearSlot], names: Sequence[str], width: int, n_out: int):
    chain = []
    for name in names:
        key = _resolve_key(ck, name, "--layer-keys")
        if key not in rest:
            raise CheckpointError(f"{ck.path}: --layer-keys {name!r} is {_tensor_line(ck, key)}, not a Linear weight "
                                  f"apart from the table; candidates: {[s.describe() for s in rest.values()]}")
        chain.append(rest[key])
    if len({s.weight_key for s in chain}) != len(chain):
        raise CheckpointError(f"{ck.path}: --layer-keys names a layer twice: {list(names)}")
    w = width
    for s in chain:
        if s.in_dim != w:
            raise CheckpointError(f"{ck.path}: --layer-keys: {s.describe()} takes width {s.in_dim}, "
                                  f"but the previous step gives {w}")
        w = s.out_dim
    if w != n_out:
        raise CheckpointError(f"{ck.path}: --layer-keys: the last layer gives {w} outputs, "
                              f"but there are {n_out} labels")
    return tuple(chain)


def _no_chain_message(ck: Checkpoint, tables: list[str], slots: dict[str, LinearSlot], n_labels: int) -> str:
    head = f"{ck.path}: no DAN layout uses every tensor: "
    if len(tables) > 1:
        listed = "; ".join(_tensor_line(ck, t) for t in tables)
        return (head + f"{len(tables)} candidate embedding tables ({listed}); name the table with --embedding-key "
                "and leave the others out with --ignore-key")
    table = tables[0]
    width = ck.shapes[table][1]
    layers = [s for k, s in slots.items() if k != table]
    listed = ", ".join(f"{s.weight_key} ({s.in_dim} -> {s.out_dim})" for s in layers) or "none"
    if not layers:
        return head + f"table {table} {ck.shapes[table]} is followed by no Linear layer"
    if not any(s.out_dim == n_labels for s in layers):
        return (head + f"no layer gives {n_labels} outputs, the number of labels (--labels); layers: {listed}. "
                "Check the labels, or the checkpoint")
    if not any(s.in_dim == width for s in layers):
        return head + f"no layer takes the table width {width} (table {table}); layers: {listed}"
    spare = [s for s in layers if s.bias_key is None]  # other tables, or Linear(bias=False)
    if spare and _chains([s for s in layers if s.bias_key is not None], width, n_labels, ck.path):
        return (head + f"tensors with no place in a DAN: {[_tensor_line(ck, s.weight_key) for s in spare]} "
                f"(the layers with biases already chain {width} -> ... -> {n_labels}); "
                "if the model does not use them, pass --ignore-key for each")
    return (head + f"the layers do not chain {width} -> ... -> {n_labels} using each once: {listed}; "
            "pass --layer-keys to name the chain and --ignore-key for tensors the model does not use")


# ---------------------------------------------------------------- vocabulary and labels


def read_vocab_source(path: str | os.PathLike) -> list[str] | dict[str, int]:
    """A vocabulary file: one token per line (line i = row i), or JSON (a token list, or a token -> row map)."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except OSError as e:
        raise CheckpointError(f"{path}: vocabulary cannot be read ({e})") from e
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as e:
        line = data[: e.start].count(b"\n") + 1
        raise CheckpointError(f"{path}: line {line} is not valid UTF-8; save the vocabulary as UTF-8") from e
    if path.suffix.lower() == ".json":
        return _vocab_from_json(path, text)
    lines = text.split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    return [line.removesuffix("\r") for line in lines]


def _vocab_from_json(path: Path, text: str) -> list[str] | dict[str, int]:
    def no_duplicates(pairs):
        seen = set()
        for k, _ in pairs:
            if k in seen:
                raise CheckpointError(f"{path}: the JSON map names token {k!r} twice")
            seen.add(k)
        return dict(pairs)

    obj = load_json_text(text, path, CheckpointError, object_pairs_hook=no_duplicates)
    if isinstance(obj, list):
        bad = [i for i, t in enumerate(obj) if not isinstance(t, str)]
        if bad:
            raise CheckpointError(f"{path}: list item {bad[0]} is {obj[bad[0]]!r}, expected a token string")
        return obj
    if isinstance(obj, dict):
        bad = [k for k, v in obj.items() if not isinstance(v, int) or isinstance(v, bool) or v < 0]
        if bad:
            raise CheckpointError(f"{path}: token {bad[0]!r} maps to {obj[bad[0]]!r}, expected a row number >= 0")
        return obj
    raise CheckpointError(f"{path}: holds a JSON {type(obj).__name__}; expected a list of tokens or a token -> row map")


def read_labels(spec: str) -> tuple[str, ...]:
    """Labels from a file (one per line, or a JSON list) or a comma-separated list, in output order."""
    path = Path(spec)
    if path.is_file():
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as e:
            raise CheckpointError(f"{path}: labels cannot be read as UTF-8 text ({e})") from e
        if path.suffix.lower() == ".json":
            items = load_json_text(text, path, CheckpointError)
            if not isinstance(items, list) or not all(isinstance(x, str) for x in items):
                raise CheckpointError(f"{path}: expected a JSON list of label strings")
        else:
            items = text.splitlines()
            while items and not items[-1].strip():
                items.pop()
        where = str(path)
    elif "," in spec:
        items, where = spec.split(","), f"--labels {spec!r}"
    else:
        raise CheckpointError(f"--labels {spec!r}: no such file, and not a comma-separated list "
                              "(give a file with one label per line, or e.g. neg,neu,pos)")
    labels = [x.strip() for x in items]
    if any(not x for x in labels):
        raise CheckpointError(f"{where}: label {labels.index('') + 1} is empty; every output needs a name")
    dup = [x for x in labels if labels.count(x) > 1]
    if dup:
        raise CheckpointError(f"{where}: label {dup[0]!r} appears more than once")
    if len(labels) < 2:
        raise CheckpointError(f"{where}: found {len(labels)} label, a classifier needs at least 2")
    return tuple(labels)


def align_vocab(source: list[str] | dict[str, int], table: np.ndarray, vocab_path: Path, ck_path: Path,
                padding_row: int | None, detect_padding: bool) -> tuple[list[int], list[str], list[DroppedRow]]:
    """Match vocabulary tokens to table rows and drop the padding row: (kept rows, tokens, dropped)."""
    rows = table.shape[0]
    pad = None
    if padding_row is not None:
        pad = padding_row + rows if padding_row < 0 else padding_row
        if not 0 <= pad < rows:
            raise CheckpointError(f"--padding-row {padding_row} is outside the table's {rows} rows")

    # 1. One token (or None) per table row.
    if isinstance(source, dict):
        per_row: list[str | None] = [None] * rows
        for token, row in source.items():
            if row >= rows:
                raise CheckpointError(f"{vocab_path}: token {token!r} maps to row {row}, but the table "
                                      f"{ck_path.name} has {rows} rows (0..{rows - 1}); vocabulary and table differ")
            if per_row[row] is not None:
                raise CheckpointError(f"{vocab_path}: tokens {per_row[row]!r} and {token!r} both map to row {row}")
            per_row[row] = token
    elif len(source) == rows:
        per_row = list(source)
    elif len(source) == rows - 1 and pad is not None:
        per_row = list(source[:pad]) + [None] + list(source[pad:])
    else:
        zero = [int(r) for r in np.flatnonzero(~table.any(axis=1))][:5]
        hint = (f"; if the table has a padding row that the vocabulary omits, pass --padding-row N "
                f"(all-zero rows: {zero})" if len(source) == rows - 1 else "")
        raise CheckpointError(f"{vocab_path}: has {len(source)} tokens but the embedding table in {ck_path.name} "
                              f"has {rows} rows; line i of the vocabulary must name row i{hint}")

    # 2. The padding row: named, or an all-zero row whose token is a pad token (or missing).
    dropped: list[DroppedRow] = []
    if pad is not None:
        zero = not table[pad].any()
        dropped.append(DroppedRow(pad, per_row[pad], "--padding-row" + ("" if zero else
                                  f" (row is not all zeros: max |x| {float(np.abs(table[pad]).max()):.3g})")))
    elif detect_padding:
        found = [r for r, t in enumerate(per_row) if (t is None or t in PAD_TOKENS) and not table[r].any()]
        if len(found) > 1:
            raise CheckpointError(f"{vocab_path}: rows {found[:8]} all look like padding (all zeros, pad token or no "
                                  "token); name the one padding row with --padding-row N")
        dropped += [DroppedRow(r, per_row[r], "all zeros, " + ("no token" if per_row[r] is None else "pad token"))
                    for r in found]
    gone = {d.row for d in dropped}
    missing = [r for r, t in enumerate(per_row) if t is None and r not in gone]
    if missing:
        raise CheckpointError(f"{vocab_path}: rows {missing[:8]} of the table have no token "
                              "(and are not an all-zero padding row); every kept row needs a token")

    # 3. Kept rows must carry distinct, non-blank tokens.
    kept = [r for r in range(rows) if r not in gone]
    tokens = [per_row[r] for r in kept]
    seen: dict[str, int] = {}
    for r, t in zip(kept, tokens):
        if not t or not t.strip() or "\n" in t:
            raise CheckpointError(f"{vocab_path}: row {r} has the blank or multi-line token {t!r}")
        if t in seen:
            raise CheckpointError(f"{vocab_path}: token {t!r} names rows {seen[t]} and {r}; tokens must be unique")
        seen[t] = r
    if not tokens:
        raise CheckpointError(f"{vocab_path}: no rows left after dropping padding")
    return kept, tokens, dropped


# ---------------------------------------------------------------- conversion


def _check_options(options: ConvertOptions) -> None:
    if options.bag_mode not in BAG_MODES:
        raise CheckpointError(f"--bag-mode {options.bag_mode!r} is not one of {list(BAG_MODES)}")
    if options.bag_mode != "mean":
        raise CheckpointError(f"--bag-mode {options.bag_mode}: this architecture averages token vectors, so an "
                              f"nn.EmbeddingBag(mode={options.bag_mode!r}) model cannot be converted faithfully; "
                              "retrain with mode='mean' (or nn.Embedding with a masked mean)")
    if options.activation is not None and options.activation not in ACTIVATIONS:
        raise CheckpointError(f"--activation {options.activation!r} is not one of {list(ACTIVATIONS)}")
    if options.oov_policy not in ("auto", *OOV_POLICIES):
        raise CheckpointError(f"--oov {options.oov_policy!r} is not one of {['auto', *OOV_POLICIES]}")
    if options.weights_format not in ("npz", "safetensors"):
        raise CheckpointError(f"--weights-format {options.weights_format!r} is not 'npz' or 'safetensors'")


def _check_output_dir(out: Path, overwrite: bool) -> None:
    """Never replace a directory that is not a float model, nor a model unless asked."""
    if not out.exists():
        return
    if not out.is_dir():
        raise CheckpointError(f"{out}: exists and is not a directory; choose another -o")
    entries = sorted(p.name for p in out.iterdir())
    if not entries:
        return
    try:
        is_model = json.loads((out / "dan.json").read_text(encoding="utf-8")).get("format") == FORMAT_NAME
    except (OSError, ValueError, AttributeError):
        is_model = False
    if not is_model:
        raise CheckpointError(f"{out}: exists and is not a danpack model directory (holds {entries[:5]}); "
                              "refusing to replace it: choose a new -o")
    if not overwrite:
        raise CheckpointError(f"{out}: already holds a model; pass --overwrite to replace it")


def build_model(ck: Checkpoint, layout: Layout, kept: list[int], tokens: list[str], labels: tuple[str, ...],
                options: ConvertOptions, dropped: Sequence[DroppedRow] = ()) -> FloatModel:
    """The FloatModel named by a layout: table rows `kept`, Linear stack, labels, tokenizer and OOV policy."""
    table = ck.tensors[layout.embedding_key][kept]  # (rows, D) -> (V, D)
    n_hidden = len(layout.layers) - 1
    if n_hidden and options.activation is None:
        raise CheckpointError(f"{ck.path}: the model has {n_hidden} hidden layer(s) and a state_dict does not record "
                              "their activation; pass --activation relu or --activation tanh")
    layers = []
    for i, s in enumerate(layout.layers):
        w = ck.tensors[s.weight_key]  # (out, in)
        b = ck.tensors[s.bias_key] if s.bias_key else np.zeros(s.out_dim, np.float32)  # (out,)
        layers.append(Layer(w, b, options.activation if i < n_hidden else None))
    for key in [layout.embedding_key, *(k for s in layout.layers for k in (s.weight_key, s.bias_key) if k)]:
        a = ck.tensors[key]
        if not np.isfinite(a).all():
            raise CheckpointError(f"{ck.path}: tensor {key!r} holds NaN or Inf (after conversion from "
                                  f"{ck.dtypes[key]} to float32); retrain or repair the weights")
    policy, unk_token, _ = choose_oov(options, tokens)
    metadata = {
        "converted_from": {
            "file": ck.path.name,
            "kind": "pytorch state_dict" if ck.kind == "torch" else "safetensors",
            "sha256": file_sha256(ck.path),
            "tensors": {ours: key for ours, key, _ in _mapping(ck, layout)},
            "bag_mode": options.bag_mode,
            "dropped_rows": [{"row": d.row, "token": d.token, "reason": d.reason} for d in dropped],
        }
    }
    return FloatModel(tuple(tokens), np.ascontiguousarray(table, np.float32), tuple(layers), labels,
                      options.tokenizer, policy, unk_token, metadata)


def choose_oov(options: ConvertOptions, tokens: Sequence[str]) -> tuple[str, str | None, str]:
    """(policy, unknown-word token, why): the vocabulary decides under "auto"; an explicit choice is checked."""
    from danpack.pipeline import UNK_TOKENS, find_unk_token

    policy, unk = options.oov_policy, options.unk_token
    if policy == "auto" and unk is not None:
        policy = "unk"  # --unk-token alone means: use that row
    if policy == "unk":
        unk = unk or find_unk_token(tokens)
        if unk is None or unk not in tokens:
            raise CheckpointError(f"--oov unk: the unknown-token {unk or UNK_TOKENS[0]!r} is not in the vocabulary; "
                                  "pass --unk-token with the vocabulary's unknown token, or use --oov skip")
        return "unk", unk, f"unk {unk!r} (asked for)"
    if policy == "skip":
        found = find_unk_token(tokens)
        return "skip", None, "skip (asked for)" + (f"; note: the vocabulary has {found!r}, which unknown words "
                                                     "then never use" if found else "")
    found = find_unk_token(tokens)
    if found is not None:
        return "unk", found, (f"unk {found!r}: the vocabulary holds this unknown-word token, so unknown words use "
                              "its row, as in training (pass --oov skip to leave them out of the mean instead)")
    return "skip", None, (f"skip: the vocabulary holds no unknown-word token ({', '.join(UNK_TOKENS[:4])}, ...), "
                          "so unknown words are left out of the mean (pass --oov unk --unk-token T to use a row)")


def _mapping(ck: Checkpoint, layout: Layout) -> list[tuple[str, str, tuple[int, ...]]]:
    out = [("embedding", layout.embedding_key, ck.shapes[layout.embedding_key])]
    for i, s in enumerate(layout.layers):
        name = "output" if i == len(layout.layers) - 1 else f"hidden.{i}"
        out.append((f"{name}.weight", s.weight_key, ck.shapes[s.weight_key]))
        out.append((f"{name}.bias", s.bias_key or "(zeros: no bias)", (s.out_dim,)))
    return out


def convert_checkpoint(checkpoint: str | os.PathLike, vocab: str | os.PathLike, labels: str | Sequence[str],
                       output_dir: str | os.PathLike, options: ConvertOptions = ConvertOptions(),
                       overwrite: bool = False) -> ConversionReport:
    """Read, map, write (atomically) and re-load a PyTorch DAN checkpoint as a float model directory."""
    _check_options(options)
    out = Path(output_dir)
    _check_output_dir(out, overwrite)
    label_tuple = read_labels(labels) if isinstance(labels, str) else tuple(labels)
    ck = read_checkpoint(checkpoint, options.state_key)
    layout = find_layout(ck, len(label_tuple), options)
    vocab_path = Path(vocab)
    kept, tokens, dropped = align_vocab(read_vocab_source(vocab_path), ck.tensors[layout.embedding_key],
                                        vocab_path, ck.path, options.padding_row, options.detect_padding)
    model = build_model(ck, layout, kept, tokens, label_tuple, options, dropped)
    sample = ""
    if options.token_sample is not None:
        from danpack.pipeline import check_token_sample

        sample = check_token_sample(options.token_sample, model, kept, {d.row for d in dropped}).describe()
    warnings = list(layout.notes)
    tokenizer = Tokenizer(options.tokenizer)
    unreachable = [t for t in tokens if not tokenizer.is_reachable(t) and t != model.unk_token]
    if unreachable:
        warnings.append(f"{len(unreachable)} vocabulary token(s) can never come out of the tokenizer, so their rows "
                        f"are never used: {unreachable[:5]}" + (" ..." if len(unreachable) > 5 else ""))
    used = [ck.dtypes[k] for _, k, _ in _mapping(ck, layout) if k in ck.dtypes]
    for dtype in sorted(set(used) - {"float32"}):
        how = "rounded" if dtype == "float64" else "exact"
        warnings.append(f"{used.count(dtype)} tensor(s) were {dtype}; stored as float32 ({how})")

    save_model(model, out, options.weights_format)
    _check_round_trip(model, out)
    size = sum(p.stat().st_size for p in out.iterdir() if p.is_file())
    return ConversionReport(ck, layout, tuple(_mapping(ck, layout)), ck.shapes[layout.embedding_key][0],
                            len(tokens), int(model.embedding.shape[1]), model.hidden_sizes, label_tuple,
                            model.activation, tuple(dropped), tuple(warnings), out, options.weights_format, size,
                            model.tokenizer, choose_oov(options, tokens)[2], sample)


def _check_round_trip(model: FloatModel, out: Path) -> None:
    """Re-load what was written with the one loader and require the same tensors, vocabulary and labels."""
    again = load_model(out)
    same = (again.vocab == model.vocab and again.labels == model.labels
            and np.array_equal(again.embedding, model.embedding) and len(again.layers) == len(model.layers)
            and all(np.array_equal(a.weight, b.weight) and np.array_equal(a.bias, b.bias)
                    and a.activation == b.activation for a, b in zip(again.layers, model.layers)))
    if not same:
        raise CheckpointError(f"{out}: the written model does not read back identical; this is a danpack bug, "
                              "please report it with the checkpoint")
