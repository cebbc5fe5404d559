"""Tests of the invented-corpus generator: determinism, schema, link graph and difficulty."""

from __future__ import annotations

import json
import re
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

from corpus_demo import DEFAULT_DATA_DIR, generate_corpus
from corpus_demo.generate import main
from tests.corpus_demo.corpus_demo_bm25 import measure

FILES = ("articles.jsonl", "questions_train.jsonl", "questions_test.jsonl")
ARTICLE_KEYS = ["id", "title", "text", "links", "aliases", "popularity", "metadata"]
QUALIFIER = re.compile(r"^(.+) \(([a-z]+)\)$")


def _read(path: Path) -> list[dict]:
    with path.open(encoding="utf-8") as fh:
        return [json.loads(line) for line in fh]


@pytest.fixture(scope="module")
def small(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("small")
    generate_corpus(out, n_articles=1500, n_questions=400, seed=11)
    return out


@pytest.fixture(scope="module")
def committed() -> tuple[list[dict], list[dict]]:
    arts = _read(DEFAULT_DATA_DIR / "articles.jsonl")
    qs = _read(DEFAULT_DATA_DIR / "questions_train.jsonl")
    qs += _read(DEFAULT_DATA_DIR / "questions_test.jsonl")
    return arts, qs


def test_same_seed_byte_identical_other_seed_differs(tmp_path: Path, small: Path) -> None:
    again, other = tmp_path / "again", tmp_path / "other"
    generate_corpus(again, n_articles=1500, n_questions=400, seed=11)
    generate_corpus(other, n_articles=1500, n_questions=400, seed=12)
    for name in FILES:
        assert (again / name).read_bytes() == (small / name).read_bytes()
        assert (other / name).read_bytes() != (small / name).read_bytes()


def test_committed_data_matches_default_generator(tmp_path: Path) -> None:
    info = generate_corpus(tmp_path)
    assert info["articles"] == 3000
    for name in FILES:
        assert (tmp_path / name).read_bytes() == (DEFAULT_DATA_DIR / name).read_bytes()
    total = sum((DEFAULT_DATA_DIR / n).stat().st_size for n in FILES)
    assert total < 5_000_000


def test_cli_writes_files(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rc = main(["--articles", "200", "--questions", "50", "--out", str(tmp_path)])
    assert rc == 0
    assert json.loads(capsys.readouterr().out)["articles"] == 200
    assert len(_read(tmp_path / "articles.jsonl")) == 200


def test_article_schema_and_uniqueness(small: Path) -> None:
    arts = _read(small / "articles.jsonl")
    assert len(arts) == 1500
    for a in arts:
        assert list(a) == ARTICLE_KEYS
        assert re.fullmatch(r"a\d{6}", a["id"])
        assert isinstance(a["title"], str) and a["title"]
        assert isinstance(a["text"], str) and a["text"].count(". ") >= 2
        assert all(isinstance(t, str) for t in a["links"])
        assert all(isinstance(t, str) for t in a["aliases"])
        assert isinstance(a["popularity"], int) and a["popularity"] >= 0
        assert {"kind", "era"} <= set(a["metadata"])
    assert len({a["id"] for a in arts}) == len(arts)
    assert len({a["title"] for a in arts}) == len(arts)
    assert sum(bool(a["aliases"]) for a in arts) > 0.1 * len(arts)


def test_links_mostly_resolvable(small: Path) -> None:
    arts = _read(small / "articles.jsonl")
    titles = {a["title"] for a in arts}
    links = [t for a in arts for t in a["links"]]
    missing = sum(t not in titles for t in links) / len(links)
    assert 0.003 < missing < 0.05  # a few links to absent titles, as in real dumps


def test_ambiguous_qualifier_groups(committed: tuple[list[dict], list[dict]]) -> None:
    arts, _ = committed
    by_base: Counter[str] = Counter()
    for a in arts:
        m = QUALIFIER.match(a["title"])
        by_base[m.group(1) if m else a["title"]] += 1
    in_groups = sum(c for c in by_base.values() if c > 1) / len(arts)
    assert 0.25 <= in_groups <= 0.35
    bare_with_siblings = [b for b, c in by_base.items() if c > 1 and b in by_base]
    titles = {a["title"] for a in arts}
    assert sum(b in titles for b in bare_with_siblings) > 50  # bare name + qualified ones


def test_inlinks_long_tailed(committed: tuple[list[dict], list[dict]]) -> None:
    arts, _ = committed
    row = {a["title"]: i for i, a in enumerate(arts)}
    inl = np.zeros(len(arts), dtype=np.int64)
    for a in arts:
        for t in set(a["links"]):
            if t in row:
                inl[row[t]] += 1
    # Long tail check (common practice, no source): hubs far above the median.
    assert inl.max() > 20 * max(1.0, float(np.median(inl)))
    assert np.mean(inl <= 3) > 0.4
    pop = np.array([a["popularity"] for a in arts], dtype=float)
    corr = np.corrcoef(np.log1p(pop), np.log1p(inl))[0, 1]
    assert 0.3 < corr < 0.98  # correlated with in-links, but not equal


def test_questions_schema_and_answers(committed: tuple[list[dict], list[dict]]) -> None:
    arts, qs = committed
    assert len(qs) >= 1200
    ids = {a["id"] for a in arts}
    names: Counter[str] = Counter()
    for a in arts:
        names.update([a["title"], *a["aliases"]])
    non_id = 0
    sources: set[str] = set()
    for q in qs:
        assert list(q) == ["id", "clue", "answer", "metadata"]
        assert re.fullmatch(r"q\d{5}", q["id"])
        md = q["metadata"]
        assert 1 <= md["difficulty"] <= 5 and isinstance(md["difficulty"], int)
        sources.add(md["source"])
        n_words = len(q["clue"].split())
        assert 25 <= n_words <= 140
        if q["answer"] not in ids:
            non_id += 1
            assert names[q["answer"]] == 1  # a title or a unique alias
    assert 0.05 < non_id / len(qs) < 0.15
    assert 3 <= len(sources) <= 6
    assert len({q["id"] for q in qs}) == len(qs)
    words = [len(q["clue"].split()) for q in qs]
    assert 40 <= np.median(words) <= 120


def test_clues_rarely_contain_answer_name(
    committed: tuple[list[dict], list[dict]],
) -> None:
    arts, qs = committed
    by_id = {a["id"]: a for a in arts}
    by_name = {a["title"]: a for a in arts}
    leaks = 0
    for q in qs:
        a = by_id.get(q["answer"]) or by_name.get(q["answer"])
        if a is None:
            continue
        base = QUALIFIER.sub(r"\1", a["title"])
        leaks += base.lower() in q["clue"].lower()
    assert leaks / len(qs) < 0.12


def test_bm25_difficulty_targets() -> None:
    # Reference library rank_bm25 on PyPI (BM25Okapi), \w+ tokens, sklearn stop words.
    got = measure(DEFAULT_DATA_DIR, limit=300)
    assert 0.50 <= got["top1_full"] <= 0.85
    assert got["recall_at_20"] >= 0.90
    assert 0.05 <= got["top1_prefix_25"] <= 0.35
    assert got["top1_prefix_25"] < got["top1_full"] - 0.3
    assert got["wrong_top1_more_popular"] >= 0.25
