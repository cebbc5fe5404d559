"""Text to tokens: normalization, case folding, token pattern, stopwords and stemming."""

from __future__ import annotations

import importlib.util
import re
import unicodedata
from collections.abc import Iterable
from dataclasses import asdict, dataclass, field
from typing import Any, Literal, cast

import snowballstemmer

# scikit-learn's default token pattern: runs of two or more word characters.
DEFAULT_TOKEN_PATTERN = r"(?u)\b\w\w+\b"


# Every ASCII character that is not a word character under re's Unicode \w, mapped to space.
_ASCII_NON_WORD = str.maketrans(
    {c: " " for c in map(chr, range(128)) if not (c.isalnum() or c == "_")}
)
_DEFAULT_RE = re.compile(DEFAULT_TOKEN_PATTERN)


def _default_words(text: str) -> list[str]:
    """`re.findall(DEFAULT_TOKEN_PATTERN, text)`, about 20% faster on ASCII text.

    For ASCII the pattern's matches are exactly the runs of [A-Za-z0-9_] of length >= 2,
    which str.translate and str.split find in C; other text goes to the regular expression.
    """
    if text.isascii():
        return [w for w in text.translate(_ASCII_NON_WORD).split() if len(w) > 1]
    return _DEFAULT_RE.findall(text)


@dataclass(frozen=True)
class AnalyzerConfig:
    """Everything that decides how text becomes tokens; stored in each index's manifest."""

    normalization: str = "NFKC"
    casefold: bool = True
    strip_accents: bool = True
    token_pattern: str = DEFAULT_TOKEN_PATTERN
    stopwords: str | tuple[str, ...] = "english"
    stemmer: str | None = "english"
    extra: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """Plain-JSON form of the configuration."""
        data = asdict(self)
        if isinstance(self.stopwords, tuple):
            data["stopwords"] = list(self.stopwords)
        return data

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> AnalyzerConfig:
        """Rebuild a configuration written by `to_dict`, rejecting unknown keys."""
        known = {f for f in cls.__dataclass_fields__}
        unknown = set(data) - known
        if unknown:
            raise ValueError(f"unknown analyzer settings: {sorted(unknown)}")
        values = dict(data)
        if isinstance(values.get("stopwords"), list):
            values["stopwords"] = tuple(values["stopwords"])
        return cls(**values)


def _sklearn_stop_words() -> frozenset[str]:
    """scikit-learn's English stop-word list, read without importing sklearn.feature_extraction.

    That package pulls in pandas and most of scipy (~130 MB resident) in every indexing worker
    and query process; the list itself lives in a plain module that is run on its own here.
    """
    spec = importlib.util.find_spec("sklearn")
    for folder in (spec.submodule_search_locations or []) if spec else []:
        path = f"{folder}/feature_extraction/_stop_words.py"
        file_spec = importlib.util.spec_from_file_location("_hunchwise_sklearn_stop_words", path)
        if file_spec is None or file_spec.loader is None:
            continue
        module = importlib.util.module_from_spec(file_spec)
        try:
            file_spec.loader.exec_module(module)
        except OSError:
            continue
        words = getattr(module, "ENGLISH_STOP_WORDS", None)
        if words:
            return frozenset(words)
    from sklearn.feature_extraction.text import ENGLISH_STOP_WORDS  # layout changed: import

    return frozenset(ENGLISH_STOP_WORDS)


ENGLISH_STOP_WORDS = _sklearn_stop_words()


def strip_accents_unicode(text: str) -> str:
    """Drop combining marks after NFKD decomposition (the same rule as scikit-learn's function
    of this name, written out to avoid importing sklearn.feature_extraction; a test compares
    the two)."""
    if text.isascii():
        return text
    decomposed = unicodedata.normalize("NFKD", text)
    return "".join(c for c in decomposed if not unicodedata.combining(c))


def _stopword_set(spec: str | tuple[str, ...]) -> frozenset[str]:
    if isinstance(spec, tuple):
        return frozenset(spec)
    if spec == "english":
        return frozenset(ENGLISH_STOP_WORDS)
    if spec in ("none", ""):
        return frozenset()
    raise ValueError(f"stopwords must be 'english', 'none' or a list of words, not {spec!r}")


class Analyzer:
    """Turns text into index terms the same way for articles and clues."""

    def __init__(self, config: AnalyzerConfig | None = None, **settings: Any) -> None:
        if config is None:
            config = AnalyzerConfig(**settings)
        elif settings:
            raise ValueError("pass either an AnalyzerConfig or keyword settings, not both")
        if config.normalization not in ("NFC", "NFKC", "NFD", "NFKD", "none"):
            raise ValueError(
                f"normalization must be NFC, NFKC, NFD, NFKD or none, not {config.normalization!r}"
            )
        self.config = config
        self._pattern = re.compile(config.token_pattern)
        self._find = (
            _default_words
            if config.token_pattern == DEFAULT_TOKEN_PATTERN
            else self._pattern.findall
        )
        self._stopwords = _stopword_set(config.stopwords)
        if config.stemmer:
            try:
                # snowballstemmer uses the C PyStemmer when it is installed.
                self._stemmer = snowballstemmer.stemmer(config.stemmer)
            except KeyError as exc:
                raise ValueError(f"unknown stemmer language {config.stemmer!r}") from exc
        else:
            self._stemmer = None

    def normalize(self, text: str) -> str:
        """Unicode-normalize, case-fold and optionally strip accents."""
        if text.isascii():  # every normalization form and accent stripping leave ASCII as is
            return text.lower() if self.config.casefold else text
        if self.config.normalization != "none":
            form = cast(Literal["NFC", "NFD", "NFKC", "NFKD"], self.config.normalization)
            text = unicodedata.normalize(form, text)
        if self.config.casefold:
            text = text.casefold()
        if self.config.strip_accents:
            text = strip_accents_unicode(text)
        return text

    def words(self, text: str) -> list[str]:
        """Normalized words before stopword removal and stemming."""
        return self._find(self.normalize(text))

    def tokens(self, text: str) -> list[str]:
        """Index terms of `text`: words minus stopwords, stemmed."""
        stop = self._stopwords
        kept = [w for w in self._find(self.normalize(text)) if w not in stop]
        if self._stemmer is not None and kept:
            return list(self._stemmer.stemWords(kept))
        return kept

    def tokens_many(self, texts: Iterable[str]) -> list[list[str]]:
        """`tokens` for each text, normalizing and stemming all of them in one call each.

        Same result as calling `tokens` per text (normalization never creates or removes a
        line break once the texts' own line breaks are spaces), but far faster for many short
        texts such as titles.
        """
        items = [t.replace("\r", " ").replace("\n", " ") for t in texts]
        if not items:
            return []
        lines = self.normalize("\n".join(items)).split("\n")
        if len(lines) != len(items):  # a normalization form changed the line structure: be safe
            return [self.tokens(t) for t in items]
        stop, find = self._stopwords, self._find
        kept = [[w for w in find(line) if w not in stop] for line in lines]
        if self._stemmer is None:
            return kept
        flat = self._stemmer.stemWords([w for ws in kept for w in ws])
        out, pos = [], 0
        for ws in kept:
            out.append(list(flat[pos : pos + len(ws)]))
            pos += len(ws)
        return out

    def term_table(self) -> TermTable:
        """A fresh word-to-term-id table that analyzes each distinct word only once."""
        return TermTable(self)

    def term_ids(self, text: str, table: TermTable) -> list[int]:
        """Ids in `table` of `tokens(text)`, with -1 where a word is a stopword."""
        return list(map(table.__getitem__, self._find(self.normalize(text))))

    def __repr__(self) -> str:
        return f"Analyzer({self.config!r})"


def default_pattern(analyzer: Analyzer) -> bool:
    """Whether `analyzer` finds words with the default token pattern (ASCII text then needs
    no regular expression: the compiled indexing loop handles it)."""
    return analyzer._find is _default_words


class TermTable(dict[str, int]):
    """Maps a normalized word to the id of its term (-1 for stopwords), filled on first sight.

    Indexing runs the stopword check and the stemmer once per distinct word instead of
    once per occurrence; hits are plain dict lookups done in C by `map`.
    """

    def __init__(self, analyzer: Analyzer) -> None:
        super().__init__()
        self._stop = analyzer._stopwords
        self._stem = analyzer._stemmer.stemWord if analyzer._stemmer is not None else None
        self.terms: list[str] = []
        self._ids: dict[str, int] = {}

    def __missing__(self, word: str) -> int:
        if word in self._stop:
            tid = -1
        else:
            term = self._stem(word) if self._stem is not None else word
            tid = self._ids.get(term, -1)
            if tid < 0:
                tid = self._ids[term] = len(self.terms)
                self.terms.append(term)
        self[word] = tid
        return tid

    def parts(self) -> tuple[Any, Any, dict[str, int], list[str]]:
        """What __missing__ uses (stop words, stemmer or None, term ids, terms), for the
        compiled loop (retriever/_analysis.c), which adds new words by the same steps."""
        return self._stop, self._stem, self._ids, self.terms
