"""Retrieval core: read a corpus, build a BM25 index folder, search it."""

from __future__ import annotations

from .analyzer import Analyzer, AnalyzerConfig
from .bm25 import BM25Params
from .build import build_index, check_titles, update_index
from .corpus import Article, ReadReport, read_articles, split_title
from .errors import CorpusError, FilterError, IndexFormatError, RetrieverError, UnknownDocumentError
from .index import Document, Hit, Index, load_index

__all__ = [
    "Analyzer",
    "AnalyzerConfig",
    "Article",
    "BM25Params",
    "CorpusError",
    "Document",
    "FilterError",
    "Hit",
    "Index",
    "IndexFormatError",
    "ReadReport",
    "RetrieverError",
    "UnknownDocumentError",
    "build_index",
    "check_titles",
    "load_index",
    "read_articles",
    "split_title",
    "update_index",
]
