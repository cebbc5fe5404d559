"""A loaded BM25 index: search one clue or many, and look articles up."""

from __future__ import annotations

import threading
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import Any, Literal, overload

import numpy as np

from . import batchpool, columns, hybrid, metafilter, scoring, store, vecgen
from .analyzer import Analyzer, AnalyzerConfig
from .batches import batch_threads
from .bm25 import BM25Params
from .dense import DenseSearcher
from .errors import IndexFormatError, UnknownDocumentError
from .fieldpostings import FieldPostings
from .hits import Hit, RowMask, TokenLists, ranked_hits
from .links import NameResolver
from .metacolumns import MetaColumns
from .sharded import ShardedIndex
from .storedvectors import DenseVectors

# The name retriever/shardview.py imports from here.
_FieldPostings = FieldPostings


@dataclass(frozen=True)
class Document:
    """One article's stored fields plus what the index derived from them."""

    id: str
    title: str
    base: str
    qualifier: str
    text: str
    links: tuple[str, ...]
    aliases: tuple[str, ...]
    popularity: float | None
    inlinks: int
    metadata: dict[str, Any]
    row: int


class Index(hybrid.HybridSearch):
    """A read-only BM25 index loaded from a folder; safe to search from many threads."""

    # Whether a search is done in this process (False: it waits on other processes, so a
    # server must not call it on its event loop).
    searches_in_process = True

    def __init__(self, folder: str | Path, *, title_weight: float | None = None) -> None:
        self.path = Path(folder)
        self.manifest = store.read_manifest(self.path)
        try:
            counts = self.manifest["counts"]
            self.n_docs: int = int(counts["articles"])
            self.n_terms: int = int(counts["terms"])
            self.analyzer = Analyzer(AnalyzerConfig.from_dict(self.manifest["analyzer"]))
            self.params = BM25Params(**self.manifest["bm25"])
            self.vocab = columns.Vocab(self.path, self.n_terms)
            n = self.n_docs
            self.ids = columns.StringColumn(self.path, "ids", n)
            self.titles = columns.StringColumn(self.path, "titles", n)
            self.bases = columns.StringColumn(self.path, "bases", n)
            self.qualifiers = columns.StringColumn(self.path, "qualifiers", n)
            self.aliases = columns.JsonListColumn(columns.StringColumn(self.path, "aliases", n))
            dtype = str(self.manifest["weights"])
            if dtype not in ("float32", "float64"):
                raise IndexFormatError(f"{self.path}: unknown weight type {dtype!r}; rebuild")
            self.body = FieldPostings(
                self.path, "body", self.n_terms, int(counts["body_postings"]), dtype
            )
            self.title_field = FieldPostings(
                self.path, "title", self.n_terms, int(counts["title_postings"]), dtype
            )
        except (KeyError, TypeError, ValueError, FileNotFoundError) as exc:
            if isinstance(exc, IndexFormatError):
                raise
            raise IndexFormatError(
                f"{self.path}: the index is incomplete or damaged ({exc!r}); rebuild it"
            ) from exc
        self.title_weight = (
            self.params.title_weight if title_weight is None else float(title_weight)
        )
        self.doc_len = store.open_array(self.path, "doc_len", "int32", self.n_docs)
        self._fwd_indptr = store.open_array(self.path, "body_fwd_indptr", "int64", self.n_docs + 1)
        body_postings = int(self.manifest["counts"]["body_postings"])
        self._fwd_terms = store.open_array(self.path, "body_fwd_terms", "int32", body_postings)
        if int(self._fwd_indptr[-1]) != body_postings:
            raise IndexFormatError(
                f"{self.path}: body_fwd_indptr does not match the postings; rebuild the index"
            )
        self.inlinks = store.open_array(self.path, "inlinks", "int32", self.n_docs)
        self.popularity = store.open_array(self.path, "popularity", "float64", self.n_docs)
        self._store = store.StoreReader(self.path, self.n_docs)
        self._local = threading.local()
        self._generations: dict[str, DenseSearcher] = {}
        self._generations_lock = threading.Lock()
        # Whether searches may skip postings that cannot change the top k (None: where it
        # pays, see scoring.prunable; False: score every posting). Same hits either way.
        self.prune: bool | None = None

    # -- identity -------------------------------------------------------
    @property
    def version(self) -> str:
        """Short identifier of this index's content and parameters."""
        return str(self.manifest["index_version"])

    @cached_property
    def resolver(self) -> NameResolver:
        """Name-to-row lookup over ids, titles and aliases (built on first use)."""
        return NameResolver(self.ids, self.titles, self.aliases)

    @cached_property
    def dense(self) -> DenseSearcher | None:
        """Nearest-article search over the word vectors, or None for an index without them."""
        vectors = DenseVectors.open(self.path, self.manifest)
        return DenseSearcher(vectors) if vectors is not None else None

    def dense_generation(self, name: str) -> DenseSearcher | None:
        """The dense searcher over vector generation `name` of this folder (retriever/vecgen.py),
        opened once; "" (or an index without vectors): the index's own, `dense`.
        IndexFormatError naming the folder when it lacks the generation."""
        if not name or self.dense is None:
            return self.dense
        with self._generations_lock:
            if name not in self._generations:
                self._generations[name] = DenseSearcher(vecgen.open_generation(self.path, name))
            return self._generations[name]

    @cached_property
    def meta_columns(self) -> MetaColumns:
        """The articles' metadata columns (opened on first use; IndexFormatError for an
        index built before them)."""
        return MetaColumns(self.path, self.n_docs)

    def filter_mask(self, spec: Mapping[str, Any]) -> np.ndarray:
        """Boolean mask of the rows a metadata filter keeps (see retriever/metafilter.py);
        FilterError names the field of a bad condition."""
        return metafilter.compile_filter(spec, self.meta_columns)

    def text_of(self, row: int) -> str:
        """The stored text of the article in `row`."""
        return str(self._store.record(row)["text"])

    def row_of(self, doc_id: str) -> int:
        """Row of an article id; raises UnknownDocumentError."""
        row = self.ids.find(doc_id)
        if row is None:
            raise UnknownDocumentError(doc_id)
        return row

    def resolve(self, name: str) -> str | None:
        """Article id that `name` (id, title, normalized title or alias) refers to, or None."""
        row = self.resolver.row(name)
        return None if row is None else self.ids[row]

    def document(self, doc_id: str) -> Document:
        """Stored fields of one article."""
        return self.document_at(self.row_of(doc_id))

    def document_at(self, row: int) -> Document:
        """Stored fields of the article in `row`."""
        rec = self._store.record(row)
        pop = float(self.popularity[row])
        return Document(
            id=rec["id"],
            title=rec["title"],
            base=self.bases[row],
            qualifier=self.qualifiers[row],
            text=rec["text"],
            links=tuple(rec["links"]),
            aliases=tuple(rec["aliases"]),
            popularity=None if np.isnan(pop) else pop,
            inlinks=int(self.inlinks[row]),
            metadata=rec["metadata"],
            row=row,
        )

    # -- scoring --------------------------------------------------------
    def term_ids(self, tokens: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
        """Known query terms as (term ids, counts in the query); unknown tokens are dropped."""
        counts = Counter(tokens)  # distinct tokens in first-seen order
        ids = self.vocab.lookup(list(counts))
        known = ids >= 0
        qtf = np.fromiter(counts.values(), np.float64, len(counts))
        return ids[known], qtf[known]

    def article_terms(self, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Distinct term ids of each article's text, for several rows at once.

        Returns (term ids of all the rows concatenated, sorted within each row; how many
        belong to each row). int32 and int64 arrays.
        """
        return scoring.article_terms(self._fwd_indptr, self._fwd_terms, rows)

    def article_term_lists(self) -> tuple[np.ndarray, np.ndarray]:
        """The article-major term lists: (indptr int64 (n_docs + 1), term ids int32); row r's
        distinct body terms, sorted, are terms[indptr[r]:indptr[r + 1]]."""
        return self._fwd_indptr, self._fwd_terms

    def term_overlap(
        self, rows: np.ndarray, tids: np.ndarray, weights: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """How many of the body terms `tids` (sorted, distinct) each article in `rows` holds,
        and the sum of their `weights`. float64 arrays, one entry per row."""
        return scoring.overlap(self._fwd_indptr, self._fwd_terms, rows, tids, weights)

    def _buffer(self) -> np.ndarray:
        """This thread's zeroed score buffer, one slot per article."""
        buf = getattr(self._local, "buf", None)
        if buf is None:
            buf = self._local.buf = np.zeros(self.n_docs, dtype=self.body.weight.dtype)
        return buf

    def _scratch(self) -> np.ndarray:
        """This thread's scratch list of touched articles for the kernel."""
        touched = getattr(self._local, "touched", None)
        if touched is None:
            touched = self._local.touched = np.empty(self.n_docs, dtype=np.int32)
        return touched

    def _plan(self, token_lists: Sequence[Sequence[str]]) -> scoring.Plan:
        """One plan for a batch of analyzed queries (each distinct token looked up once)."""
        distinct = list(dict.fromkeys(t for tokens in token_lists for t in tokens))
        tid_of = dict(zip(distinct, self.vocab.lookup(distinct).tolist(), strict=True))
        fields: list[tuple[scoring.Postings, float]] = [(self.body, 1.0)]
        if self.title_weight > 0:
            fields.append((self.title_field, self.title_weight))
        return scoring.plan(fields, [[tid_of[t] for t in tokens] for tokens in token_lists])

    def score_tokens(self, tokens: Sequence[str]) -> np.ndarray:
        """BM25 score of every article for already-analyzed tokens. float64, shape (n_docs,)."""
        scores = np.zeros(self.n_docs, dtype=self.body.weight.dtype)
        scoring.accumulate(scores, self._plan([tokens]))
        return scores.astype(np.float64)

    def bm25_of_rows(self, tokens: Sequence[str], rows: np.ndarray) -> np.ndarray:
        """BM25 scores of some articles for analyzed tokens, one per row, in order. float64.

        The same numbers as `score_tokens` (and `search_tokens`) give them, found by binary
        search in each query term's postings instead of scoring the whole corpus (used for
        the few articles a hybrid set takes from the vectors' pool alone).
        """
        rows = np.asarray(rows, dtype=np.int64)
        scores = scoring.score_rows(self._plan([tokens]), rows, self.body.weight.dtype)
        return scores.astype(np.float64)

    def score_rows(self, tokens: Sequence[str], rows: np.ndarray) -> dict[int, float]:
        """`bm25_of_rows` by row."""
        rows = np.asarray(rows, dtype=np.int64)
        return dict(zip(rows.tolist(), self.bm25_of_rows(tokens, rows).tolist(), strict=True))

    def search_tokens(
        self, tokens: Sequence[str], k: int = 20, *, allowed: np.ndarray | None = None
    ) -> list[Hit]:
        """Top-k articles for already-analyzed tokens, best first (ties by row).

        Candidates are the articles holding at least one known query term (and, with
        `allowed`, a boolean mask over the rows, only the rows it keeps).
        """
        return self.search_token_lists([tokens], k, allowed=allowed)[0]

    def search_token_lists(
        self, token_lists: TokenLists, k: int = 20, *, allowed: RowMask = None
    ) -> list[list[Hit]]:
        """`search_tokens` for each list of already-analyzed tokens, in this thread."""
        if k < 1:
            raise ValueError(f"k must be at least 1, got {k}")
        if not token_lists:
            return []
        if allowed is not None and allowed.shape != (self.n_docs,):
            raise ValueError(f"allowed must hold one entry per article ({self.n_docs})")
        plan = self._plan(token_lists)
        results = scoring.top_k_many(
            self._buffer(), plan, k, touched=self._scratch(), prune=self.prune, allowed=allowed
        )
        rows = np.concatenate([r for r, _ in results])
        return ranked_hits(results, self.ids.take(rows), self.titles.take(rows))

    def search(self, clue: str, k: int = 20) -> list[Hit]:
        """Top-k articles for a free-text clue, best first."""
        return self.search_tokens(self.analyzer.tokens(clue), k)

    def search_many(
        self, clues: Sequence[str], k: int = 20, *, threads: int | None = None
    ) -> list[list[Hit]]:
        """`search` for each clue, in order, on `threads` threads (default: see
        `batch_threads`; the kernel releases the GIL for batches this big). The hits are the
        same whatever the count."""
        threads = batch_threads(len(clues), threads)
        if k < 1:
            raise ValueError(f"k must be at least 1, got {k}")
        if threads <= 1 or len(clues) < 2:
            # one normalize and stem call for all
            return self.search_token_lists(self.analyzer.tokens_many(clues), k)
        # Chunks of at least 16 clues (the kernel releases the GIL for batches that big), each
        # analyzed by the thread that searches it, while the other threads' kernels run.
        return batchpool.map_chunks(
            lambda part: self.search_token_lists(self.analyzer.tokens_many(part), k),
            clues,
            threads,
            min_chunk=16,
        )

    def __len__(self) -> int:
        return self.n_docs

    def __repr__(self) -> str:
        return f"Index({str(self.path)!r}, articles={self.n_docs}, terms={self.n_terms})"


@overload
def load_index(
    folder: str | Path, *, title_weight: float | None = None, sharded: Literal[False] = False
) -> Index: ...
@overload
def load_index(
    folder: str | Path, *, title_weight: float | None = None, sharded: Literal[True]
) -> Index | ShardedIndex: ...
def load_index(
    folder: str | Path, *, title_weight: float | None = None, sharded: bool = False
) -> Index | ShardedIndex:
    """Open an index folder (arrays are memory-mapped, so loading is fast and shared).

    sharded=True also opens a sharded index's folder (retriever/shards.py) as a
    `ShardedIndex`, for search; without it such a folder is refused with a message saying
    so (`shardview.open_whole` opens it as one `Index`, for ranking and training).
    """
    if sharded and store.is_sharded(Path(folder)):
        return ShardedIndex(Path(folder), lambda path: Index(path, title_weight=title_weight))
    index = Index(folder, title_weight=title_weight)
    if "shard" in index.manifest:
        # Opened alone, one shard would search, serve or train on part of the corpus.
        raise IndexFormatError(
            f"{index.path} is one shard of the sharded index in {index.path.parent}; open "
            "that folder instead (load_index(..., sharded=True), or hunchwise search on it)"
        )
    return index
