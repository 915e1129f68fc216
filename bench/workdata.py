"""The bench's inputs, generated into the work dir and reused across runs: demo data, models, long comments.

Nothing here is committed: the demo comments come from `danpack.models_demo.scenario`, the GloVe model
from `danpack.models_demo.build`, the synthetic model from a seeded numpy generator. A cached file is
written under a temporary name and renamed, so an interrupted run never leaves half a file.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

from danpack.models_demo import scenario
from danpack.model import FloatModel, load_model, save_model
from danpack.runtime.forward import Layer
from danpack.runtime.tokenize import Tokenizer, TokenizerSpec

from .config import BenchConfig

SHIPPED = Path(scenario.__file__).resolve().parent / "shipped"
LINES_SEED_OFFSET = 1  # the danpack-run file uses seed + 1: comments the packer never saw
SYNTHETIC_SEED = 7


def say(message: str) -> None:
    """Progress to stderr (results go to stdout)."""
    print(f"[bench] {message}", file=sys.stderr, flush=True)


def _atomic_text(path: Path, write) -> Path:
    """Run write(tmp_path), then rename tmp_path to path."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.partial")
    try:
        write(tmp)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path


def demo_test(config: BenchConfig, task: str) -> list[dict]:
    """The first `test_texts` comments of the task's demo test split ({"id", "text", "label"})."""
    return scenario.generate_split(task, "test", config.test_texts, config.seed)


def stream_corpus(config: BenchConfig) -> Path:
    """The demo deployment stream (JSONL, field "text"): the corpus every demo bundle is packed with."""
    path = config.data_dir / f"stream-{config.stream_texts}-seed{config.seed}.jsonl"
    if not path.exists():
        say(f"generating the deployment stream ({config.stream_texts:,} comments) -> {path}")
        records = scenario.generate_stream(config.stream_texts, config.seed)
        _atomic_text(path, lambda tmp: scenario.write_jsonl(tmp, records))
    return path


def run_lines_file(config: BenchConfig) -> Path:
    """Plain text, one fresh comment per line (another seed than the corpus): danpack-run's input."""
    seed = config.seed + LINES_SEED_OFFSET
    path = config.data_dir / f"lines-{config.run_lines}-seed{seed}.txt"
    if not path.exists():
        say(f"generating {config.run_lines:,} fresh comments for danpack-run -> {path}")
        records = scenario.generate_stream(config.run_lines, seed)

        def write(tmp: Path) -> None:
            with open(tmp, "w", encoding="utf-8", newline="\n") as f:
                f.writelines(r["text"].replace("\n", " ") + "\n" for r in records)

        _atomic_text(path, write)
    return path


def long_comments(config: BenchConfig, spec: TokenizerSpec, length: int) -> list[str]:
    """`long_texts` distinct comments of exactly `length` tokens: demo comments joined, then trimmed or padded.

    Counted with the model's tokenizer without its max_tokens cap, so a 1,000-token text really has 1,000.
    """
    counter = Tokenizer(spec)

    def count_tokens(text: str) -> int:  # every token, past max_tokens (tokenize stops there)
        return len(counter.split(counter.normalize(text)))

    pool = [r["text"] for r in scenario.generate_split("sentiment", "test", 2000, config.seed)]
    out, start = [], 0
    for k in range(config.long_texts):
        parts: list[str] = []
        count = 0
        i = (start + 37 * k) % len(pool)
        while count < length:
            parts.append(pool[i])
            count += count_tokens(pool[i])
            i = (i + 1) % len(pool)
        words = " ".join(parts).split(" ")
        while count_tokens(" ".join(words)) > length:
            words.pop()
        words += ["ok"] * (length - count_tokens(" ".join(words)))  # "ok": one token each
        text = " ".join(words)
        if count_tokens(text) != length:
            raise RuntimeError(f"long comment has {count_tokens(text)} tokens, expected {length}")
        out.append(text)
    return out


def demo_model_dir(config: BenchConfig, task: str) -> tuple[Path, str]:
    """The shipped demo model of a task, or (when not shipped yet) the same build in the work dir."""
    shipped = SHIPPED / task
    if (shipped / "dan.json").exists():
        return shipped, "models_demo/shipped"
    target = config.models_dir / "demo-random" / task
    if not (target / "dan.json").exists():
        from danpack.models_demo.build import build_model, write_model

        say(f"models_demo/shipped/{task} is missing: training the same demo model into {target}")
        write_model(build_model(task, "random", config.seed), target)
    return target, "built in the work dir (shipped model missing)"


def glove_model_dir(config: BenchConfig) -> Path:
    """The GloVe 6B 50d fine-tuned demo sentiment model (400,243 rows), built once by danpack.models_demo.build."""
    parent = config.models_dir / "glove-finetune"
    target = parent / "sentiment"
    if not (target / "dan.json").exists():
        say(f"building the GloVe fine-tuned sentiment model into {target} (python -m danpack.models_demo.build)")
        started = time.perf_counter()
        subprocess.run([sys.executable, "-m", "danpack.models_demo.build", "--regime", "finetune", "--task", "sentiment",
                        "--out", str(parent), "--data-seed", str(config.seed)], check=True, stdout=subprocess.DEVNULL)
        say(f"  built in {time.perf_counter() - started:.1f} s")
    return target


def glove_words_model_dir(config: BenchConfig, rows: int) -> Path:
    """The synthetic `rows`-row model with GloVe 6B's `rows` most frequent tokens as its vocabulary (real
    words, for the vocabulary's share of a bundle); built once."""
    from danpack.models_demo.glove import load_glove  # the glove extra: only this case needs it

    target = config.models_dir / f"synthetic-{rows}-glove-words"
    if not (target / "dan.json").exists():
        say(f"writing the {rows:,}-row model with GloVe's most frequent words -> {target}")
        words = load_glove().tokens[:rows]  # the GloVe files list tokens most frequent first
        save_model(replace(load_model(synthetic_model_dir(config, rows)), vocab=tuple(words)), target,
                   weights_format="npz")
    return target


def synthetic_tokens(n: int) -> list[str]:
    """n distinct lowercase tokens: a..z, aa..zz, aaa.. (bijective base 26), all reachable by the tokenizer."""
    letters = "abcdefghijklmnopqrstuvwxyz"
    out = []
    for i in range(n):
        k, chars = i + 1, []
        while k > 0:
            k, r = divmod(k - 1, 26)
            chars.append(letters[r])
        out.append("".join(reversed(chars)))
    return out


def synthetic_model_dir(config: BenchConfig, rows: int | None = None) -> Path:
    """A random float DAN of rows x dim (hidden layer, relu, 2 classes), saved as npz, built once.

    `rows` defaults to the case-3 table; the overhead measurement asks for a smaller one.
    """
    rows = config.synthetic_rows if rows is None else rows
    dim, hidden = config.synthetic_dim, config.synthetic_hidden
    target = config.models_dir / f"synthetic-{rows}x{dim}-h{hidden}"
    if (target / "dan.json").exists():
        return target
    say(f"generating the synthetic {rows:,} x {dim} float32 model -> {target}")
    rng = np.random.default_rng(SYNTHETIC_SEED)
    embedding = rng.standard_normal((rows, dim), dtype=np.float32)  # (V, D)
    embedding *= np.float32(0.1)
    w1 = (rng.standard_normal((hidden, dim), dtype=np.float32) / np.float32(np.sqrt(dim)))  # (H, D)
    w2 = (rng.standard_normal((2, hidden), dtype=np.float32) / np.float32(np.sqrt(hidden)))  # (2, H)
    layers = (Layer(w1, np.zeros(hidden, np.float32), "relu"), Layer(w2, np.zeros(2, np.float32), None))
    model = FloatModel(tuple(synthetic_tokens(rows)), embedding, layers, ("negative", "positive"),
                       metadata={"builder": "bench.workdata.synthetic_model_dir", "seed": SYNTHETIC_SEED})
    save_model(model, target, weights_format="npz")
    return target
