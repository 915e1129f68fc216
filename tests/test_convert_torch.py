"""`danpack convert-torch`, checked against PyTorch itself: real nn.EmbeddingBag / nn.Embedding + nn.Linear
modules are saved, converted, and their own outputs must equal our numpy forward pass (1e-5)."""

from __future__ import annotations

import json
import sys

import numpy as np
import pytest

torch = pytest.importorskip("torch")
nn = torch.nn

from danpack.cli import app  # noqa: E402
from danpack.model import load_model  # noqa: E402
from danpack.convert.from_torch import CheckpointError, ConvertOptions, convert_checkpoint, read_labels  # noqa: E402
from danpack.runtime.tokenize import Tokenizer  # noqa: E402

LABELS = ("broken", "slow", "fine")
SCENARIO = ["charger", "cable", "screen", "queue", "card", "plug", "fast", "slow", "broken", "paid", "bay",
            "socket", "app", "error", "waited", "again", "works", "great", "cold", "dark"]
SYLLABLES = ["ka", "lo", "mi", "ne", "ru", "so", "ta", "vi", "ze", "po", "du", "fe"]
ATOL = 1e-5  # the brief's tolerance between PyTorch's float32 output and ours


def make_words(n: int) -> list[str]:
    """n distinct lowercase words the default tokenizer keeps whole (scenario words, then invented ones)."""
    words = list(SCENARIO)
    for a in SYLLABLES:
        for b in SYLLABLES:
            words.append(a + b)
    return words[:n]


def make_texts(words: list[str], n: int, seed: int, empty: bool = True) -> list[str]:
    rng = np.random.default_rng(seed)
    texts = [" ".join(rng.choice(words, size=int(rng.integers(1, 12)))) for _ in range(n)]
    return ([""] if empty else []) + texts


def token_rows(texts: list[str], torch_vocab: list[str], unk: int | None = None) -> list[list[int]]:
    """Rows of the PyTorch table for each text, split by the one tokenizer (unknown -> `unk` or left out)."""
    index = {t: i for i, t in enumerate(torch_vocab)}
    tok = Tokenizer()
    rows = []
    for text in texts:
        ids = [index.get(t, unk) for t in tok.tokenize(text)]
        rows.append([i for i in ids if i is not None])
    return rows


def mlp(width: int, hidden: list[int], n_out: int, act) -> nn.Sequential:
    layers: list[nn.Module] = []
    for h in hidden:
        layers += [nn.Linear(width, h), act()]
        width = h
    return nn.Sequential(*layers, nn.Linear(width, n_out))


class BagDAN(nn.Module):
    """nn.EmbeddingBag(mode='mean') -> Linear stack; keys bag.weight, mlp.0.weight, mlp.0.bias, ..."""

    def __init__(self, rows, dim, hidden, n_out, act=nn.ReLU, padding_idx=None):
        super().__init__()
        self.bag = nn.EmbeddingBag(rows, dim, mode="mean", padding_idx=padding_idx)
        self.mlp = mlp(dim, hidden, n_out, act)

    def forward(self, id_lists):
        flat = torch.tensor([i for ids in id_lists for i in ids], dtype=torch.long)
        offsets = torch.tensor(np.cumsum([0] + [len(x) for x in id_lists[:-1]]), dtype=torch.long)
        return self.mlp(self.bag(flat, offsets))


class EmbedMeanDAN(nn.Module):
    """nn.Embedding(padding_idx=0) -> masked mean over non-pad positions -> fc1 -> fc2 -> out."""

    def __init__(self, rows, dim, hidden, n_out, act=nn.Tanh):
        super().__init__()
        self.emb = nn.Embedding(rows, dim, padding_idx=0)
        self.fc1 = nn.Linear(dim, hidden)
        self.fc2 = nn.Linear(hidden, hidden)
        self.out = nn.Linear(hidden, n_out)
        self.act = act()

    def forward(self, id_lists):
        width = max(1, max(len(x) for x in id_lists))
        ids = torch.zeros(len(id_lists), width, dtype=torch.long)  # (B, T), 0 = padding
        for r, x in enumerate(id_lists):
            ids[r, : len(x)] = torch.tensor(x, dtype=torch.long)
        mask = (ids != 0).float()  # (B, T)
        mean = (self.emb(ids) * mask[..., None]).sum(1) / mask.sum(1, keepdim=True).clamp(min=1)  # (B, D)
        return self.out(self.act(self.fc2(self.act(self.fc1(mean)))))


def torch_logits(module: nn.Module, id_lists: list[list[int]]) -> np.ndarray:
    with torch.no_grad():
        return module(id_lists).numpy()


def write_lines(path, items) -> str:
    path.write_text("".join(f"{x}\n" for x in items), encoding="utf-8")
    return str(path)


def save_state(module: nn.Module, path) -> str:
    torch.save(module.state_dict(), path)
    return str(path)


# ---------------------------------------------------------------- agreement with PyTorch


@pytest.mark.parametrize("act,name", [(nn.ReLU, "relu"), (nn.Tanh, "tanh")])
@pytest.mark.parametrize("hidden", [[32], [24, 24, 24]])
def test_embedding_bag_dan_matches_pytorch(tmp_path, act, name, hidden):
    torch.manual_seed(len(hidden) * 10 + len(name))
    words = make_words(60)
    module = BagDAN(len(words), 16, hidden, len(LABELS), act).eval()
    ckpt = save_state(module, tmp_path / "dan.pt")
    report = convert_checkpoint(ckpt, write_lines(tmp_path / "tokens.txt", words), list(LABELS), tmp_path / "m",
                                ConvertOptions(activation=name))
    # three equal 24x24 layers can only be ordered by the numbers in mlp.2 / mlp.4
    assert [s.weight_key for s in report.layout.layers] == [f"mlp.{2 * i}.weight" for i in range(len(hidden) + 1)]
    model = load_model(tmp_path / "m")
    assert model.hidden_sizes == tuple(hidden) and model.activation == name and model.vocab == tuple(words)
    texts = make_texts(words, 40, seed=1)  # includes "": PyTorch fills empty bags with zeros, as we do
    # PyTorch's own module output is the reference (nn.EmbeddingBag mean + nn.Linear + activation)
    expected = torch_logits(module, token_rows(texts, words))
    np.testing.assert_allclose(model.predict_logits(texts), expected, atol=ATOL, rtol=0)


def test_embedding_masked_mean_drops_pad_row_and_matches_pytorch(tmp_path):
    torch.manual_seed(3)
    words = ["<pad>"] + make_words(50)
    module = EmbedMeanDAN(len(words), 12, 20, len(LABELS)).eval()
    report = convert_checkpoint(save_state(module, tmp_path / "dan.pt"), write_lines(tmp_path / "v.txt", words),
                                list(LABELS), tmp_path / "m", ConvertOptions(activation="tanh"))
    # nn.Embedding(padding_idx=0) initialises row 0 to zeros (PyTorch docs); '<pad>' is a pad token
    assert [(d.row, d.token) for d in report.dropped] == [(0, "<pad>")]
    assert report.table_rows == 51 and report.vocab_size == 50
    assert [s.weight_key for s in report.layout.layers] == ["fc1.weight", "fc2.weight", "out.weight"]
    model = load_model(tmp_path / "m")
    assert "<pad>" not in model.vocab and model.vocab == tuple(words[1:])
    texts = make_texts(words[1:], 30, seed=2)
    expected = torch_logits(module, token_rows(texts, words))
    np.testing.assert_allclose(model.predict_logits(texts), expected, atol=ATOL, rtol=0)


def test_padding_row_missing_from_vocabulary(tmp_path):
    torch.manual_seed(4)
    words = make_words(40)
    module = BagDAN(len(words) + 1, 8, [16], len(LABELS), padding_idx=5).eval()
    torch_vocab = words[:5] + ["(pad)"] + words[5:]  # what row i means to the PyTorch model
    ckpt, vocab = save_state(module, tmp_path / "dan.pt"), write_lines(tmp_path / "v.txt", words)
    with pytest.raises(CheckpointError, match=r"has 40 tokens but .* 41 rows.*--padding-row N \(all-zero rows: \[5\]\)"):
        convert_checkpoint(ckpt, vocab, list(LABELS), tmp_path / "m", ConvertOptions(activation="relu"))
    report = convert_checkpoint(ckpt, vocab, list(LABELS), tmp_path / "m",
                                ConvertOptions(activation="relu", padding_row=5))
    assert [(d.row, d.token, d.reason) for d in report.dropped] == [(5, None, "--padding-row")]
    texts = make_texts(words, 30, seed=5)
    # nn.EmbeddingBag leaves padding_idx out of the mean (PyTorch docs); our texts never reach row 5
    expected = torch_logits(module, token_rows(texts, torch_vocab))
    np.testing.assert_allclose(load_model(tmp_path / "m").predict_logits(texts), expected, atol=ATOL, rtol=0)


def test_padding_detection_needs_zero_row_and_pad_token(tmp_path):
    words = ["<pad>", "zero"] + make_words(10)
    sd = {"emb.weight": torch.randn(12, 4), "out.weight": torch.randn(3, 4), "out.bias": torch.randn(3)}
    sd["emb.weight"][1] = 0  # all-zero row with an ordinary token: kept
    ckpt, vocab = str(tmp_path / "a.pt"), write_lines(tmp_path / "v.txt", words)
    torch.save(sd, ckpt)
    report = convert_checkpoint(ckpt, vocab, list(LABELS), tmp_path / "m1")
    assert report.dropped == () and load_model(tmp_path / "m1").vocab == tuple(words)  # '<pad>' row is not zero
    report = convert_checkpoint(ckpt, vocab, list(LABELS), tmp_path / "m2", ConvertOptions(padding_row=-12))
    assert [(d.row, d.token) for d in report.dropped] == [(0, "<pad>")] and "not all zeros" in report.dropped[0].reason
    sd["emb.weight"][0] = 0
    torch.save(sd, ckpt)
    assert [d.row for d in convert_checkpoint(ckpt, vocab, list(LABELS), tmp_path / "m3").dropped] == [0]
    report = convert_checkpoint(ckpt, vocab, list(LABELS), tmp_path / "m4", ConvertOptions(detect_padding=False))
    assert report.dropped == () and report.vocab_size == 12


def test_json_vocabularies(tmp_path):
    words = make_words(10)
    sd = {"emb.weight": torch.randn(11, 4), "out.weight": torch.randn(3, 4), "out.bias": torch.randn(3)}
    sd["emb.weight"][0] = 0
    ckpt = str(tmp_path / "a.pt")
    torch.save(sd, ckpt)
    (tmp_path / "map.json").write_text(json.dumps({w: i + 1 for i, w in enumerate(words)}))  # word2idx from 1
    report = convert_checkpoint(ckpt, tmp_path / "map.json", list(LABELS), tmp_path / "m")
    assert [(d.row, d.token) for d in report.dropped] == [(0, None)]
    model = load_model(tmp_path / "m")
    assert model.vocab == tuple(words)
    np.testing.assert_array_equal(model.embedding, sd["emb.weight"][1:].numpy())
    (tmp_path / "list.json").write_text(json.dumps(["<pad>"] + words))
    assert convert_checkpoint(ckpt, tmp_path / "list.json", list(LABELS), tmp_path / "m2").vocab_size == 10
    (tmp_path / "dup.json").write_text('{"a": 1, "a": 2}')
    with pytest.raises(CheckpointError, match="names token 'a' twice"):
        convert_checkpoint(ckpt, tmp_path / "dup.json", list(LABELS), tmp_path / "m3")
    (tmp_path / "far.json").write_text(json.dumps({"a": 11}))
    with pytest.raises(CheckpointError, match="maps to row 11, but the table a.pt has 11 rows"):
        convert_checkpoint(ckpt, tmp_path / "far.json", list(LABELS), tmp_path / "m3")


def test_vocab_size_mismatch_is_clear(tmp_path):
    sd = BagDAN(30, 4, [], 3).state_dict()
    torch.save(sd, tmp_path / "a.pt")
    with pytest.raises(CheckpointError, match=r"v.txt: has 25 tokens but the embedding table in a.pt has 30 rows"):
        convert_checkpoint(tmp_path / "a.pt", write_lines(tmp_path / "v.txt", make_words(25)), list(LABELS),
                           tmp_path / "m")
    assert not (tmp_path / "m").exists()


def test_float16_weights(tmp_path):
    torch.manual_seed(6)
    words = make_words(40)
    module = BagDAN(len(words), 8, [16], len(LABELS)).half()
    report = convert_checkpoint(save_state(module, tmp_path / "h.pt"), write_lines(tmp_path / "v.txt", words),
                                list(LABELS), tmp_path / "m", ConvertOptions(activation="relu"))
    assert set(report.checkpoint.dtypes.values()) == {"float16"}
    assert any("float16; stored as float32 (exact)" in w for w in report.warnings)
    model = load_model(tmp_path / "m")
    # float16 -> float32 is exact: the stored table equals PyTorch's own widening
    np.testing.assert_array_equal(model.embedding, module.bag.weight.detach().float().numpy())
    texts = make_texts(words, 20, seed=7)
    expected = torch_logits(module.float().eval(), token_rows(texts, words))
    np.testing.assert_allclose(model.predict_logits(texts), expected, atol=ATOL, rtol=0)


def test_oov_unk_row_matches_pytorch(tmp_path):
    torch.manual_seed(8)
    words = make_words(30) + ["<unk>"]
    module = BagDAN(len(words), 8, [12], len(LABELS), nn.Tanh).eval()
    convert_checkpoint(save_state(module, tmp_path / "a.pt"), write_lines(tmp_path / "v.txt", words), list(LABELS),
                       tmp_path / "m", ConvertOptions(activation="tanh", oov_policy="unk"))
    model = load_model(tmp_path / "m")
    assert model.oov_policy == "unk" and model.unk_token == "<unk>"
    texts = [t + " zzzq wxyq" for t in make_texts(words[:30], 10, seed=9)]  # two unknown words each
    expected = torch_logits(module, token_rows(texts, words, unk=len(words) - 1))
    np.testing.assert_allclose(model.predict_logits(texts), expected, atol=ATOL, rtol=0)
    with pytest.raises(CheckpointError, match="unknown-token '<oov>' is not in the vocabulary"):
        convert_checkpoint(tmp_path / "a.pt", tmp_path / "v.txt", list(LABELS), tmp_path / "m2",
                           ConvertOptions(activation="tanh", oov_policy="unk", unk_token="<oov>"))


# ---------------------------------------------------------------- ambiguous layouts


class TwoTables(nn.Module):
    def __init__(self):
        super().__init__()
        self.words = nn.EmbeddingBag(20, 6, mode="mean")
        self.chars = nn.EmbeddingBag(20, 6, mode="mean")  # an experiment left in the module, unused
        self.head = nn.Linear(6, 3)

    def forward(self, id_lists):
        flat = torch.tensor([i for ids in id_lists for i in ids], dtype=torch.long)
        offsets = torch.tensor(np.cumsum([0] + [len(x) for x in id_lists[:-1]]), dtype=torch.long)
        return self.head(self.words(flat, offsets))


def test_two_candidate_tables_are_listed_then_named(tmp_path):
    torch.manual_seed(10)
    words = make_words(20)
    module = TwoTables().eval()
    ckpt, vocab = save_state(module, tmp_path / "a.pt"), write_lines(tmp_path / "v.txt", words)
    with pytest.raises(CheckpointError) as e:
        convert_checkpoint(ckpt, vocab, list(LABELS), tmp_path / "m")
    assert "2 candidate embedding tables" in str(e.value)
    assert "words.weight (20, 6) float32" in str(e.value) and "chars.weight (20, 6) float32" in str(e.value)
    assert "--embedding-key" in str(e.value)
    with pytest.raises(CheckpointError, match=r"tensors with no place .*chars.weight.*--ignore-key"):
        convert_checkpoint(ckpt, vocab, list(LABELS), tmp_path / "m", ConvertOptions(embedding_key="words"))
    report = convert_checkpoint(ckpt, vocab, list(LABELS), tmp_path / "m",
                                ConvertOptions(embedding_key="words", ignore_keys=("chars",)))
    assert report.layout.embedding_key == "words.weight" and report.layout.ignored == ("chars.weight",)
    report = convert_checkpoint(ckpt, vocab, list(LABELS), tmp_path / "m2",
                                ConvertOptions(layer_keys=("head",), ignore_keys=("chars",)))
    assert report.layout.embedding_key == "words.weight"
    texts = make_texts(words, 20, seed=11)
    expected = torch_logits(module, token_rows(texts, words))
    np.testing.assert_allclose(load_model(tmp_path / "m").predict_logits(texts), expected, atol=ATOL, rtol=0)


def test_table_or_bias_free_linear_is_ambiguous(tmp_path):
    # a 6-row table and an nn.Linear(6, 6, bias=False): either could be the table, both chain 6 -> 3
    sd = {"a.weight": torch.randn(6, 6), "b.weight": torch.randn(6, 6), "head.weight": torch.randn(3, 6),
          "head.bias": torch.randn(3)}
    torch.save(sd, tmp_path / "a.pt")
    vocab = write_lines(tmp_path / "v.txt", make_words(6))
    with pytest.raises(CheckpointError, match=r"2 tensors could be the embedding table:\n  a.weight: .*\n  b.weight"):
        convert_checkpoint(tmp_path / "a.pt", vocab, list(LABELS), tmp_path / "m", ConvertOptions(activation="relu"))
    report = convert_checkpoint(tmp_path / "a.pt", vocab, list(LABELS), tmp_path / "m",
                                ConvertOptions(activation="relu", embedding_key="a.weight"))
    assert [s.weight_key for s in report.layout.layers] == ["b.weight", "head.weight"]
    assert "b.weight has no bias: zeros used" in report.warnings
    np.testing.assert_array_equal(load_model(tmp_path / "m").layers[0].bias, np.zeros(6, np.float32))
    report = convert_checkpoint(tmp_path / "a.pt", vocab, list(LABELS), tmp_path / "m2",
                                ConvertOptions(activation="relu", layer_keys=("b", "head")))  # naming b leaves a
    assert report.layout.embedding_key == "a.weight"


class SquareStack(nn.Module):
    """Table width 8 = hidden width 8, names without numbers: proj and mix cannot be ordered by shape or name."""

    def __init__(self):
        super().__init__()
        self.emb = nn.EmbeddingBag(20, 8, mode="mean")
        self.proj = nn.Linear(8, 8)
        self.mix = nn.Linear(8, 8)
        self.head = nn.Linear(8, 3)

    def forward(self, id_lists):
        flat = torch.tensor([i for ids in id_lists for i in ids], dtype=torch.long)
        offsets = torch.tensor(np.cumsum([0] + [len(x) for x in id_lists[:-1]]), dtype=torch.long)
        return self.head(torch.relu(self.mix(torch.relu(self.proj(self.emb(flat, offsets))))))


def test_layer_order_ambiguity_is_listed_then_named(tmp_path):
    torch.manual_seed(12)
    words = make_words(20)
    module = SquareStack().eval()
    ckpt, vocab = save_state(module, tmp_path / "a.pt"), write_lines(tmp_path / "v.txt", words)
    with pytest.raises(CheckpointError) as e:
        convert_checkpoint(ckpt, vocab, list(LABELS), tmp_path / "m", ConvertOptions(activation="relu"))
    msg = str(e.value)
    assert "2 orders of the layers fit 8 -> ... -> 3" in msg
    assert "1) proj.weight (8x8) -> mix.weight (8x8) -> head.weight (3x8)" in msg
    assert "2) mix.weight (8x8) -> proj.weight (8x8) -> head.weight (3x8)" in msg
    assert "--layer-keys proj,mix,head (the checkpoint's key order)" in msg
    with pytest.raises(CheckpointError, match="takes width 8, but the previous step gives 3"):
        convert_checkpoint(ckpt, vocab, list(LABELS), tmp_path / "m",
                           ConvertOptions(activation="relu", layer_keys=("head", "proj", "mix")))
    convert_checkpoint(ckpt, vocab, list(LABELS), tmp_path / "m",
                       ConvertOptions(activation="relu", layer_keys=("proj", "mix", "head")))
    texts = make_texts(words, 20, seed=13)
    expected = torch_logits(module, token_rows(texts, words))
    np.testing.assert_allclose(load_model(tmp_path / "m").predict_logits(texts), expected, atol=ATOL, rtol=0)


class NarrowStack(nn.Module):
    """Hidden width = label count (3): 'mix' and 'classifier' are both 3x3; the name puts the classifier last."""

    def __init__(self):
        super().__init__()
        self.emb = nn.EmbeddingBag(20, 8, mode="mean")
        self.mix = nn.Linear(3, 3)
        self.classifier = nn.Linear(3, 3)
        self.fc = nn.Linear(8, 3)

    def forward(self, id_lists):
        flat = torch.tensor([i for ids in id_lists for i in ids], dtype=torch.long)
        offsets = torch.tensor(np.cumsum([0] + [len(x) for x in id_lists[:-1]]), dtype=torch.long)
        return self.classifier(torch.tanh(self.mix(torch.tanh(self.fc(self.emb(flat, offsets))))))


def test_classifier_name_settles_the_last_layer(tmp_path):
    torch.manual_seed(17)
    words = make_words(20)
    module = NarrowStack().eval()
    report = convert_checkpoint(save_state(module, tmp_path / "a.pt"), write_lines(tmp_path / "v.txt", words),
                                list(LABELS), tmp_path / "m", ConvertOptions(activation="tanh"))
    assert [s.prefix for s in report.layout.layers] == ["fc", "mix", "classifier"]
    assert any("ordered by their names" in w for w in report.warnings)
    texts = make_texts(words, 20, seed=18)
    expected = torch_logits(module, token_rows(texts, words))
    np.testing.assert_allclose(load_model(tmp_path / "m").predict_logits(texts), expected, atol=ATOL, rtol=0)


def test_unsupported_layers_are_refused(tmp_path):
    sd = {"emb.weight": torch.randn(10, 4), "norm.weight": torch.ones(4), "norm.bias": torch.zeros(4),
          "out.weight": torch.randn(3, 4), "out.bias": torch.randn(3)}
    torch.save(sd, tmp_path / "a.pt")
    with pytest.raises(CheckpointError, match=r"no place in a DAN.*norm.weight \(4,\) float32.*LayerNorm"):
        convert_checkpoint(tmp_path / "a.pt", write_lines(tmp_path / "v.txt", make_words(10)), list(LABELS),
                           tmp_path / "m")


def test_integer_table_is_refused(tmp_path):
    torch.save({"emb.weight": torch.zeros(10, 4, dtype=torch.long), "out.weight": torch.randn(3, 4)}, tmp_path / "a.pt")
    with pytest.raises(CheckpointError, match=r"not floating point: \['emb.weight \(10, 4\) int64'\]"):
        convert_checkpoint(tmp_path / "a.pt", write_lines(tmp_path / "v.txt", make_words(10)), list(LABELS),
                           tmp_path / "m")


def test_label_count_must_match_output(tmp_path):
    torch.save(BagDAN(10, 4, [6], 3).state_dict(), tmp_path / "a.pt")
    with pytest.raises(CheckpointError, match="no layer gives 4 outputs, the number of labels"):
        convert_checkpoint(tmp_path / "a.pt", write_lines(tmp_path / "v.txt", make_words(10)), ["a", "b", "c", "d"],
                           tmp_path / "m", ConvertOptions(activation="relu"))


def test_activation_and_bag_mode(tmp_path):
    torch.save(BagDAN(10, 4, [6], 3).state_dict(), tmp_path / "a.pt")
    vocab = write_lines(tmp_path / "v.txt", make_words(10))
    with pytest.raises(CheckpointError, match="does not record their activation; pass --activation relu"):
        convert_checkpoint(tmp_path / "a.pt", vocab, list(LABELS), tmp_path / "m")
    for mode in ("sum", "max"):
        with pytest.raises(CheckpointError, match=f"mode='{mode}'.* cannot be converted faithfully"):
            convert_checkpoint(tmp_path / "a.pt", vocab, list(LABELS), tmp_path / "m",
                               ConvertOptions(activation="relu", bag_mode=mode))


# ---------------------------------------------------------------- files that are not weights


def test_pickled_full_module_is_refused(tmp_path):
    torch.save(BagDAN(10, 4, [], 3), tmp_path / "full.pt")  # the module object itself, not its state_dict
    # PyTorch's weights-only unpickler refuses the module's class (torch.load docs); we must pass that on
    with pytest.raises(CheckpointError, match=r"class .*BagDAN, not only weights.*Save model.state_dict\(\), not the model"):
        convert_checkpoint(tmp_path / "full.pt", write_lines(tmp_path / "v.txt", make_words(10)), list(LABELS),
                           tmp_path / "m")


def test_optimizer_state_is_refused(tmp_path):
    module = BagDAN(10, 4, [], 3)
    opt = torch.optim.Adam(module.parameters())
    module([[1, 2]]).sum().backward()
    opt.step()
    torch.save(opt.state_dict(), tmp_path / "opt.pt")  # PyTorch's layout: {"state": ..., "param_groups": [...]}
    with pytest.raises(CheckpointError, match=r"optimizer state .*save model.state_dict\(\), not optimizer"):
        convert_checkpoint(tmp_path / "opt.pt", write_lines(tmp_path / "v.txt", make_words(10)), list(LABELS),
                           tmp_path / "m")


def test_training_checkpoint_needs_state_key(tmp_path):
    module = BagDAN(10, 4, [], 3)
    torch.save({"epoch": 3, "model_state_dict": module.state_dict(), "lr": 0.1}, tmp_path / "ck.pt")
    vocab = write_lines(tmp_path / "v.txt", make_words(10))
    with pytest.raises(CheckpointError, match="training checkpoint .*'epoch' \\(int\\).*--state-key model_state_dict"):
        convert_checkpoint(tmp_path / "ck.pt", vocab, list(LABELS), tmp_path / "m")
    report = convert_checkpoint(tmp_path / "ck.pt", vocab, list(LABELS), tmp_path / "m",
                                ConvertOptions(state_key="model_state_dict"))
    assert report.layout.embedding_key == "bag.weight"


def test_truncated_files_are_refused(tmp_path):
    from safetensors.torch import save_file

    sd = BagDAN(10, 4, [], 3).state_dict()
    torch.save(sd, tmp_path / "a.pt")
    save_file(sd, tmp_path / "a.safetensors")
    vocab = write_lines(tmp_path / "v.txt", make_words(10))
    for name in ("a.pt", "a.safetensors"):
        data = (tmp_path / name).read_bytes()
        (tmp_path / name).write_bytes(data[: len(data) // 2])
        with pytest.raises(CheckpointError, match="truncated"):
            convert_checkpoint(tmp_path / name, vocab, list(LABELS), tmp_path / "m")
    (tmp_path / "empty.pt").write_bytes(b"")
    with pytest.raises(CheckpointError, match="cannot be read as a torch.save checkpoint"):
        convert_checkpoint(tmp_path / "empty.pt", vocab, list(LABELS), tmp_path / "m")


def test_safetensors_checkpoint_reads_without_torch(tmp_path, monkeypatch):
    from safetensors.torch import save_file

    torch.manual_seed(14)
    words = make_words(30)
    module = BagDAN(len(words), 8, [10, 10], len(LABELS)).eval()
    save_file(module.state_dict(), tmp_path / "dan.safetensors")
    texts = make_texts(words, 20, seed=15)
    expected = torch_logits(module, token_rows(texts, words))
    monkeypatch.setitem(sys.modules, "torch", None)  # `import torch` now raises ImportError
    vocab = write_lines(tmp_path / "v.txt", words)
    report = convert_checkpoint(tmp_path / "dan.safetensors", vocab, list(LABELS), tmp_path / "m",
                                ConvertOptions(activation="relu", weights_format="safetensors"))
    assert report.checkpoint.kind == "safetensors" and (tmp_path / "m" / "weights.safetensors").exists()
    np.testing.assert_allclose(load_model(tmp_path / "m").predict_logits(texts), expected, atol=ATOL, rtol=0)
    (tmp_path / "x.pt").write_bytes(b"PK\x03\x04")  # a .pt file needs torch, which is now missing
    with pytest.raises(CheckpointError, match=r"needs PyTorch.*pip install torch==2.13.0.*danpack\[torch\]"):
        convert_checkpoint(tmp_path / "x.pt", vocab, list(LABELS), tmp_path / "m2")


# ---------------------------------------------------------------- labels, output directory, CLI


def test_read_labels(tmp_path):
    assert read_labels("neg, neu ,pos") == ("neg", "neu", "pos")
    assert read_labels(write_lines(tmp_path / "l.txt", ["a", "b"])) == ("a", "b")
    (tmp_path / "l.json").write_text('["x", "y", "z"]')
    assert read_labels(str(tmp_path / "l.json")) == ("x", "y", "z")
    for bad, msg in (("only", "not a comma-separated list"), ("a,,b", "label 2 is empty"), ("a,a", "more than once")):
        with pytest.raises(CheckpointError, match=msg):
            read_labels(bad)


def test_output_directory_is_protected(tmp_path):
    torch.save(BagDAN(10, 4, [], 3).state_dict(), tmp_path / "a.pt")
    vocab = write_lines(tmp_path / "v.txt", make_words(10))
    (tmp_path / "busy").mkdir()
    (tmp_path / "busy" / "notes.txt").write_text("keep me")
    with pytest.raises(CheckpointError, match="not a danpack model directory"):
        convert_checkpoint(tmp_path / "a.pt", vocab, list(LABELS), tmp_path / "busy")
    assert (tmp_path / "busy" / "notes.txt").read_text() == "keep me"
    convert_checkpoint(tmp_path / "a.pt", vocab, list(LABELS), tmp_path / "m")
    with pytest.raises(CheckpointError, match="pass --overwrite"):
        convert_checkpoint(tmp_path / "a.pt", vocab, list(LABELS), tmp_path / "m")
    convert_checkpoint(tmp_path / "a.pt", vocab, list(LABELS), tmp_path / "m", overwrite=True)


def test_written_model_is_read_back_and_compared(tmp_path, monkeypatch):
    import danpack.convert.from_torch as tc

    real_save = tc.save_model

    def save_then_damage(model, out, fmt):  # a writer that loses one table value must not go unnoticed
        path = real_save(model, out, fmt)
        weights = dict(np.load(path / "weights.npz"))
        weights["embedding"][0, 0] += 1.0
        np.savez(path / "weights.npz", **weights)
        return path

    monkeypatch.setattr(tc, "save_model", save_then_damage)
    torch.save(BagDAN(10, 4, [], 3).state_dict(), tmp_path / "a.pt")
    with pytest.raises(CheckpointError, match="does not read back identical"):
        convert_checkpoint(tmp_path / "a.pt", write_lines(tmp_path / "v.txt", make_words(10)), list(LABELS),
                           tmp_path / "m")


def run_cli(args: list[str]):
    import typer
    from typer.testing import CliRunner

    command = typer.main.get_command(app)
    prefix = ["convert-torch"] if hasattr(command, "commands") else []  # a lone command is the root command
    return CliRunner().invoke(app, prefix + args)


def test_cli_converts_and_prints_summary(tmp_path):
    torch.manual_seed(16)
    words = ["<pad>"] + make_words(30) + ["Upper"]  # 'Upper' cannot come out of a casefolding tokenizer
    module = EmbedMeanDAN(len(words), 6, 8, 3).eval()
    save_state(module, tmp_path / "a.pt")
    write_lines(tmp_path / "labels.txt", LABELS)
    result = run_cli([str(tmp_path / "a.pt"), "--vocab", write_lines(tmp_path / "v.txt", words),
                      "--labels", str(tmp_path / "labels.txt"), "-o", str(tmp_path / "m"), "--activation", "tanh",
                      "--weights-format", "safetensors", "--case", "casefold", "--max-tokens", "64"])
    assert result.exit_code == 0, result.output
    out = result.stdout
    assert "emb.weight" in out and "-> embedding" in out and "fc2.weight" in out and "-> hidden.1.weight" in out
    assert "embedding 31x6 -> hidden 8 -> 8 (tanh) -> output 3" in out
    assert "table 32, vocabulary 31, dropped 1" in out and "dropped row 0 ('<pad>')" in out
    assert "labels      3: broken, slow, fine" in out
    assert "note: 1 vocabulary token(s) can never come out of the tokenizer" in result.stderr and "Upper" not in out
    config = json.loads((tmp_path / "m" / "dan.json").read_text())
    assert config["tokenizer"]["case"] == "casefold" and config["tokenizer"]["max_tokens"] == 64
    assert config["metadata"]["converted_from"]["tensors"]["output.weight"] == "out.weight"


def test_cli_exits_2_on_bad_input(tmp_path):
    torch.save(BagDAN(10, 4, [], 3).state_dict(), tmp_path / "a.pt")
    args = [str(tmp_path / "a.pt"), "--vocab", write_lines(tmp_path / "v.txt", make_words(9)),
            "--labels", "a,b,c", "-o", str(tmp_path / "m")]
    result = run_cli(args)
    assert result.exit_code == 2
    assert "error:" in result.stderr and "has 9 tokens but the embedding table in a.pt has 10 rows" in result.stderr
    result = run_cli(args[:-2] + ["-o", str(tmp_path / "m"), "--padding-row", "x"])
    assert result.exit_code == 2 and "--padding-row 'x'" in result.stderr
