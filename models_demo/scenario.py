"""The invented demo scenario: drivers' comments left on public EV chargers' screens.

A regional operator lets drivers type short comments on the charger; the charger's own
board classifies them offline. Two tasks share one comment generator:
`sentiment` (negative/positive) and `topic` (what the comment is about). The generator is
seeded and deterministic; it writes labelled train/dev/test JSONL per task and an
unlabelled "deployment stream" (JSONL and plain lines) used later to prune the vocabulary.

The text is honestly hard for a bag of words: negation ("wasn't bad", "never worked"),
mixed comments ("fast charge but the cafe was closed": the clause after "but" decides),
sarcasm, intensifiers, typos, emoji, numbers and a long tail of rare words.
"""

from __future__ import annotations

import functools
import hashlib
import itertools
import json
import random
import re
import sys
from dataclasses import dataclass
from pathlib import Path

import typer

from danpack.runtime.errors import DanpackError
from danpack.runtime.tokenize import Tokenizer

from . import lexicon as lx

GENERATOR_VERSION = 1  # bump whenever the text a seed produces changes
DEFAULT_SEED = 2024  # the seed of the shipped demo data
TASKS: dict[str, tuple[str, ...]] = {
    "sentiment": ("negative", "positive"),
    "topic": ("payment", "connector_cable", "charging_speed", "site_amenities", "app_account"),
}
SPLITS = ("train", "dev", "test", "stream")
MAX_TOKENS = 60  # comments are 1..60 tokens long (the charger's text box is small)

TOPIC_WEIGHTS = (0.22, 0.20, 0.25, 0.17, 0.16)  # complaints about speed are the most common
NEGATIVE_SHARE = 0.56  # drivers complain a little more often than they praise
LABEL_NOISE = 0.02  # share of labelled comments whose label is replaced by another (annotator slips)


class ScenarioError(DanpackError):
    """A scenario request names an unknown task or split, or a bad size."""


@dataclass(frozen=True)
class ScenarioSizes:
    """How many comments each split holds."""

    train: int = 8000  # labelled training comments per task
    dev: int = 1000  # labelled development comments per task (early stopping)
    test: int = 2000  # labelled test comments per task (reported accuracy)
    stream: int = 50_000  # unlabelled deployment comments (vocabulary pruning)


SMALL_SIZES = ScenarioSizes(train=800, dev=200, test=200, stream=10_000)


def split_seed(seed: int, task: str, split: str) -> int:
    """A 64-bit seed per (seed, task, split), stable across Python runs (no `hash()`)."""
    digest = hashlib.sha256(f"danpack-scenario/{seed}/{task}/{split}".encode()).digest()
    return int.from_bytes(digest[:8], "little")


# ---- sampling helpers ----------------------------------------------------------------------

_ZIPF_EXPONENT = 1.1  # list position i is drawn with weight 1/(i+1)^1.1: a long tail


@functools.cache
def _cum_weights(n: int) -> tuple[float, ...]:
    """Cumulative Zipf-like weights of a list of n items, for random.choices."""
    return tuple(itertools.accumulate(1.0 / (i + 1) ** _ZIPF_EXPONENT for i in range(n)))


_KW_HIGH = (150, 50, 100, 120, 175, 350, 250, 300, 200, 125, 90, 62, 75)
_KW_LOW = (7, 22, 11, 43, 3, 18, 36, 50, 7, 25, 14, 4, 9)
_DETERMINERS = ("the ", "this ", "these ", "their ", "your ")
_CONTEXT_JOIN = re.compile(r"([:\-]) ?[,.!]+ ?")
_PLACES = tuple(h + t for t in lx.PLACE_TAILS for h in lx.PLACE_HEADS)
_PLACEHOLDER = re.compile(r"\{(\w+)\}")
_WORD = re.compile(r"[a-z]{4,}")
_COUNT_TOKENS = Tokenizer()


class _Writer:
    """Writes one comment at a time from a seeded `random.Random`."""

    def __init__(self, rng: random.Random) -> None:
        self.rng = rng
        self.positive = True  # polarity of the clause being written (chooses fitting numbers)

    # -- primitives
    def chance(self, p: float) -> bool:
        """True with probability p."""
        return self.rng.random() < p

    def zipf(self, items: tuple[str, ...]) -> str:
        """One item, the first ones much more often than the last ones."""
        return self.rng.choices(items, cum_weights=_cum_weights(len(items)))[0]

    def uniform(self, items):
        """One item, all equally likely."""
        return items[self.rng.randrange(len(items))]

    def fill(self, phrase: str) -> str:
        """Replace {kw} {pct} {dur} {price} {bay} {n} with plausible values."""
        if "{" not in phrase:
            return phrase
        return _PLACEHOLDER.sub(lambda m: self.value(m.group(1)), phrase)

    def value(self, kind: str) -> str:
        """A number that fits the clause being written (fast sessions show high kW)."""
        r, good = self.rng, self.positive
        if kind == "kw":
            return str(self.zipf(_KW_HIGH if good else _KW_LOW))
        if kind == "pct":
            return str(self.uniform((80, 90, 100, 85, 95, 70) if good else (20, 30, 45, 50, 12, 60, 67)))
        if kind == "dur":
            return self.zipf(lx.DURATIONS[:7] if good else lx.DURATIONS[5:])
        if kind == "miles":
            return str(r.randrange(90, 260) if good else r.randrange(1, 40))
        if kind == "price":
            return r.choice(("£{}.{:02d}", "{}.{:02d}", "€{}.{:02d}", "{}.{:02d} quid")).format(
                r.randrange(1, 60), r.randrange(100))
        if kind == "bay":
            return str(r.randrange(1, 25))
        return str(r.randrange(1, 13))  # "n": small counts, hours

    # -- phrases
    def subject(self, topic: str, generic_share: float = 0.22) -> tuple[str, bool, bool]:
        """(subject text, plural?, generic?) for a clause about `topic`; generic: "it", "the charger"."""
        if self.chance(generic_share):
            return self.fill(self.zipf(lx.GENERIC_SUBJECTS)), False, True
        word = self.zipf(lx.TOPICS[topic]["subjects"])
        plural = word.endswith("+")
        word = word.rstrip("+")
        det = self.uniform(("the ", "the ", "", "these " if plural else "this ", "their ", "the ", "your "))
        return det + word, plural, False

    def adjective(self, topic: str, positive: bool, topical_share: float = 0.62) -> str:
        """A topic's own adjective ("frayed") or, otherwise, a general one ("awful")."""
        lists = lx.TOPICS[topic]
        if self.chance(topical_share):
            return self.fill(self.zipf(lists["adj_pos" if positive else "adj_neg"]))
        return self.zipf(lx.GENERAL_POS if positive else lx.GENERAL_NEG)

    def graded(self, adj: str) -> str:
        """An adjective with an optional intensifier or downtoner."""
        if " " in adj and not self.chance(0.2):
            return adj
        if self.chance(0.28):
            return self.zipf(lx.INTENSIFIERS) + " " + adj
        if self.chance(0.06):
            return self.zipf(lx.DOWNTONERS) + " " + adj
        return adj

    def predicate(self, topic: str, positive: bool, plural: bool, topical_share: float = 0.62) -> str:
        """What follows the subject: a copula + adjective or a verb phrase, maybe negated.

        After a generic subject ("it", "the charger") the predicate is usually topical, or the
        comment would say nothing about its topic."""
        lists = lx.TOPICS[topic]
        negated = self.chance(0.24)
        if self.chance(0.55):  # copula + adjective
            if negated:  # "wasn't fast (at all)" says the opposite of "fast"
                adj = self.adjective(topic, not positive, topical_share)
                cop = self.zipf(lx.NEG_COPULA_PLUR if plural else lx.NEG_COPULA_SING)
                tail = " at all" if self.chance(0.3) else ""
                return f"{cop} {adj}{tail}"
            cop = self.zipf(lx.COPULA_PLUR if plural else lx.COPULA_SING)
            return f"{cop} {self.graded(self.adjective(topic, positive, topical_share))}"
        topical_vp = 0.75 + (topical_share - 0.62)
        if negated:  # "never got stuck" (positive), "never worked" (negative)
            if self.chance(topical_vp):
                return self.fill(self.zipf(lists["neg_vp_pos" if positive else "neg_vp_neg"]))
            return self.zipf(lx.GENERAL_NEG_VP_POS) if positive else self.zipf(("never worked", "didn't work", "never did"))
        if self.chance(topical_vp):
            return self.fill(self.zipf(lists["vp_pos" if positive else "vp_neg"]))
        return self.zipf(lx.GENERAL_VP_POS if positive else lx.GENERAL_VP_NEG)

    def clause(self, topic: str, positive: bool) -> str:
        """One statement about `topic` with the given polarity."""
        lists = lx.TOPICS[topic]
        self.positive = positive
        form = self.rng.random()
        if form < 0.58:
            subj, plural, generic = self.subject(topic)
            return f"{subj} {self.predicate(topic, positive, plural, 0.9 if generic else 0.62)}"
        if form < 0.76:  # first person: "got 80% in 20 min", "i couldn't log in"
            who = self.uniform(("i ", "i ", "", "we ", "just "))
            return who + self.fill(self.zipf(lists["fp_pos" if positive else "fp_neg"]))
        if form < 0.92:  # noun phrase: "dirty toilets", "super fast charge"
            subj, _, _ = self.subject(topic, generic_share=0.0)
            subj = subj.split(" ", 1)[1] if subj.startswith(_DETERMINERS) else subj
            return f"{self.graded(self.adjective(topic, positive, 0.7))} {subj}"
        if not positive:  # a rhetorical question
            subj, plural, _ = self.subject(topic, generic_share=0.1)
            verb = "are" if plural else "is"
            return f"why {verb} {subj} always {self.adjective(topic, False)}?"
        subj, plural, _ = self.subject(topic, generic_share=0.1)
        return f"{subj} {'were' if plural else 'was'} not bad" if self.chance(0.5) else \
            f"no complaints about {subj}"

    def context(self) -> str:
        """A neutral aside: where, when, who with, which car."""
        kind = self.rng.random()
        place = self.zipf(_PLACES).capitalize()
        if kind < 0.25:
            return self.uniform(("{p} {s}:", "at {p} {s}", "{p} {s} -", "{p}")).format(p=place, s=self.zipf(lx.SITE_KINDS))
        if kind < 0.37:
            r = self.rng
            code = "".join(r.choice("abcdefghjkmnpqrstuvwxyz") for _ in range(2)) + f"-{r.randrange(100, 9999)}"
            return self.uniform((f"charger {code}", f"station {code}", f"bay {r.randrange(1, 25)}", f"post {code}:"))
        if kind < 0.52:
            return self.zipf(lx.WHEN)
        if kind < 0.62:
            return self.zipf(lx.WITH)
        if kind < 0.76:
            return "on the way to " + self.zipf(lx.PURPOSES)
        if kind < 0.86:
            code = self.uniform(lx.CAR_CODE_LETTERS) + str(self.rng.randrange(1, 10))
            return f"my {self.zipf(lx.CAR_MAKES)} {code}"
        if kind < 0.93:
            return self.uniform(("forgot my {i}", "left my {i} in the car", "had the {i} with me",
                                 "in the {w}", "{w} all day", "brought a {i}")).format(
                i=self.zipf(lx.ITEMS), w=self.zipf(lx.WEATHER))
        return self.fill(self.zipf(lx.FILLER))

    def closing(self, positive: bool) -> str:
        """A sign-off or star rating that matches the feeling (3 stars now and then)."""
        if self.chance(0.12):  # a star rating
            stars = self.uniform((4, 5, 5) if positive else (1, 1, 2)) if self.chance(0.85) else 3
            return self.uniform((f"{stars}/5", f"{stars} stars", f"{stars}/5 stars"))
        return self.zipf(lx.CLOSING_POS if positive else lx.CLOSING_NEG)

    def emoji(self, positive: bool) -> str:
        """One to three emoji of the feeling, or a neutral one."""
        if self.chance(0.12):
            return self.zipf(lx.EMOJI_NEUTRAL)
        pick = self.zipf(lx.EMOJI_POS if positive else lx.EMOJI_NEG)
        return pick * self.uniform((1, 1, 1, 2, 3))

    def terse(self, topic: str, positive: bool) -> str:
        """1-4 tokens: "sluggish", "frayed cable", "app 😡" (a bare topic word says nothing of the feeling)."""
        self.positive = positive
        form = self.rng.random()
        if form < 0.02:
            return self.emoji(positive)
        if form < 0.30:
            word = self.fill(self.zipf(lx.TOPICS[topic]["terse"]))
            return f"{word} {self.emoji(positive)}" if self.chance(0.4) else word
        if form < 0.62:  # the topical adjective alone carries both labels
            return self.graded(self.adjective(topic, positive, 0.85))
        subj, _, _ = self.subject(topic, generic_share=0.0)
        subj = subj.split(" ", 1)[-1] if " " in subj and subj.startswith(_DETERMINERS) else subj
        adj = self.adjective(topic, positive, 0.7)
        return f"{subj} {adj}" if self.chance(0.5) else f"{adj} {subj}"

    def join(self, aside: str, main: str) -> str:
        """A mixed comment: the connective decides which clause carries the verdict."""
        if self.chance(0.55):  # the aside first, the verdict after the contrast
            conn = self.zipf((" but ", ", but ", " but ", ". however ", " - still, ", " yet ", " but honestly "))
            return aside + conn + main
        conn = self.zipf((", though ", " even though ", " although ", " even if ", ", despite the fact that "))
        return main + conn + aside

    def comment(self, topic: str, positive: bool) -> str:
        """One whole comment: main clause(s), maybe an aside of another topic, context, closing."""
        rng = self.rng
        if self.chance(0.13):
            text = self.terse(topic, positive)
        else:
            parts = [self.clause(topic, positive)]
            if self.chance(0.16):  # longer comments: more about the same thing
                for _ in range(rng.randrange(1, 4)):
                    parts.append(self.clause(topic, positive))
            if self.chance(0.3):  # a second topic, usually with the opposite feeling
                other = self.uniform([t for t in lx.TOPICS if t != topic])
                aside_positive = (not positive) if self.chance(0.72) else positive
                parts[0] = self.join(self.clause(other, aside_positive), parts[0])
            if self.chance(0.04) and not positive:
                parts[0] = self.uniform(lx.SARCASM) + " " + parts[0]
            if self.chance(0.35):
                ctx = self.context()
                parts.insert(0 if self.chance(0.7) else len(parts), ctx)
            if self.chance(0.3):
                parts.append(self.closing(positive))
            sep = self.zipf((", ", ". ", " ", " - ", "! ", ". ", "... "))
            text = _CONTEXT_JOIN.sub(r"\1 ", sep.join(parts))
        text = self.typos(text)
        text = self.punctuate(text, positive)
        return self.case(text, positive)

    def typos(self, text: str) -> str:
        """Character swaps, drops, doubles and near-key hits, more for some writers than others."""
        roll = self.rng.random()
        rate = 0.0 if roll < 0.62 else 0.05 if roll < 0.9 else 0.14
        if rate == 0.0:
            return text
        return _WORD.sub(lambda m: self.misspell(m.group(0)) if self.chance(rate) else m.group(0), text)

    def misspell(self, word: str) -> str:
        """One typo inside a word of 4+ letters (first and last letters kept)."""
        r = self.rng
        i = r.randrange(1, len(word) - 1)
        kind = r.randrange(4)
        if kind == 0:  # swap two neighbours
            return word[:i] + word[i + 1] + word[i] + word[i + 2:]
        if kind == 1:  # drop one
            return word[:i] + word[i + 1:]
        if kind == 2:  # double one
            return word[:i] + word[i] + word[i:]
        near = lx.KEY_NEIGHBOURS.get(word[i], word[i])  # hit a neighbouring key
        return word[:i] + r.choice(near) + word[i + 1:]

    def punctuate(self, text: str, positive: bool) -> str:
        """Maybe a trailing emoji, then the end mark ("!!!", "...", ":(")."""
        if self.chance(0.1):
            text += " " + self.emoji(positive)
        end = self.zipf(("", ".", "!", "!!", "...", "!!!", " :)" if positive else " :(", "?!"))
        return text + end if not text.endswith(("?", "!", ".")) else text

    def case(self, text: str, positive: bool) -> str:
        """Mostly lower case; some sentence case, Title Case, or angry capitals."""
        roll = self.rng.random()
        if roll < 0.62:
            return text
        if roll < 0.9:
            return text[:1].upper() + text[1:]
        if roll < 0.96 and not positive:
            return text.upper()  # shouting
        return " ".join(w.capitalize() for w in text.split(" "))


def _draw_latent(rng: random.Random) -> tuple[str, bool]:
    """The hidden truth of one comment: its topic and whether it is positive."""
    topic = rng.choices(TASKS["topic"], weights=TOPIC_WEIGHTS)[0]
    return topic, rng.random() >= NEGATIVE_SHARE


def _write_text(writer: _Writer, topic: str, positive: bool) -> str:
    """A comment of 1..MAX_TOKENS tokens (longer drafts are rewritten)."""
    for _ in range(20):
        text = writer.comment(topic, positive)
        if 1 <= len(_COUNT_TOKENS.tokenize(text)) <= MAX_TOKENS:
            return text
    return writer.terse(topic, positive)


def _check(task: str | None, split: str, n: int) -> None:
    """Refuse unknown tasks and splits and bad sizes with a ScenarioError."""
    if task is not None and task not in TASKS:
        raise ScenarioError(f"task {task!r} is not one of {sorted(TASKS)}; pick a task of the demo scenario")
    if split not in SPLITS:
        raise ScenarioError(f"split {split!r} is not one of {list(SPLITS)}")
    if not isinstance(n, int) or isinstance(n, bool) or n < 0:
        raise ScenarioError(f"split size must be an integer >= 0, found {n!r}")


def generate_split(task: str, split: str, n: int, seed: int = DEFAULT_SEED) -> list[dict]:
    """`n` labelled comments {"id", "text", "label"} of one task's train/dev/test split."""
    _check(task, split, n)
    if split == "stream":
        raise ScenarioError("the 'stream' split is unlabelled: use generate_stream(n, seed)")
    rng = random.Random(split_seed(seed, task, split))
    writer, labels = _Writer(rng), TASKS[task]
    records = []
    for i in range(n):
        topic, positive = _draw_latent(rng)
        text = _write_text(writer, topic, positive)
        label = topic if task == "topic" else labels[int(positive)]
        slip, other = rng.random(), rng.randrange(len(labels) - 1)  # both drawn always: same stream at any noise rate
        if slip < LABEL_NOISE:
            label = [x for x in labels if x != label][other]
        records.append({"id": f"{task}-{split}-{i:05d}", "text": text, "label": label})
    return records


def generate_stream(n: int, seed: int = DEFAULT_SEED) -> list[dict]:
    """`n` unlabelled deployment comments {"id", "text"} of the same domain."""
    _check(None, "stream", n)
    rng = random.Random(split_seed(seed, "any", "stream"))
    writer = _Writer(rng)
    out = []
    for i in range(n):
        topic, positive = _draw_latent(rng)
        out.append({"id": f"stream-{i:06d}", "text": _write_text(writer, topic, positive)})
    return out


def write_jsonl(path: Path, records: list[dict]) -> Path:
    """One JSON object per line, UTF-8, keys in record order (byte-stable)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", encoding="utf-8", newline="\n") as f:
        for record in records:
            f.write(json.dumps(record, ensure_ascii=False) + "\n")
    return path


def read_jsonl(path: str | Path) -> list[dict]:
    """Records of a scenario JSONL file, through the packer's one text-file reader."""
    from danpack.textfile import iter_records

    return list(iter_records(path, fmt="jsonl"))


def write_scenario(out_dir: str | Path, seed: int = DEFAULT_SEED, sizes: ScenarioSizes = ScenarioSizes()) -> dict[str, Path]:
    """Write every task's train/dev/test JSONL, the stream (JSONL + lines) and scenario.json."""
    root = Path(out_dir)
    paths: dict[str, Path] = {}
    for task in TASKS:
        for split in ("train", "dev", "test"):
            records = generate_split(task, split, getattr(sizes, split), seed)
            paths[f"{task}/{split}"] = write_jsonl(root / task / f"{split}.jsonl", records)
    stream = generate_stream(sizes.stream, seed)
    paths["stream"] = write_jsonl(root / "stream.jsonl", stream)
    lines_path = root / "stream.txt"
    with open(lines_path, "w", encoding="utf-8", newline="\n") as f:
        f.writelines(record["text"] + "\n" for record in stream)
    paths["stream_lines"] = lines_path
    about = {"generator": "danpack.models_demo.scenario", "version": GENERATOR_VERSION, "seed": seed,
             "sizes": {k: getattr(sizes, k) for k in ("train", "dev", "test", "stream")},
             "labels": {task: list(labels) for task, labels in TASKS.items()}}
    (root / "scenario.json").write_text(json.dumps(about, indent=2) + "\n", encoding="utf-8")
    paths["about"] = root / "scenario.json"
    return paths


cli = typer.Typer(add_completion=False, pretty_exceptions_show_locals=False)


@cli.command()
def scenario_command(
    out: Path = typer.Option(..., "--out", help="Directory to write the scenario files into."),
    seed: int = typer.Option(DEFAULT_SEED, "--seed", help="Seed of the generator."),
    small: bool = typer.Option(False, "--small", help="Small sizes (tests, quick looks)."),
) -> None:
    """Write the demo scenario: labelled splits per task and the deployment stream."""
    sizes = SMALL_SIZES if small else ScenarioSizes()
    print(f"writing scenario (seed {seed}) into {out}", file=sys.stderr)
    for name, path in write_scenario(out, seed, sizes).items():
        print(f"{name}\t{path}")


if __name__ == "__main__":
    cli()
