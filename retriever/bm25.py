"""The Okapi BM25 formula as pure numpy functions over whole arrays.

Formula from Robertson and Zaragoza (2009), "The Probabilistic Relevance Framework:
BM25 and Beyond":  w(t, d) = idf(t) * tf * (k1 + 1) / (tf + k1 * (1 - b + b * dl / avgdl)).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

IDF_VARIANTS = ("okapi", "lucene")


@dataclass(frozen=True)
class BM25Params:
    """BM25 parameters; the defaults equal rank_bm25.BM25Okapi's."""

    k1: float = 1.5
    b: float = 0.75
    epsilon: float = 0.25
    idf: str = "okapi"
    title_weight: float = 0.0

    def __post_init__(self) -> None:
        if not self.k1 >= 0:
            raise ValueError(f"k1 must be >= 0, got {self.k1}")
        if not 0 <= self.b <= 1:
            raise ValueError(f"b must be between 0 and 1, got {self.b}")
        if self.idf not in IDF_VARIANTS:
            raise ValueError(f"idf must be one of {IDF_VARIANTS}, got {self.idf!r}")
        if not self.title_weight >= 0:
            raise ValueError(f"title_weight must be >= 0, got {self.title_weight}")

    def to_dict(self) -> dict[str, Any]:
        """Plain-JSON form."""
        return asdict(self)


def idf_okapi(df: np.ndarray, n_docs: int, epsilon: float) -> np.ndarray:
    """Okapi IDF log((N - df + 0.5) / (df + 0.5)) with rank_bm25's floor.

    Terms whose IDF is negative (df > N/2) get epsilon x the mean IDF over the
    vocabulary, exactly as rank_bm25.BM25Okapi does, so `df` must hold only terms that
    occur in the field (df >= 1): an absent term would shift the mean. float64.
    """
    df = np.asarray(df, dtype=np.float64)
    idf = np.log(n_docs - df + 0.5) - np.log(df + 0.5)
    if idf.size == 0:
        return idf
    floor = epsilon * (idf.sum() / idf.size)
    return np.where(idf < 0, floor, idf)


def idf_lucene(df: np.ndarray, n_docs: int) -> np.ndarray:
    """Always-positive IDF log(1 + (N - df + 0.5) / (df + 0.5)).

    As described in Kamphuis et al. (2020), "Which BM25 Do You Mean? A Large-Scale
    Reproducibility Study of Scoring Variants". float64, shape (n_terms,).
    """
    df = np.asarray(df, dtype=np.float64)
    return np.log1p((n_docs - df + 0.5) / (df + 0.5))


def idf(df: np.ndarray, n_docs: int, params: BM25Params) -> np.ndarray:
    """IDF of each term under the chosen variant."""
    if params.idf == "lucene":
        return idf_lucene(df, n_docs)
    return idf_okapi(df, n_docs, params.epsilon)


def term_weights(
    tf: np.ndarray, dl: np.ndarray, term_idf: np.ndarray, avgdl: float, k1: float, b: float
) -> np.ndarray:
    """BM25 weight of each posting; all inputs are per posting. float64, shape (n_postings,).

    The index stores them as float32 unless some are negative (see build.weight_dtype).
    """
    tf = np.asarray(tf, dtype=np.float64)
    if avgdl > 0:
        norm = k1 * (1.0 - b + b * np.asarray(dl, dtype=np.float64) / avgdl)
    else:
        norm = np.full(tf.shape, k1 * (1.0 - b))
    with np.errstate(divide="ignore", invalid="ignore"):
        w = term_idf * (tf * (k1 + 1.0)) / (tf + norm)
    return np.nan_to_num(w, nan=0.0)
