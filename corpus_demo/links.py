"""Link-target sampling (cluster-local or Zipf by fame) and back-mention ("echo") choice."""

from __future__ import annotations

import random

import numpy as np

from corpus_demo.kinds import KINDS

MAX_ECHOES = 8


class RefSampler:
    """Draws link targets of a kind: often from the same topical cluster, else by fame."""

    def __init__(
        self, rng: np.random.Generator, kinds: np.ndarray, w: np.ndarray,
        cluster: np.ndarray,
    ) -> None:  # fmt: skip
        self.rng = rng
        self.w = w
        self.members = [np.flatnonzero(kinds == k) for k in range(len(KINDS))]
        self.cdf = []
        for m in self.members:
            c = np.cumsum(w[m])
            self.cdf.append(c / c[-1] if len(c) else c)
        self.buf: list[list[int]] = [[] for _ in KINDS]
        key = cluster.astype(np.int64) * len(KINDS) + kinds
        self.local_order = np.argsort(key, kind="stable")
        self.local_keys = key[self.local_order]
        self.local_cache: dict[int, tuple[list[int], list[float]]] = {}

    def draw(self, kind: int) -> int:
        """Return one article index of the given kind, proportional to fame."""
        buf = self.buf[kind]
        if not buf:
            if not len(self.members[kind]):
                return -1
            u = self.rng.random(4096)
            picks = self.members[kind][np.searchsorted(self.cdf[kind], u)]
            buf.extend(picks[::-1].tolist())
        return buf.pop()

    def draw_local(self, kind: int, cluster: int, prng: random.Random) -> int:
        """Return an article of the kind from the given cluster (-1 if it has none)."""
        key = cluster * len(KINDS) + kind
        got = self.local_cache.get(key)
        if got is None:
            lo, hi = np.searchsorted(self.local_keys, [key, key + 1])
            idx = self.local_order[lo:hi]
            got = (idx.tolist(), np.cumsum(self.w[idx]).tolist())
            self.local_cache[key] = got
        if not got[0]:
            return -1
        return prng.choices(got[0], cum_weights=got[1])[0]


def choose_echoes(
    prng: random.Random, n: int, pairs: np.ndarray, fame_rank: np.ndarray,
    names: list[str], namesake: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:  # fmt: skip
    """Pick, for each article, a few articles linking to it that it mentions back.

    ``pairs`` holds unique ``src * n + dst`` link codes.  Returns the CSR offsets
    and sources of the chosen back-mentions and the link codes including them.
    """
    src, dst = pairs // n, pairs % n
    order = np.argsort(dst, kind="stable")
    in_src, in_dst = src[order], dst[order]
    in_off = np.searchsorted(in_dst, np.arange(n + 1))
    log_n = np.log(max(n, 2))
    frac = 1.0 - np.log(fame_rank) / log_n
    echo_off = np.zeros(n + 1, dtype=np.int64)
    chosen: list[int] = []
    named = np.flatnonzero(namesake >= 0)
    named = named[np.argsort(namesake[named], kind="stable")]
    named_off = np.searchsorted(namesake[named], np.arange(n + 1))
    for i in range(n):
        # A name's main article always mentions the things named after it.
        forced = named[named_off[i] : named_off[i + 1]].tolist()
        chosen.extend(forced)
        lo, hi = int(in_off[i]), int(in_off[i + 1])
        if hi > lo:
            k = min(hi - lo, prng.randint(0, 1 + int(MAX_ECHOES * frac[i])))
            if k:
                picks = sorted(prng.sample(range(lo, hi), k))
                chosen.extend(
                    s for s in in_src[picks].tolist() if names[s] != names[i] and s not in forced
                )
        echo_off[i + 1] = len(chosen)
    echo_src = np.asarray(chosen, dtype=np.int64)
    echo_from = np.repeat(np.arange(n, dtype=np.int64), np.diff(echo_off))
    all_pairs = np.unique(np.concatenate([pairs, echo_from * n + echo_src]))
    return echo_off, echo_src.astype(np.int32), all_pairs
