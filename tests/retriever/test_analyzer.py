"""The analyzer: normalization, case folding, token pattern, stopwords, stemming, stored config."""

from __future__ import annotations

from pathlib import Path

import pytest
import snowballstemmer
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.feature_extraction.text import ENGLISH_STOP_WORDS, CountVectorizer

from retriever import Analyzer, AnalyzerConfig, build_index, load_index


def test_unicode_normalization_and_case_folding() -> None:
    a = Analyzer(stopwords="none", stemmer=None)
    # NFKC turns the "fi" ligature into two letters; casefold turns sharp s into "ss"
    # (Unicode Standard, CaseFolding.txt); accents are stripped as scikit-learn does.
    assert a.tokens("ﬁle STRASSE Straße Café ＡＢＣ") == [
        "file",
        "strasse",
        "strasse",
        "cafe",
        "abc",
    ]
    keep = Analyzer(stopwords="none", stemmer=None, strip_accents=False)
    assert keep.tokens("Café") == ["café"]


def test_token_pattern_matches_scikit_learn() -> None:
    # Reference: scikit-learn's CountVectorizer default token_pattern r"(?u)\b\w\w+\b".
    text = "a bb, c-dd e_f 42 x9 don't"
    sk = CountVectorizer(lowercase=True).build_tokenizer()
    assert Analyzer(stopwords="none", stemmer=None, strip_accents=False).words(text) == sk(text)


def test_stopwords_default_are_scikit_learns() -> None:
    a = Analyzer(stemmer=None)
    text = "the river and the sea were there"
    # Reference: sklearn.feature_extraction.text.ENGLISH_STOP_WORDS.
    assert a.tokens(text) == [w for w in text.split() if w not in ENGLISH_STOP_WORDS]
    assert Analyzer(stemmer=None, stopwords="none").tokens(text) == text.split()
    assert Analyzer(stemmer=None, stopwords=("river",)).tokens("the river") == ["the"]
    with pytest.raises(ValueError):
        Analyzer(stopwords="klingon")


def test_snowball_stemming() -> None:
    # Reference: the Snowball English stemmer as packaged by snowballstemmer.
    ref = snowballstemmer.stemmer("english")
    words = ["running", "runners", "generously", "connection", "ponies"]
    assert Analyzer(stopwords="none").tokens(" ".join(words)) == ref.stemWords(words)
    assert Analyzer(stopwords="none", stemmer=None).tokens("running") == ["running"]
    with pytest.raises(ValueError):
        Analyzer(stemmer="elvish")


@settings(max_examples=80, deadline=None)
@given(st.text(alphabet=st.sampled_from("abcé THE and runs ran Ünï-ß.,"), max_size=80))
def test_term_table_equals_tokens(text: str) -> None:
    # The build's cached word table must give exactly the tokens `tokens` gives.
    a = Analyzer()
    table = a.term_table()
    ids = a.term_ids(text, table)
    assert [table.terms[i] for i in ids if i >= 0] == a.tokens(text)


def test_config_round_trip_and_manifest(tmp_path: Path) -> None:
    cfg = AnalyzerConfig(stopwords=("foo", "bar"), stemmer=None, normalization="NFC")
    assert AnalyzerConfig.from_dict(cfg.to_dict()) == cfg
    with pytest.raises(ValueError, match="unknown analyzer settings"):
        AnalyzerConfig.from_dict({"colour": "blue"})
    with pytest.raises(ValueError):
        Analyzer(normalization="NFX")
    idx = build_index([{"id": "1", "title": "T", "text": "foo baz"}], tmp_path / "i", analyzer=cfg)
    assert idx.manifest["analyzer"]["stopwords"] == ["foo", "bar"]
    assert load_index(tmp_path / "i").analyzer.tokens("foo baz") == ["baz"]


def test_stop_words_and_accent_stripping_equal_scikit_learns() -> None:
    # Reference: scikit-learn's ENGLISH_STOP_WORDS and strip_accents_unicode, which the
    # analyzer reproduces without importing sklearn.feature_extraction.
    import random

    from sklearn.feature_extraction.text import ENGLISH_STOP_WORDS as SK_STOP
    from sklearn.feature_extraction.text import strip_accents_unicode as sk_strip

    from retriever.analyzer import ENGLISH_STOP_WORDS, strip_accents_unicode

    assert frozenset(SK_STOP) == ENGLISH_STOP_WORDS
    rng = random.Random(3)
    alphabet = "aeiouçñøåéèêëìíîïòóôõöùúûüÿǅﬁ①²Ⅻ한글日本語ΑΒΓάέήίΐ" + "".join(
        chr(c) for c in range(0x300, 0x36F, 7)
    )
    samples = ["plain ascii", "", "Crème brûlée", "naïve café", "Ǆemal ﬁne"] + [
        "".join(rng.choice(alphabet) for _ in range(rng.randint(1, 30))) for _ in range(500)
    ]
    for s in samples:
        assert strip_accents_unicode(s) == sk_strip(s), s


@settings(max_examples=300, deadline=None)
@given(st.text(alphabet=st.characters(max_codepoint=127), max_size=80))
def test_ascii_fast_paths_equal_the_general_ones(text: str) -> None:
    # The ASCII shortcuts must give what re.findall and unicodedata give.
    import re
    import unicodedata

    from retriever.analyzer import DEFAULT_TOKEN_PATTERN, _default_words

    assert _default_words(text) == re.findall(DEFAULT_TOKEN_PATTERN, text)
    assert Analyzer().normalize(text) == unicodedata.normalize("NFKC", text).casefold()


@settings(max_examples=200, deadline=None)
@given(st.lists(st.text(max_size=40), max_size=8))
def test_tokens_many_equals_tokens_of_each_text(texts: list[str]) -> None:
    a = Analyzer()
    assert a.tokens_many(texts) == [a.tokens(t) for t in texts]
