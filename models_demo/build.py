"""Build the demo models from their seeds: the shipped ones, byte for byte, or GloVe ones on demand.

    python -m danpack.models_demo.build                      # rewrite models_demo/shipped/{sentiment,topic}
    python -m danpack.models_demo.build --check              # rebuild in a temp dir, compare bytes with shipped/
    python -m danpack.models_demo.build --regime finetune --task sentiment --out DIR   # DIR/sentiment (~80 MB)

The data come from `danpack.models_demo.scenario` (seed DEFAULT_SEED, default sizes); the training
run from the `TrainConfig` below. Rebuilding with the same BLAS kernel gives the same
bytes; OpenBLAS picks its kernel per CPU (or from OPENBLAS_CORETYPE) and another kernel
sums in another order, so `--check` also accepts weights equal within WEIGHT_TOLERANCE.
"""

from __future__ import annotations

import filecmp
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import typer

from danpack.model import FloatModel, model_bytes, save_model

from . import scenario
from .glove import Pretrained
from .trainer import TrainConfig, TrainError, evaluate, train_model

SHIPPED_DIR = Path(__file__).resolve().parent / "shipped"
MODEL_FILES = ("dan.json", "tokens.txt", "weights.safetensors")

# The demo models' training runs. Hidden layers narrower than the 50-wide table, so the
# packer can fold the first layer into the table.
CONFIGS: dict[str, TrainConfig] = {
    "random": TrainConfig(regime="random", hidden_sizes=(32,), seed=11),
    # frozen vectors need a wider layer to make up for the table that cannot adapt
    "fixed": TrainConfig(regime="fixed", hidden_sizes=(256,), word_dropout=0.0, seed=11),
    "finetune": TrainConfig(regime="finetune", hidden_sizes=(32,), seed=11),
}


def build_model(
    task: str,
    regime: str = "random",
    data_seed: int = scenario.DEFAULT_SEED,
    sizes: scenario.ScenarioSizes = scenario.ScenarioSizes(),
    config: TrainConfig | None = None,
    pretrained: Pretrained | None = None,
    log=None,
) -> FloatModel:
    """Generate the task's data, train, measure test accuracy; all of it goes into the metadata."""
    if task not in scenario.TASKS:
        raise TrainError(f"task {task!r} is not one of {sorted(scenario.TASKS)}")
    if config is None:
        if regime not in CONFIGS:
            raise TrainError(f"regime {regime!r} is not one of {sorted(CONFIGS)}")
        config = CONFIGS[regime]
    train = scenario.generate_split(task, "train", sizes.train, data_seed)
    dev = scenario.generate_split(task, "dev", sizes.dev, data_seed)
    test = scenario.generate_split(task, "test", sizes.test, data_seed)
    model = train_model(config, train, dev, scenario.TASKS[task], pretrained=pretrained, log=log)
    metadata = {
        "task": task,
        "scenario": "drivers' comments on public EV chargers (invented demo data)",
        "data": {"generator": "danpack.models_demo.scenario", "generator_version": scenario.GENERATOR_VERSION,
                 "seed": data_seed, "sizes": {"train": sizes.train, "dev": sizes.dev, "test": sizes.test}},
        **model.metadata,
        "test_comments": len(test),
        "test_accuracy": round(evaluate(model, test), 6),
        "rebuild": f"python -m danpack.models_demo.build --task {task} --regime {config.regime}",
    }
    return replace(model, metadata=metadata)


def write_model(model: FloatModel, model_dir: Path) -> Path:
    """Save with safetensors weights (npz embeds zip timestamps, so it is not byte-stable)."""
    return save_model(model, model_dir, weights_format="safetensors")


# Largest weight change `--check` accepts when the bytes differ: another BLAS kernel reorders
# float32 sums, which moves the trained weights by about 1e-6 (measured: at most 7.6e-7).
WEIGHT_TOLERANCE = 1e-5


def differing_files(a: Path, b: Path) -> list[str]:
    """Names of the model files that differ byte for byte between two model directories."""
    return [n for n in MODEL_FILES if not ((a / n).exists() and (b / n).exists() and filecmp.cmp(a / n, b / n, shallow=False))]


def weight_difference(a: Path, b: Path) -> float | None:
    """Largest |Δ| between two weight files of the same tensors; None when names, shapes or dtypes differ."""
    from safetensors.numpy import load_file

    wa, wb = load_file(a / "weights.safetensors"), load_file(b / "weights.safetensors")
    if wa.keys() != wb.keys() or any(wa[k].shape != wb[k].shape or wa[k].dtype != wb[k].dtype for k in wa):
        return None
    return max((float(np.max(np.abs(wa[k].astype(np.float64) - wb[k]), initial=0.0)) for k in wa), default=0.0)


def compare_models(rebuilt: Path, shipped: Path) -> tuple[bool, str]:
    """(matches, verdict line): identical bytes, or only weights within WEIGHT_TOLERANCE."""
    differ = differing_files(rebuilt, shipped)
    if not differ:
        return True, "identical"
    if differ == ["weights.safetensors"]:
        delta = weight_difference(rebuilt, shipped)
        if delta is not None and delta <= WEIGHT_TOLERANCE:
            return True, (f"equal within {WEIGHT_TOLERANCE:g} (max |Δ| {delta:.2g}: another BLAS kernel "
                          "summed in another order)")
    return False, "DIFFERS: " + ", ".join(differ)


cli = typer.Typer(add_completion=False, pretty_exceptions_show_locals=False)


@cli.command()
def build_command(
    task: str = typer.Option("all", "--task", help="sentiment, topic or all."),
    regime: str = typer.Option("random", "--regime", help="random (shipped), fixed or finetune (GloVe)."),
    out: Path | None = typer.Option(None, "--out", help="Parent directory: each model goes to OUT/<task>. "
                                    "Default for the random regime: models_demo/shipped."),
    data_seed: int = typer.Option(scenario.DEFAULT_SEED, "--data-seed", help="Seed of the scenario data."),
    check: bool = typer.Option(False, "--check", help="Rebuild in a temp dir and compare with OUT: "
                               "identical bytes, or weights equal within 1e-5 under another BLAS kernel."),
) -> None:
    """Train the demo models from their seeds and write them (or check them)."""
    tasks = list(scenario.TASKS) if task == "all" else [task]
    if regime not in CONFIGS or any(t not in scenario.TASKS for t in tasks):
        print(f"error: --task must be one of {sorted(scenario.TASKS)} or 'all', --regime one of {sorted(CONFIGS)}",
              file=sys.stderr)
        raise typer.Exit(code=2)
    if out is None and regime != "random":
        print("error: GloVe models hold a 400,000-row table (~80 MB) and are never shipped; pass --out DIR",
              file=sys.stderr)
        raise typer.Exit(code=2)
    target = out if out is not None else SHIPPED_DIR
    pretrained = None
    if regime != "random":
        from .glove import load_glove

        pretrained = load_glove()
    failed = []
    with tempfile.TemporaryDirectory(prefix="danpack-build-") as scratch:
        for name in tasks:
            started = time.perf_counter()
            model = build_model(name, regime, data_seed, pretrained=pretrained)
            seconds = time.perf_counter() - started
            dest = (Path(scratch) if check else target) / name
            write_model(model, dest)
            meta = model.metadata
            print(f"{name} ({regime}): dev {meta['dev_accuracy']:.4f}  test {meta['test_accuracy']:.4f}  "
                  f"{len(model.vocab)} rows  {model_bytes(dest)} bytes  trained in {seconds:.1f} s", file=sys.stderr)
            if check:
                matches, verdict = compare_models(dest, target / name)
                print(f"{target / name}\t{verdict}")
                if not matches:
                    failed.append(name)
            else:
                print(dest)
    if failed:
        raise typer.Exit(code=1)


if __name__ == "__main__":
    cli()
