"""The compiled top-k kernel against the numpy path, and the kernel's guards."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from retriever import Index, scoring

from .helpers import plain_index

WORDS = st.sampled_from(["ash", "birch", "cedar", "elm", "fir", "oak", "pine", "yew"])
needs_kernel = pytest.mark.skipif(not scoring.compiled(), reason="retriever._kernels is not built")


def test_kernel_is_built_where_required() -> None:
    # .ci/run sets HUNCHWISE_REQUIRE_KERNEL=1: there the compiled path must be the one tested.
    if os.environ.get("HUNCHWISE_REQUIRE_KERNEL") == "1":
        assert scoring.compiled(), "retriever._kernels did not build (is a C compiler installed?)"


def both_paths(idx: Index, token_lists: list[list[str]], k: int) -> tuple[list, list]:
    p = idx._plan(token_lists)
    buf = idx._buffer()
    fast = scoring.top_k_many(buf, p, k)
    assert not buf.any(), "the kernel must leave the buffer zeroed"
    slow = scoring.top_k_many(buf, p, k, use_kernel=False)
    assert not buf.any(), "the numpy path must leave the buffer zeroed"
    return fast, slow


@needs_kernel
@settings(max_examples=60, deadline=None)
@given(
    docs=st.lists(st.lists(WORDS, min_size=1, max_size=25), min_size=1, max_size=40),
    queries=st.lists(st.lists(WORDS, min_size=0, max_size=10), min_size=1, max_size=6),
    k=st.integers(1, 50),
    title_weight=st.sampled_from([0.0, 2.0]),
)
def test_kernel_equals_numpy_path_bit_for_bit(
    tmp_path_factory: pytest.TempPathFactory,
    docs: list[list[str]],
    queries: list[list[str]],
    k: int,
    title_weight: float,
) -> None:
    # Small random corpora give both weight types (float64 when an IDF is negative), terms
    # in every article, repeated query terms, empty and unknown-only queries and k above the
    # corpus size; rows and scores must be identical, not just close.
    idx = plain_index(tmp_path_factory.mktemp("k"), docs, title_weight=title_weight)
    fast, slow = both_paths(idx, queries, k)
    assert len(fast) == len(slow) == len(queries)
    for (fr, fs), (sr, ss) in zip(fast, slow, strict=True):
        assert fr.tolist() == sr.tolist()
        assert fs.tolist() == ss.tolist()


@needs_kernel
def test_kernel_on_a_larger_corpus_both_weight_types(tmp_path: Path) -> None:
    # Dense queries (postings at least half the corpus) take the kernel's full-scan branch;
    # sparse ones its touched-list branch; both weight types are covered.
    rng = np.random.default_rng(5)
    vocab = [f"w{i}" for i in range(300)]
    docs = [list(rng.choice(vocab, size=int(rng.integers(3, 40)), p=None)) for _ in range(800)]
    f32 = plain_index(tmp_path, docs, name="f32")
    # Every article holds most of a tiny vocabulary: every IDF is negative, so float64.
    common = [[w for w in vocab[:12] if rng.random() < 0.9] or ["w0"] for _ in range(800)]
    f64 = plain_index(tmp_path, common, name="f64")
    assert f32.body.weight.dtype == np.float32 and f64.body.weight.dtype == np.float64
    queries = [list(rng.choice(vocab, size=int(n))) for n in (1, 3, 30, 120, 300)]
    queries += [vocab[:2], vocab[:12]]
    for idx in (f32, f64):
        fast, slow = both_paths(idx, queries, 20)
        for q, (fr, fs), (sr, ss) in zip(queries, fast, slow, strict=True):
            assert fr.tolist() == sr.tolist() and fs.tolist() == ss.tolist()
            assert fr.size == min(20, int(np.count_nonzero(idx.score_tokens(q))))


@needs_kernel
def test_kernel_rejects_bad_plans_and_damaged_postings(tmp_path: Path) -> None:
    idx = plain_index(tmp_path, [["ash", "elm"], ["elm"], ["oak"]])
    p = idx._plan([["elm", "oak"]])
    buf = idx._buffer()
    body = idx.body
    fields = ((body.indptr, body.docs, body.weight, 1.0),)
    out = (np.empty(4, np.int64), np.empty(4), np.empty(1, np.int64))
    touched = np.empty(idx.n_docs, dtype=np.int32)

    def call(k: int = 4, fields: tuple = fields, **change: np.ndarray) -> None:
        args = {"qptr": p.qptr, "tids": p.tids, "qtf": p.qtf, **change}
        scoring._kernels.search(
            buf, touched, k, fields, args["qptr"], args["tids"], args["qtf"], *out
        )

    with pytest.raises(ValueError, match="vocabulary"):
        call(tids=p.tids + 1000)
    with pytest.raises(ValueError, match="qptr"):
        call(qptr=np.array([0, 99], dtype=np.int64))
    with pytest.raises(ValueError, match="differ in length"):
        call(qtf=p.qtf[:1])
    with pytest.raises(TypeError, match="qtf"):
        call(qtf=p.qtf.astype(np.float32))
    with pytest.raises(ValueError, match="k must be at least 1"):
        call(k=0)
    with pytest.raises(ValueError, match="too small"):
        call(k=40)
    with pytest.raises(ValueError, match="one int32 slot per article"):
        scoring._kernels.search(buf, touched[:1], 4, fields, p.qptr, p.tids, p.qtf, *out)
    bad_indptr = body.indptr.copy()
    bad_indptr[-1] += 50
    with pytest.raises(ValueError, match="outside the field"):
        call(
            tids=np.array([body.indptr.size - 2, 0], dtype=np.int64),
            fields=((bad_indptr, body.docs, body.weight, 1.0),),
        )
    # A posting naming a row past the corpus: an error, and the buffer is left clean.
    bad_docs = body.docs.copy()
    bad_docs[:] = 1_000
    with pytest.raises(ValueError, match="damaged"):
        call(fields=((body.indptr, bad_docs, body.weight, 1.0),))
    assert not buf.any()
    assert [h.doc_id for h in idx.search_tokens(["elm", "oak"], 4)]  # still answers


@settings(max_examples=60, deadline=None)
@given(
    docs=st.lists(st.lists(WORDS, min_size=0, max_size=25), min_size=1, max_size=30),
    clue=st.lists(WORDS, min_size=0, max_size=8),
    data=st.data(),
)
def test_term_overlap_counts_shared_terms(
    tmp_path_factory: pytest.TempPathFactory,
    docs: list[list[str]],
    clue: list[str],
    data: st.DataObject,
) -> None:
    # Reference: Python sets of each article's words; both paths must agree with it and
    # with each other bit for bit.
    docs = [d or ["yew"] for d in docs]
    idx = plain_index(tmp_path_factory.mktemp("o"), docs)
    rows = np.array(data.draw(st.lists(st.integers(0, len(docs) - 1), max_size=12)), dtype=np.int64)
    known = sorted({int(i) for i in idx.vocab.lookup(sorted(set(clue))) if i >= 0})
    tids = np.array(known, dtype=np.int64)
    weights = np.array([0.5 + t / 3 for t in known])
    word_of = {int(idx.vocab.lookup([w])[0]): w for w in set(clue)}
    fast = idx.term_overlap(rows, tids, weights)
    slow = scoring.overlap(idx._fwd_indptr, idx._fwd_terms, rows, tids, weights, use_kernel=False)
    for r, c, w in zip(rows.tolist(), *fast, strict=True):
        shared = [t for t in known if word_of[t] in set(docs[r])]
        assert c == len(shared)
        assert w == pytest.approx(sum(0.5 + t / 3 for t in shared), rel=1e-12)
    assert fast[0].tolist() == slow[0].tolist() and fast[1].tolist() == slow[1].tolist()


@needs_kernel
def test_overlap_kernel_rejects_bad_input(tmp_path: Path) -> None:
    idx = plain_index(tmp_path, [["ash", "elm"], ["elm"]])
    ip, terms = idx._fwd_indptr, idx._fwd_terms
    tids, w = np.array([0, 1], dtype=np.int64), np.ones(2)
    with pytest.raises(ValueError, match="outside the term lists"):
        scoring.overlap(ip, terms, np.array([5]), tids, w)
    with pytest.raises(ValueError, match="sorted and distinct"):
        scoring.overlap(ip, terms, np.array([0]), tids[::-1], w)
    with pytest.raises(ValueError, match="do not match"):
        scoring.overlap(ip, terms, np.array([0]), tids, np.ones(3))


@settings(max_examples=60, deadline=None)
@given(
    docs=st.lists(st.lists(WORDS, min_size=0, max_size=25), min_size=1, max_size=40),
    clue=st.lists(WORDS, min_size=0, max_size=10),
    title_weight=st.sampled_from([0.0, 2.0]),
    data=st.data(),
)
def test_scores_of_some_rows_equal_the_whole_corpus_scores_bit_for_bit(
    tmp_path_factory: pytest.TempPathFactory,
    docs: list[list[str]],
    clue: list[str],
    title_weight: float,
    data: st.DataObject,
) -> None:
    # Rows in any order, repeated, holding none of the clue's terms; both weight types.
    idx = plain_index(tmp_path_factory.mktemp("r"), docs, title_weight=title_weight)
    rows = data.draw(st.lists(st.integers(0, len(docs) - 1), max_size=2 * len(docs)))
    full = idx.score_tokens(clue)
    some = idx.score_rows(clue, np.array(rows, dtype=np.int64))
    assert set(some) == set(rows)
    assert [some[r] for r in rows] == full[rows].tolist()
