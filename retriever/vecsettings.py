"""How word vectors are trained and article vectors stored (`VectorSettings`, kept in the
manifest), and how many training passes a corpus of a given size gets."""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

# Epochs from the corpus's size: about TOKEN_PASSES tokens trained on in all, within
# [MIN_EPOCHS, MAX_EPOCHS]. Measured on FOLDOC (495,000 tokens), the vectors alone on the
# 196 Jargon training clues (tests/opendata/vector_curve.py; the test clues never read),
# after 1 / 5 / 10 / 20 / 40 epochs: recall@100 0.08 / 0.37 / 0.43 / 0.49 / 0.53, top-1
# 0.01 / 0.08 / 0.15 / 0.19 / 0.21, still rising at 40. So about 40 passes over a corpus
# that small (20M tokens in all), 6 over the 100,000-article demo corpus (3.6M tokens),
# word2vec's usual 5 from 4M tokens on, and never more than 40 (build time).
TOKEN_PASSES, MIN_EPOCHS, MAX_EPOCHS = 20_000_000, 5, 40


@dataclass(frozen=True)
class VectorSettings:
    """How word vectors are trained and article vectors stored; kept in the manifest."""

    dim: int = 200
    window: int = 5
    # 0: from the corpus's token count (`epochs_for_tokens`); the manifest stores the number
    # of epochs the vectors were trained with.
    epochs: int = 0
    min_count: int = 2
    negative: int = 5
    sample: float = 1e-3
    seed: int = 1
    dtype: str = "float32"
    # Approximate search from this many articles on. Measured on the invented corpus at 100k
    # (tests/benchmarks/bench_dense.py): exact search costs about 30x the BM25 query there,
    # and about one BM25 query already at 5k-10k articles.
    ann_min_articles: int = 10_000
    ann_m: int = 16  # HNSW graph degree
    ann_ef_construction: int = 100
    # 256: recall@10 0.985 against exact at 1M articles in 0.39 ms (p50), a fifth of a BM25
    # query there (128 gave 0.976; at 100k, 128 gave recall@20 0.988 and 256 0.997 in 0.58 ms).
    ann_ef_search: int = 256
    # Training threads; 0: up to 4 of this machine's cores. Only 1 gives the very same
    # vectors on every build (gensim's threads update shared weights in no fixed order).
    threads: int = 0

    def __post_init__(self) -> None:
        for name in ("dim", "window", "min_count", "negative", "ann_m"):
            if int(getattr(self, name)) < 1:
                raise ValueError(f"vector setting {name} must be at least 1")
        if int(self.epochs) < 0:
            raise ValueError("vector setting epochs must be 0 (from the corpus's size) or more")
        if int(self.threads) < 0:
            raise ValueError("vector setting threads must be 0 (up to 4 cores) or more")
        if self.dtype not in ("float32", "float16"):
            raise ValueError(f"vector dtype must be float32 or float16, got {self.dtype!r}")
        if self.ann_min_articles < 1 or self.ann_ef_search < 1 or self.ann_ef_construction < 1:
            raise ValueError("ANN settings must be at least 1")

    def to_dict(self) -> dict[str, Any]:
        """Plain-JSON form."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> VectorSettings:
        """Settings written by `to_dict`, rejecting unknown keys."""
        unknown = set(data) - set(cls.__dataclass_fields__)
        if unknown:
            raise ValueError(f"unknown vector settings: {sorted(unknown)}")
        return cls(**data)


def epochs_for_tokens(tokens: int) -> int:
    """Training epochs for a corpus of `tokens` analyzed tokens: about `TOKEN_PASSES` token
    passes in all, at least `MIN_EPOCHS` and at most `MAX_EPOCHS`. Small corpora need more
    passes than word2vec's usual 5 (measured on FOLDOC, see `TOKEN_PASSES`)."""
    return max(MIN_EPOCHS, min(MAX_EPOCHS, round(TOKEN_PASSES / max(tokens, 1))))


def resolve_settings(value: Any) -> VectorSettings | None:
    """The `vectors` build option: True/None (defaults), False/'off' (none), a dict or settings."""
    if value is None or value is True or value == "on":
        return VectorSettings()
    if value is False or value == "off":
        return None
    if isinstance(value, VectorSettings):
        return value
    if isinstance(value, dict):
        return VectorSettings.from_dict(value)
    raise TypeError(
        f"vectors must be True, False, 'on', 'off', a dict or VectorSettings: {value!r}"
    )
