"""A numpy trainer for deep averaging networks (DAN), with three embedding regimes.

mean of token rows -> hidden layers (relu|tanh) -> logits; softmax cross-entropy; Adam.
Regimes: "random" (table learned from scratch over the training vocabulary), "fixed"
(GloVe rows frozen), "finetune" (GloVe rows updated). The embedding table is updated
sparsely: a step touches only the rows of the tokens in its batch, and their Adam moments
only (the arithmetic of torch.optim.SparseAdam), so a 400,000-row table trains quickly.
Evaluation always goes through `runtime.forward`, the one forward pass the device runs.
"""

from __future__ import annotations

import sys
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field

import numpy as np

from danpack.model import FloatModel
from danpack.runtime.encode import Encoder
from danpack.runtime.errors import DanpackError
from danpack.runtime.forward import ACTIVATIONS, Layer, forward_logits
from danpack.runtime.tokenize import Tokenizer, TokenizerSpec

from .glove import Pretrained, load_glove

REGIMES = ("random", "fixed", "finetune")
UNK_TOKEN = "<unk>"  # not reachable by the tokenizer ("<" and ">" split off), so never a real word


class TrainError(DanpackError):
    """A training request is invalid: bad config value, unknown label, empty data."""


@dataclass(frozen=True)
class TrainConfig:
    """Everything that decides a training run (with the data and the seed, it fixes the bytes)."""

    regime: str = "random"  # "random" | "fixed" (GloVe, frozen) | "finetune" (GloVe, updated)
    embedding_dim: int = 50  # width of the table; GloVe 6B 50d needs 50
    hidden_sizes: tuple[int, ...] = (64,)  # one hidden layer is enough for short comments
    activation: str = "relu"  # "relu" or "tanh" (what runtime.forward supports)
    word_dropout: float = 0.25  # share of tokens dropped from the mean in training (DAN paper: 0.3, from memory)
    lr: float = 0.003  # Adam step size for the layers
    embedding_lr: float | None = None  # Adam step size for the table; None: same as lr
    epochs: int = 30  # upper bound on passes over the training data
    batch_size: int = 64  # comments per step
    patience: int = 4  # stop after this many epochs without a better dev accuracy
    seed: int = 0  # initialisation, shuffling and word dropout
    min_count: int = 2  # a training token enters the vocabulary when seen this often
    init_scale: float = 0.1  # std of new random table rows (random regime; GloVe regimes use GloVe's std)
    oov_policy: str = "skip"  # "skip": unknown tokens leave the mean; "unk": they share an <unk> row
    beta1: float = 0.9  # Adam first-moment decay (common practice)
    beta2: float = 0.999  # Adam second-moment decay (common practice)
    eps: float = 1e-8  # Adam denominator guard (common practice)

    def __post_init__(self) -> None:
        def bad(name: str, expected: str) -> TrainError:
            return TrainError(f"train config field {name!r} is {getattr(self, name)!r}, expected {expected}")

        if self.regime not in REGIMES:
            raise bad("regime", f"one of {REGIMES}")
        if self.activation not in ACTIVATIONS:
            raise bad("activation", f"one of {ACTIVATIONS}")
        if self.oov_policy not in ("skip", "unk"):
            raise bad("oov_policy", "'skip' or 'unk'")
        for name in ("embedding_dim", "epochs", "batch_size", "min_count"):
            value = getattr(self, name)
            if not isinstance(value, int) or isinstance(value, bool) or value < 1:
                raise bad(name, "an integer >= 1")
        if not isinstance(self.patience, int) or self.patience < 0:
            raise bad("patience", "an integer >= 0")
        if isinstance(self.hidden_sizes, list):  # from JSON: keep the config hashable and frozen
            object.__setattr__(self, "hidden_sizes", tuple(self.hidden_sizes))
        if not isinstance(self.hidden_sizes, tuple) or not all(
                isinstance(h, int) and not isinstance(h, bool) and h >= 1 for h in self.hidden_sizes):
            raise bad("hidden_sizes", "a tuple of integers >= 1 (may be empty)")
        if not 0.0 <= self.word_dropout < 1.0:
            raise bad("word_dropout", "a share in [0, 1)")
        for name in ("lr", "init_scale", "eps"):
            if not getattr(self, name) > 0:
                raise bad(name, "a positive number")
        if self.embedding_lr is not None and not self.embedding_lr > 0:
            raise bad("embedding_lr", "a positive number or None")
        for name in ("beta1", "beta2"):
            if not 0.0 <= getattr(self, name) < 1.0:
                raise bad(name, "a number in [0, 1)")

    def to_dict(self) -> dict:
        """Plain JSON-ready fields (for the model's metadata)."""
        d = asdict(self)
        d["hidden_sizes"] = list(self.hidden_sizes)
        return d


# ---- parameters, forward and backward -----------------------------------------------------


@dataclass
class Params:
    """The trainable arrays of a DAN (float32 in training, float64 in gradient checks)."""

    table: np.ndarray  # (V, D)
    weights: list[np.ndarray]  # per layer (out, in); the last one is the output layer
    biases: list[np.ndarray]  # per layer (out,)
    activation: str  # of the hidden layers

    def copy(self) -> "Params":
        """An independent copy (early stopping keeps the best epoch's arrays)."""
        return Params(self.table.copy(), [w.copy() for w in self.weights], [b.copy() for b in self.biases], self.activation)

    def layers(self) -> tuple[Layer, ...]:
        """The layers in `runtime.forward` form (float32)."""
        last = len(self.weights) - 1
        return tuple(Layer(w.astype(np.float32), b.astype(np.float32), None if i == last else self.activation)
                     for i, (w, b) in enumerate(zip(self.weights, self.biases)))


@dataclass
class Grads:
    """Gradients of the mean loss: the table's as (touched rows, their gradients), the layers' dense."""

    rows: np.ndarray  # (U,) int64 distinct row ids touched by the batch
    table_rows: np.ndarray  # (U, D) gradient of those rows
    weights: list[np.ndarray] = field(default_factory=list)
    biases: list[np.ndarray] = field(default_factory=list)

    def dense_table(self, vocab_size: int) -> np.ndarray:
        """The table gradient as a full (V, D) array (for checks)."""
        full = np.zeros((vocab_size, self.table_rows.shape[1]), dtype=self.table_rows.dtype)
        full[self.rows] = self.table_rows
        return full


def mean_weights(counts: np.ndarray, width: int, keep: np.ndarray | None = None) -> np.ndarray:
    """(B,) counts -> (B, T) averaging weights: 1/kept for kept tokens, 0 for padding or dropped."""
    mask = np.arange(width)[None, :] < counts[:, None]  # (B, T)
    if keep is not None:
        mask = mask & keep
    kept = mask.sum(axis=1)  # (B,)
    return mask / np.maximum(kept, 1)[:, None]  # (B, T)


def forward_train(params: Params, ids: np.ndarray, weights: np.ndarray):
    """(B, T) ids, (B, T) averaging weights -> (logits (B, C), cache for the backward pass)."""
    dtype = params.table.dtype
    rows = params.table[ids]  # (B, T) -> (B, T, D)
    x = np.einsum("bt,btd->bd", weights.astype(dtype), rows)  # (B, D): the (masked) mean
    inputs, outputs = [x], []
    last = len(params.weights) - 1
    for i, (w, b) in enumerate(zip(params.weights, params.biases)):
        z = x @ w.T + b  # (B, in) -> (B, out)
        if i < last:
            z = np.maximum(z, 0) if params.activation == "relu" else np.tanh(z)
            inputs.append(z)
        outputs.append(z)
        x = z
    return x, (ids, weights, inputs, outputs)


def softmax_xent(logits: np.ndarray, targets: np.ndarray) -> tuple[float, np.ndarray]:
    """Mean cross-entropy of (B, C) logits against (B,) class ids, and d loss / d logits."""
    shifted = logits - logits.max(axis=1, keepdims=True)  # (B, C)
    log_z = np.log(np.exp(shifted).sum(axis=1, keepdims=True))  # (B, 1)
    log_p = shifted - log_z  # (B, C)
    batch = logits.shape[0]
    loss = -float(log_p[np.arange(batch), targets].mean())
    grad = np.exp(log_p)  # softmax - onehot, over the batch size
    grad[np.arange(batch), targets] -= 1.0
    return loss, grad / batch


def loss_and_grads(params: Params, ids: np.ndarray, weights: np.ndarray, targets: np.ndarray,
                   table_grad: bool = True) -> tuple[float, Grads]:
    """Mean softmax cross-entropy of a batch and its gradients (backpropagation, numbered steps)."""
    logits, (ids, weights, inputs, outputs) = forward_train(params, ids, weights)
    # 1. loss and d loss / d logits
    loss, g = softmax_xent(logits, targets)  # (B, C)
    grads = Grads(np.zeros(0, dtype=np.int64), np.zeros((0, params.table.shape[1]), dtype=params.table.dtype))
    # 2. through the layers, last to first: z = x Wᵀ + b, h = act(z)
    for i in range(len(params.weights) - 1, -1, -1):
        if i < len(params.weights) - 1:  # through the activation of hidden layer i
            h = outputs[i]
            g = g * (h > 0) if params.activation == "relu" else g * (1.0 - h * h)  # (B, out)
        grads.weights.insert(0, g.T @ inputs[i])  # (out, B) @ (B, in) -> (out, in)
        grads.biases.insert(0, g.sum(axis=0))  # (out,)
        g = g @ params.weights[i]  # (B, out) -> (B, in)
    if not table_grad:
        return loss, grads
    # 3. through the mean: row ids[b, t] receives weights[b, t] * g[b]
    used = weights > 0  # (B, T)
    flat_ids = ids[used]  # (N,)
    flat_grads = weights[used][:, None].astype(g.dtype) * g[np.nonzero(used)[0]]  # (N, D)
    rows, where = np.unique(flat_ids, return_inverse=True)  # (U,), (N,)
    table_rows = np.zeros((rows.shape[0], g.shape[1]), dtype=g.dtype)  # (U, D)
    np.add.at(table_rows, where, flat_grads)  # a token seen twice gets both shares
    grads.rows, grads.table_rows = rows.astype(np.int64), table_rows
    return loss, grads


# ---- optimisers ------------------------------------------------------------------------------


class DenseAdam:
    """Adam on dense arrays, step for step the arithmetic of torch.optim.Adam (no weight decay)."""

    def __init__(self, params: list[np.ndarray], lr: float, beta1: float, beta2: float, eps: float) -> None:
        self.lr, self.beta1, self.beta2, self.eps = lr, beta1, beta2, eps
        self.m = [np.zeros_like(p) for p in params]
        self.v = [np.zeros_like(p) for p in params]
        self.t = 0

    def step(self, params: list[np.ndarray], grads: list[np.ndarray]) -> None:
        """Update every array in place from its gradient of the same shape."""
        self.t += 1
        b1, b2 = self.beta1, self.beta2
        step = self.lr / (1 - b1 ** self.t)
        root_c2 = (1 - b2 ** self.t) ** 0.5
        for p, g, m, v in zip(params, grads, self.m, self.v):
            m *= b1
            m += (1 - b1) * g
            v *= b2
            v += (1 - b2) * (g * g)
            p -= step * m / (np.sqrt(v) / root_c2 + self.eps)


class SparseRowAdam:
    """Lazy Adam on table rows, the arithmetic of torch.optim.SparseAdam: only the rows of a
    step's tokens move, and only their moments decay; bias correction uses the global step count."""

    def __init__(self, table: np.ndarray, lr: float, beta1: float, beta2: float, eps: float) -> None:
        self.lr, self.beta1, self.beta2, self.eps = lr, beta1, beta2, eps
        self.m = np.zeros_like(table)  # (V, D)
        self.v = np.zeros_like(table)  # (V, D)
        self.t = 0

    def step(self, table: np.ndarray, rows: np.ndarray, grads: np.ndarray) -> None:
        """Update the (U,) distinct rows in place from their (U, D) gradients."""
        self.t += 1
        if rows.size == 0:
            return
        b1, b2 = self.beta1, self.beta2
        m = self.m[rows] * b1 + (1 - b1) * grads  # (U, D)
        v = self.v[rows] * b2 + (1 - b2) * (grads * grads)  # (U, D)
        self.m[rows], self.v[rows] = m, v
        step = self.lr * (1 - b2 ** self.t) ** 0.5 / (1 - b1 ** self.t)
        table[rows] -= step * m / (np.sqrt(v) + self.eps)


# ---- vocabulary and initialisation ---------------------------------------------------------


def count_tokens(texts: Sequence[str], tokenizer: Tokenizer) -> Counter:
    """How often each token occurs in the texts, through the one tokenizer."""
    counts: Counter = Counter()
    for text in texts:
        counts.update(tokenizer.tokenize(text))
    return counts


def build_vocab(counts: Counter, min_count: int, exclude: set[str] | frozenset = frozenset()) -> list[str]:
    """Tokens seen at least `min_count` times, most frequent first, ties in code-point order."""
    kept = [(-c, t) for t, c in counts.items() if c >= min_count and t not in exclude]
    return [t for _, t in sorted(kept)]


def init_table(config: TrainConfig, texts: Sequence[str], tokenizer: Tokenizer, rng: np.random.Generator,
               pretrained: Pretrained | None) -> tuple[list[str], np.ndarray, str]:
    """(vocabulary, (V, D) float32 table, description) for the regime."""
    counts = count_tokens(texts, tokenizer)
    if config.regime == "random":
        vocab = build_vocab(counts, config.min_count)
        if config.oov_policy == "unk":
            vocab.append(UNK_TOKEN)
        table = rng.normal(0.0, config.init_scale, (len(vocab), config.embedding_dim))  # (V, D)
        return vocab, table.astype(np.float32), f"training tokens seen >= {config.min_count} times"
    if pretrained.vectors.shape[1] != config.embedding_dim:
        raise TrainError(f"train config field 'embedding_dim' is {config.embedding_dim}, but {pretrained.name} "
                         f"vectors are {pretrained.vectors.shape[1]} wide; set embedding_dim to match")
    known = set(pretrained.tokens)
    extra = build_vocab(counts, config.min_count, exclude=known)
    if config.oov_policy == "unk" and UNK_TOKEN not in known:
        extra.append(UNK_TOKEN)
    scale = float(pretrained.vectors.std())  # new rows look like pretrained ones in size
    new_rows = rng.normal(0.0, scale, (len(extra), config.embedding_dim)).astype(np.float32)  # (E, D)
    table = np.concatenate([pretrained.vectors, new_rows], axis=0)  # (V + E, D)
    what = f"{pretrained.name} ({len(known)} rows) + {len(extra)} training tokens it lacks (seen >= {config.min_count} times)"
    return list(pretrained.tokens) + extra, table, what


def init_layers(config: TrainConfig, n_labels: int, rng: np.random.Generator) -> tuple[list, list]:
    """Glorot-uniform weights (He-uniform for relu) and zero biases (common practice)."""
    sizes = [config.embedding_dim, *config.hidden_sizes, n_labels]
    weights, biases = [], []
    for i, (fan_in, fan_out) in enumerate(zip(sizes[:-1], sizes[1:])):
        hidden = i < len(config.hidden_sizes)
        limit = np.sqrt(6.0 / fan_in) if hidden and config.activation == "relu" else np.sqrt(6.0 / (fan_in + fan_out))
        weights.append(rng.uniform(-limit, limit, (fan_out, fan_in)).astype(np.float32))  # (out, in)
        biases.append(np.zeros(fan_out, dtype=np.float32))
    return weights, biases


# ---- training -----------------------------------------------------------------------------


def label_ids(records: Sequence[dict], labels: Sequence[str], what: str) -> np.ndarray:
    """(N,) class ids of records; an unknown label is a TrainError naming the record."""
    index = {label: i for i, label in enumerate(labels)}
    out = np.empty(len(records), dtype=np.int64)
    for n, record in enumerate(records):
        label = record.get("label")
        if label not in index:
            raise TrainError(f"{what} record {record.get('id', n)!r} has label {label!r}, expected one of {list(labels)}")
        out[n] = index[label]
    return out


def accuracy(logits: np.ndarray, targets: np.ndarray) -> float:
    """Share of (B, C) logits whose argmax is the (B,) target."""
    return float((logits.argmax(axis=1) == targets).mean()) if len(targets) else 0.0


def evaluate(model: FloatModel, records: Sequence[dict]) -> float:
    """Accuracy of a model on labelled records, through the runtime's forward pass."""
    targets = label_ids(records, model.labels, "evaluation")
    return accuracy(model.predict_logits([r["text"] for r in records]), targets)


def _batch_weights(counts: np.ndarray, width: int, dropout: float, rng: np.random.Generator) -> np.ndarray:
    """(B,) counts -> (B, T) averaging weights with word dropout; a comment never loses every token."""
    if dropout == 0.0:
        return mean_weights(counts, width)
    valid = np.arange(width)[None, :] < counts[:, None]  # (B, T)
    keep = valid & (rng.random((counts.shape[0], width)) >= dropout)  # (B, T)
    emptied = ~keep.any(axis=1)
    keep[emptied] = valid[emptied]
    return mean_weights(counts, width, keep)


def train_model(
    config: TrainConfig,
    train: Sequence[dict],
    dev: Sequence[dict],
    labels: Sequence[str],
    pretrained: Pretrained | None = None,
    log: Callable[[str], None] | None = None,
) -> FloatModel:
    """Train a DAN on {"text", "label"} records; the returned model holds the best-dev-accuracy weights."""
    log = log or (lambda msg: print(msg, file=sys.stderr))
    if not train or not dev:
        raise TrainError(f"training needs non-empty train and dev records, found {len(train)} and {len(dev)}")
    labels = tuple(labels)
    y_train, y_dev = label_ids(train, labels, "train"), label_ids(dev, labels, "dev")
    if config.regime != "random" and pretrained is None:
        pretrained = load_glove()
    rng = np.random.default_rng(config.seed)
    tokenizer = Tokenizer(TokenizerSpec())

    # 1. vocabulary, table and layers
    texts = [r["text"] for r in train]
    vocab, table, vocab_source = init_table(config, texts, tokenizer, rng, pretrained)
    weights, biases = init_layers(config, len(labels), rng)
    params = Params(table, weights, biases, config.activation)
    oov_id = vocab.index(UNK_TOKEN) if config.oov_policy == "unk" else None
    encoder = Encoder(tokenizer, vocab, oov_id)
    ids_train, counts_train = encoder.encode(texts)  # (N, T), (N,)
    ids_dev, counts_dev = encoder.encode([r["text"] for r in dev])
    log(f"{config.regime}: {len(vocab)} rows ({vocab_source}), {len(train)} train / {len(dev)} dev comments")

    # 2. optimisers: dense Adam for the layers, lazy row Adam for the table
    layer_opt = DenseAdam(params.weights + params.biases, config.lr, config.beta1, config.beta2, config.eps)
    learn_table = config.regime != "fixed"
    table_opt = SparseRowAdam(params.table, config.embedding_lr or config.lr, config.beta1, config.beta2,
                              config.eps) if learn_table else None

    # 3. epochs with early stopping on dev accuracy
    best, best_acc, best_epoch, history = params.copy(), -1.0, 0, []
    n = len(train)
    for epoch in range(1, config.epochs + 1):
        order = rng.permutation(n)
        total = 0.0
        for start in range(0, n, config.batch_size):
            idx = order[start : start + config.batch_size]
            counts = counts_train[idx]  # (B,)
            width = max(int(counts.max()), 1)
            ids = ids_train[idx, :width]  # (B, T)
            w = _batch_weights(counts, width, config.word_dropout, rng)  # (B, T)
            loss, grads = loss_and_grads(params, ids, w, y_train[idx], table_grad=learn_table)
            layer_opt.step(params.weights + params.biases, grads.weights + grads.biases)
            if table_opt is not None:
                table_opt.step(params.table, grads.rows, grads.table_rows)
            total += loss * len(idx)
        dev_acc = accuracy(forward_logits(params.table, params.layers(), ids_dev, counts_dev), y_dev)
        history.append(round(dev_acc, 6))
        log(f"epoch {epoch:2d}  train loss {total / n:.4f}  dev accuracy {dev_acc:.4f}")
        if dev_acc > best_acc:
            best, best_acc, best_epoch = params.copy(), dev_acc, epoch
        elif epoch - best_epoch >= config.patience:
            break

    metadata = {
        "trainer": config.to_dict(),
        "seed": config.seed,
        "vocab_source": vocab_source,
        "train_comments": len(train),
        "dev_comments": len(dev),
        "best_epoch": best_epoch,
        "epochs_run": len(history),
        "dev_accuracy_history": history,
        "dev_accuracy": round(best_acc, 6),
    }
    return FloatModel(tuple(vocab), best.table.astype(np.float32), best.layers(), labels, tokenizer.spec,
                      config.oov_policy, UNK_TOKEN if oov_id is not None else None, metadata)
