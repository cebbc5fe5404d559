"""Shared fixtures: a hand-made five-article corpus, a small invented world, and the demo corpus.

The expensive things (the demo index, the model trained on its train split, its evaluation)
are session-scoped so they run once per test session.
"""

from __future__ import annotations

import json
import shutil
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from reranker import load_model
from reranker.training import train
from reranker.training.evaluate import Evaluation, evaluate
from reranker.training.train import TrainResult
from retriever import Index, build_index

HERE = Path(__file__).resolve().parent
REPO = HERE.parents[1]
COMMITTED_DEMO = REPO / "corpus_demo" / "data"
DEMO_FILES = ("articles.jsonl", "questions_train.jsonl", "questions_test.jsonl")


def write_jsonl(path: Path, records: Iterable[Any]) -> Path:
    """Write one JSON value per line (strings are written as they are, for bad-line tests)."""
    with open(path, "w", encoding="utf-8") as fh:
        for rec in records:
            fh.write((rec if isinstance(rec, str) else json.dumps(rec)) + "\n")
    return path


@pytest.fixture(name="jsonl")
def _jsonl() -> Callable[[Path, Iterable[Any]], Path]:
    """The write_jsonl helper, for tests."""
    return write_jsonl


# -- the five-article corpus whose feature values are worked out by hand in test_builtin -------
# No stemming and no stopwords, so every token is a lower-cased word of two or more letters.
TINY_ANALYZER: dict[str, Any] = {"stemmer": None, "stopwords": "none"}
TINY_RECORDS: list[dict[str, Any]] = [
    {
        "id": "a1",
        "title": "Ostrel (river)",
        "text": "ostrel flows past grey stone hills",
        "links": ["Varn Stone (town)", "Pellomir"],
        "aliases": ["Old Ostrel"],
        "popularity": 99,
    },
    {
        "id": "a2",
        "title": "Varn Stone (town)",
        "text": "varn is a town on the ostrel river with stone bridges",
        "links": ["Ostrel (river)"],
    },
    {
        "id": "a3",
        "title": "Pellomir",
        "text": "pellomir is a grey hill town",
        # the repeated link counts once: in-links count distinct linking articles
        "links": ["Ostrel (river)", "Ostrel (river)", "Varn Stone (town)"],
        "aliases": ["Pellomir Hill", "Grey Pellomir"],
        "popularity": 0,
    },
    {
        "id": "a4",
        "title": "Kesvin (river)",
        "text": "kesvin is a small river",
        "links": ["ostrel (river)"],
        "popularity": 3,
    },
    {
        "id": "a5",
        "title": "Drum (stone instrument)",
        "text": "drum made of stone",
        "links": ["Drum (stone instrument)"],  # a self-link is not an in-link
        "popularity": 7,
    },
]


@pytest.fixture(scope="session")
def tiny_index(tmp_path_factory: pytest.TempPathFactory) -> Index:
    """Index of TINY_RECORDS (no stemming, no stopwords)."""
    return build_index(TINY_RECORDS, tmp_path_factory.mktemp("tiny") / "index", **TINY_ANALYZER)


# -- a small invented world: enough clues for 5-fold grouped CV, trains in a few seconds -------
SYLLABLES = (
    "ka",
    "lo",
    "mi",
    "ren",
    "dus",
    "tor",
    "vel",
    "shi",
    "pan",
    "gor",
    "eth",
    "ul",
    "zar",
    "bri",
    "nok",
    "fae",
    "qui",
    "sol",
    "mar",
    "tev",
    "bel",
    "cran",
    "dro",
    "fen",
    "hul",
)
KINDS = ("river", "town", "song", "ship", "painter")
SOURCES = ("Alpha", "Beta", "Gamma")


@dataclass(frozen=True)
class World:
    """Files of a small invented corpus with labelled train and test logs, and its index."""

    articles: Path
    train_log: Path
    test_log: Path
    index: Index
    n_unresolved_train: int


def _invented_words(rng: np.random.Generator, n: int) -> list[str]:
    words: set[str] = set()
    while len(words) < n:
        k = int(rng.integers(2, 4))
        words.add("".join(rng.choice(SYLLABLES, k)))
    return sorted(words)


def make_world(folder: Path, *, seed: int = 11, n_articles: int = 80, n_clues: int = 160) -> World:
    """Write a small invented corpus plus train/test logs (3/4 and 1/4 of the clues)."""
    rng = np.random.default_rng(seed)
    words = _invented_words(rng, 420)
    rng.shuffle(words)
    names, attrs = words[:n_articles], words[n_articles:]
    titles, articles, facts = [], [], []
    for i, name in enumerate(names):
        kind = KINDS[i % len(KINDS)]
        title = f"{name.capitalize()} ({kind})" if i % 3 == 0 else name.capitalize()
        titles.append(title)
        chosen = [str(a) for a in rng.choice(attrs, 10, replace=False)]
        facts.append(chosen)
    for i, name in enumerate(names):
        kind = KINDS[i % len(KINDS)]
        links = [titles[int(j)] for j in rng.choice(n_articles, int(rng.integers(0, 5)))]
        text = f"{name} is a {kind}. " + " ".join(f"It is known for {a}." for a in facts[i])
        articles.append(
            {
                "id": f"w{i:03d}",
                "title": titles[i],
                "text": text,
                "links": links,
                "aliases": [f"Old {name.capitalize()}"],
                "popularity": None if i % 5 == 4 else int(rng.integers(0, 500)),
            }
        )
    clues = []
    for c in range(n_clues):
        i = int(rng.integers(0, n_articles))
        kind = KINDS[i % len(KINDS)]
        own = [str(a) for a in rng.choice(facts[i], int(rng.integers(2, 6)), replace=False)]
        noise = [str(a) for a in rng.choice(attrs, 2, replace=False)]
        body = own + noise
        rng.shuffle(body)
        form = c % 4
        answer = [
            f"w{i:03d}",
            titles[i],
            "  " + titles[i].upper() + " ",
            f"old {names[i]}",
        ][form]
        clues.append(
            {
                "clue": f"This {kind} is known for " + " ".join(body),
                "answer": answer,
                "metadata": {"difficulty": int(rng.integers(1, 6)), "source": SOURCES[c % 3]},
            }
        )
    n_train = n_clues * 3 // 4
    unresolved = [
        {"clue": "This town is known for nothing at all", "answer": "No Such Place"},
        {"clue": "This ship is known for very little", "answer": "w999"},
    ]
    folder.mkdir(parents=True, exist_ok=True)
    write_jsonl(folder / "articles.jsonl", articles)
    write_jsonl(folder / "train.jsonl", clues[:n_train] + unresolved)
    write_jsonl(folder / "test.jsonl", clues[n_train:])
    index = build_index(folder / "articles.jsonl", folder / "index")
    return World(folder / "articles.jsonl", folder / "train.jsonl", folder / "test.jsonl", index, 2)


@pytest.fixture(scope="session")
def world(tmp_path_factory: pytest.TempPathFactory) -> World:
    """The small invented world."""
    return make_world(tmp_path_factory.mktemp("world"))


@pytest.fixture(scope="session")
def world_model_path(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Where the small world's model is saved (tests that tamper with it work on a copy)."""
    return tmp_path_factory.mktemp("world_model") / "model.json"


@pytest.fixture(scope="session")
def world_trained(world: World, world_model_path: Path) -> TrainResult:
    """A model trained on the small world's train log, saved as JSON at world_model_path."""
    return train(world.index, [world.train_log], world_model_path)


# -- the demo corpus ---------------------------------------------------------------------------
@pytest.fixture(scope="session")
def demo_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The committed demo files if all are present, otherwise freshly generated ones."""
    if all((COMMITTED_DEMO / f).exists() for f in DEMO_FILES):
        out = tmp_path_factory.mktemp("demo")
        for f in DEMO_FILES:
            shutil.copy(COMMITTED_DEMO / f, out / f)
        return out
    from corpus_demo.generate import main as generate

    out = tmp_path_factory.mktemp("demo")
    argv = ["--articles", "3000", "--questions", "1200", "--seed", "7", "--out", str(out)]
    assert generate([*argv, "--no-progress"]) == 0
    return out


@pytest.fixture(scope="session")
def demo_index(demo_dir: Path) -> Index:
    """BM25 index of the demo articles."""
    return build_index(demo_dir / "articles.jsonl", demo_dir / "index")


@pytest.fixture(scope="session")
def demo_trained(demo_index: Index, demo_dir: Path) -> TrainResult:
    """The full model trained once on the demo train split."""
    return train(demo_index, [demo_dir / "questions_train.jsonl"], demo_dir / "model.json")


@pytest.fixture(scope="session")
def demo_score_only(demo_index: Index, demo_dir: Path) -> TrainResult:
    """The score-only model (BM25 score as the single feature) trained on the same split."""
    return train(
        demo_index,
        [demo_dir / "questions_train.jsonl"],
        demo_dir / "score_only.json",
        features=["bm25_score"],
    )


@pytest.fixture(scope="session")
def demo_evaluation(demo_trained: TrainResult, demo_index: Index, demo_dir: Path) -> Evaluation:
    """Evaluation of the demo model on the held-out test split, with its report folder."""
    model = load_model(demo_dir / "model.json", index=demo_index)
    return evaluate(demo_index, model, [demo_dir / "questions_test.jsonl"], demo_dir / "report")
