"""Writes the invented corpus and its questions to a folder, streaming article by article."""

from __future__ import annotations

import json
import random
from collections import Counter
from pathlib import Path

from corpus_demo.articles import render_article
from corpus_demo.questions import choose_answers, make_question
from corpus_demo.world import build_world

DEFAULT_DATA_DIR = Path(__file__).resolve().parent / "data"
DEFAULT_ARTICLES = 3000
DEFAULT_QUESTIONS = 1500
DEFAULT_SEED = 7
TRAIN_SHARE = 0.8
ARTICLES_FILE = "articles.jsonl"
TRAIN_FILE = "questions_train.jsonl"
TEST_FILE = "questions_test.jsonl"


def _dump(record: dict[str, object]) -> str:
    """Serialise one record as a JSON line (stable key order, UTF-8)."""
    return json.dumps(record, ensure_ascii=False) + "\n"


def generate_corpus(
    out_dir: str | Path,
    n_articles: int = DEFAULT_ARTICLES,
    n_questions: int = DEFAULT_QUESTIONS,
    seed: int = DEFAULT_SEED,
    progress: bool | None = None,
) -> dict[str, object]:
    """Write articles.jsonl and the two question files to out_dir; return counts and paths."""
    from tqdm import tqdm

    if n_articles < 50:
        raise ValueError("n_articles must be at least 50")
    if progress is None:
        progress = n_articles >= 50_000
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    world = build_world(n_articles, seed, progress=progress)
    answers = choose_answers(world, n_questions, seed)
    wanted = set(answers.tolist())
    alias_counts: Counter[str] = Counter()
    answer_aliases: dict[int, list[str]] = {}
    n_links = n_red = 0
    art_path = out / ARTICLES_FILE
    with art_path.open("w", encoding="utf-8", newline="\n") as fh:
        it = range(n_articles)
        if progress:
            it = tqdm(it, desc="articles", unit="art", mininterval=1.0)
        buf: list[str] = []
        for i in it:
            art = render_article(world, i)
            aliases = art["aliases"]
            assert isinstance(aliases, list)
            alias_counts.update(aliases)
            if i in wanted:
                answer_aliases[i] = aliases
            links = art["links"]
            assert isinstance(links, list)
            n_links += len(links)
            buf.append(_dump(art))
            if len(buf) >= 2000:
                fh.write("".join(buf))
                buf.clear()
        fh.write("".join(buf))
    n_red = len(world.red_titles)

    titles = set(world.titles)
    split_rng = random.Random(seed * 31 + 5)
    q_rng = random.Random(seed * 17 + 3)
    counts = {"train": 0, "test": 0}
    train_path, test_path = out / TRAIN_FILE, out / TEST_FILE
    with (
        train_path.open("w", encoding="utf-8", newline="\n") as ftr,
        test_path.open("w", encoding="utf-8", newline="\n") as fte,
    ):
        it_q = enumerate(answers.tolist(), start=1)
        if progress:
            it_q = tqdm(it_q, total=len(answers), desc="questions", unit="q")
        for q, i in it_q:
            aliases = answer_aliases[i]
            unique = bool(aliases) and all(
                alias_counts[a] == 1 and a not in titles for a in aliases[:1]
            )
            rec = make_question(world, i, q, q_rng, aliases, unique)
            if split_rng.random() < TRAIN_SHARE:
                ftr.write(_dump(rec))
                counts["train"] += 1
            else:
                fte.write(_dump(rec))
                counts["test"] += 1
    return {
        "articles": n_articles,
        "questions_train": counts["train"],
        "questions_test": counts["test"],
        "links": n_links,
        "missing_link_targets": n_red,
        "paths": {
            "articles": str(art_path),
            "questions_train": str(train_path),
            "questions_test": str(test_path),
        },
    }
