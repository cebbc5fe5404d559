"""Real data: FOLDOC from Debian's dict-foldoc, indexed and checked against the raw dictd files."""

from __future__ import annotations

import gzip
import re
from collections import defaultdict
from typing import Any

import numpy as np
import pytest
from rank_bm25 import BM25Okapi

from retriever import Index, build_index

from .foldoc import (
    CROSS_REF,
    FOLDOC_DICT,
    FOLDOC_INDEX,
    b64_number,
    link_name,
    read_foldoc,
    require_foldoc,
)


@pytest.fixture(scope="module")
def foldoc(tmp_path_factory: pytest.TempPathFactory) -> tuple[list[dict[str, Any]], Index]:
    require_foldoc()
    records = read_foldoc()
    # No word vectors: these tests search with BM25 only, and FOLDOC's vectors take 40 epochs.
    return records, build_index(records, tmp_path_factory.mktemp("foldoc") / "idx", vectors=False)


def test_b64_numbers() -> None:
    # dictd's base64 digits, most significant first: "BA" = 1 * 64 + 0.
    assert b64_number("A") == 0 and b64_number("BA") == 64 and b64_number("/") == 63


def test_reader_covers_the_dictd_index(foldoc: tuple[list[dict[str, Any]], Index]) -> None:
    records, idx = foldoc
    headwords = {line.split("\t")[0] for line in FOLDOC_INDEX.read_text().splitlines()}
    assert len(records) > 10_000 and idx.n_docs == len(records)
    # Every title is one of dictd's headwords (lower-cased there).
    assert all(r["title"].casefold() in headwords or r["title"] in headwords for r in records[:500])


def test_inlinks_match_a_direct_count_of_cross_references(
    foldoc: tuple[list[dict[str, Any]], Index],
) -> None:
    records, idx = foldoc
    # Direct count from the raw dictionary text: each entry's distinct `{...}` targets,
    # found by exact title, else by title ignoring case (and "_" for a space, as wiki-style
    # names write it), else by an alias shared by no other entry.
    exact = {r["title"]: i for i, r in enumerate(records)}
    folded: dict[str, int] = {}
    for i, r in enumerate(records):
        folded.setdefault(r["title"].casefold(), i)
    alias_rows: dict[str, set[int]] = defaultdict(set)
    for i, r in enumerate(records):
        for a in r["aliases"]:
            alias_rows[a.casefold()].add(i)
    alias = {a: next(iter(rows)) for a, rows in alias_rows.items() if len(rows) == 1}
    lengths: dict[int, int] = {}
    for line in FOLDOC_INDEX.read_text(encoding="utf-8").splitlines():
        _, start, size = line.split("\t")
        lengths[b64_number(start)] = b64_number(size)
    expected = np.zeros(len(records), dtype=np.int64)
    unresolved = 0
    with gzip.open(FOLDOC_DICT) as fh:
        raw = fh.read()
    for src, r in enumerate(records):
        off = int(r["id"].split("-")[1])
        # The entry's bytes per the dictd index; its body follows the headword block.
        entry = raw[off : off + lengths[off]].decode("utf-8")
        entry_body = entry.partition("\n\n")[2]
        targets = set()
        for ref in CROSS_REF.findall(entry_body):
            name = link_name(ref)
            loose = " ".join(name.casefold().replace("_", " ").split())
            row = exact.get(name, folded.get(loose, alias.get(loose)))
            if row is None:
                unresolved += 1
            elif row != src:
                targets.add(row)
        for t in targets:
            expected[t] += 1
    assert int(expected.sum()) > 20_000
    assert np.array_equal(idx.inlinks, expected)
    assert idx.manifest["counts"]["unresolved_links"] == unresolved > 0


@pytest.mark.parametrize(
    "title", ["Unix", "Ethernet", "compiler", "Fortran", "Linux", "Emacs", "Java"]
)
def test_first_sentence_finds_its_entry(
    foldoc: tuple[list[dict[str, Any]], Index], title: str
) -> None:
    records, idx = foldoc
    text = next(r["text"] for r in records if r["title"] == title)
    # The first sentence after the "<subject>" tag.
    first = re.match(r"(?:<[^>]*>\s*)?(.+?[.!?])(\s|$)", text)
    assert first is not None
    hits = idx.search(first.group(1), k=5)
    assert hits[0].title == title


def test_scores_match_rank_bm25_on_foldoc(foldoc: tuple[list[dict[str, Any]], Index]) -> None:
    # Reference: rank_bm25.BM25Okapi over the same analyzer tokens, every article's score.
    records, idx = foldoc
    docs = [idx.analyzer.tokens(r["text"]) for r in records]
    ref = BM25Okapi(docs)
    for clue in [
        "a lazy purely functional language",
        "the network protocol for mail transfer",
        "compiler optimisation of loops in the back end",
        "data the of and",
    ]:
        tokens = idx.analyzer.tokens(clue)
        assert np.allclose(idx.score_tokens(tokens), ref.get_scores(tokens), rtol=1e-5, atol=1e-12)
