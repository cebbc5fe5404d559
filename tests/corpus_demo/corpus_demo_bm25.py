"""BM25 difficulty check of generated clues (run directly to print the figures).

Reference library: rank_bm25 on PyPI (``BM25Okapi`` with its default k1/b),
lowercase ``\\w+`` tokens and scikit-learn's ENGLISH_STOP_WORDS removed.
"""

from __future__ import annotations

import argparse
import json
import re
from pathlib import Path

import numpy as np
from rank_bm25 import BM25Okapi
from sklearn.feature_extraction.text import ENGLISH_STOP_WORDS

TOKEN_RE = re.compile(r"\w+")


def tokenize(text: str) -> list[str]:
    """Lowercase \\w+ tokens without English stop words."""
    return [t for t in TOKEN_RE.findall(text.lower()) if t not in ENGLISH_STOP_WORDS]


def load_jsonl(path: Path) -> list[dict]:
    """Read a JSON-lines file."""
    with path.open(encoding="utf-8") as fh:
        return [json.loads(line) for line in fh]


def resolve(articles: list[dict]) -> dict[str, str]:
    """Map ids, titles and aliases to article ids."""
    table: dict[str, str] = {}
    for a in articles:
        for alias in a["aliases"]:
            table.setdefault(alias, a["id"])
    for a in articles:
        table[a["title"]] = a["id"]
        table[a["id"]] = a["id"]
    return table


def measure(
    data_dir: Path, limit: int | None = None, prefix: float = 0.25, k: int = 20
) -> dict[str, float]:
    """Return BM25 top-1 / recall@k on full clues and on a word prefix of each clue."""
    articles = load_jsonl(data_dir / "articles.jsonl")
    questions = load_jsonl(data_dir / "questions_train.jsonl") + load_jsonl(
        data_dir / "questions_test.jsonl"
    )
    questions.sort(key=lambda q: q["id"])
    if limit is not None:
        questions = questions[:: max(1, len(questions) // limit)][:limit]
    ids = [a["id"] for a in articles]
    row = {aid: n for n, aid in enumerate(ids)}
    inlinks = np.zeros(len(articles), dtype=np.int64)
    title_row = {a["title"]: n for n, a in enumerate(articles)}
    for a in articles:
        for t in set(a["links"]):
            if t in title_row:
                inlinks[title_row[t]] += 1
    bm25 = BM25Okapi([tokenize(a["title"] + " " + a["text"]) for a in articles])
    table = resolve(articles)
    top1 = top1_prefix = recall = wrong = wrong_more_popular = 0
    for q in questions:
        gold = row[table[q["answer"]]]
        scores = bm25.get_scores(tokenize(q["clue"]))
        order = np.argsort(-scores, kind="stable")[:k]
        hit = int(order[0]) == gold
        top1 += hit
        recall += gold in order.tolist()
        if not hit:
            wrong += 1
            wrong_more_popular += inlinks[order[0]] > inlinks[gold]
        words = q["clue"].split()
        head = " ".join(words[: max(1, int(len(words) * prefix))])
        pscores = bm25.get_scores(tokenize(head))
        top1_prefix += int(np.argmax(pscores)) == gold
    n = max(1, len(questions))
    return {
        "questions": float(len(questions)),
        "top1_full": top1 / n,
        f"top1_prefix_{int(prefix * 100)}": top1_prefix / n,
        f"recall_at_{k}": recall / n,
        "wrong_top1_more_popular": wrong_more_popular / max(1, wrong),
    }


def main() -> None:
    """Print the difficulty figures for a data folder."""
    p = argparse.ArgumentParser(description="BM25 difficulty of generated clues")
    p.add_argument("--data", type=Path, default=Path("corpus_demo/data"))
    p.add_argument("--limit", type=int, default=None, help="sample this many questions")
    p.add_argument("--prefix", type=float, default=0.25)
    args = p.parse_args()
    print(json.dumps(measure(args.data, args.limit, args.prefix), indent=2))


if __name__ == "__main__":
    main()
