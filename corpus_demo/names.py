"""Invented names built from syllables, filtered so they are not common English words."""

from __future__ import annotations

import random
from collections.abc import Set as AbstractSet

# Onsets, vowels and codas chosen to give an "island-chronicle" flavour while
# avoiding most everyday English spellings.
# fmt: off
ONSETS = [
    "b", "br", "d", "dr", "f", "g", "gr", "h", "k", "kh", "kr", "l", "m", "n", "p", "pr",
    "r", "s", "sk", "st", "t", "th", "tr", "v", "vr", "z", "ch", "y"
]
VOWELS = [
    "a", "a", "e", "e", "i", "o", "o", "u", "ae", "ai", "y"
]
CODAS = [
    "", "", "", "", "", "l", "n", "r", "s", "th", "sk", "rn", "st", "v", "m"
]
ENDINGS = [
    "a", "ora", "is", "en", "eth", "ane", "ir", "ost", "ys", "elle", "ar", "un", "ia",
    "ayne", "ovar", "ess", "ith", "orin", "ulde", "wen"
]
GIVEN_ENDINGS = [
    "a", "o", "en", "in", "el", "is", "ia", "ar", "ov", "une", "ette", "ad"
]
# Everyday words (and a few real given names) a syllable generator could
# plausibly emit; any generated name equal to one of these is discarded.
BLOCKLIST = frozenset({
    "able", "area", "arena", "banana", "bare", "bear", "beer", "bell", "berry", "bone",
    "boris", "born", "brain", "bread", "brian", "broken", "brother", "cola", "data", "dead",
    "dear", "deer", "dinner", "doris", "draven", "driven", "ella", "ellen", "farm", "fear",
    "fever", "field", "fire", "flora", "gaia", "garden", "given", "golden", "gone",
    "gravel", "green", "hair", "hammer", "harbor", "hare", "harm", "heaven", "helen",
    "here", "hero", "horse", "house", "iris", "kara", "karen", "kevin", "kind", "kira",
    "lava", "lemon", "level", "liar", "lima", "linen", "lion", "lira", "lost", "luna",
    "mara", "maria", "master", "mayor", "mean", "melon", "mira", "mora", "more", "morning",
    "nora", "opera", "orin", "pasta", "pizza", "polar", "pork", "rain", "ran",
    "raven", "rest", "rich", "river", "ross", "salt", "santa", "sara", "saturn", "seven",
    "silver", "sister", "skin", "soda", "spain", "stone", "stora", "story", "sun", "table",
    "tara", "taste", "terra", "thin", "thor", "tiger", "tora", "trust", "vera", "vista",
    "water", "winter", "yellow", "yoga", "zebra", "zora"
})
# fmt: on


def _syllable(rng: random.Random) -> str:
    """Return one onset-vowel-coda syllable."""
    return rng.choice(ONSETS) + rng.choice(VOWELS) + rng.choice(CODAS)


def _clean(word: str) -> bool:
    """Return True if a candidate looks pronounceable and is not a common word."""
    low = word.lower()
    if len(low) < 5 or len(low) > 10 or low in BLOCKLIST:
        return False
    # Reject triple letters and awkward doubled vowels such as "aeai".
    for a, b, c in zip(low, low[1:], low[2:], strict=False):
        if a == b == c:
            return False
    bad = ("ii", "aea", "aia", "yy", "uu", "aee", "aie", "yi", "iy", "hh", "kk", "ss")
    return not any(v in low for v in bad)


def place_name(rng: random.Random) -> str:
    """Return one invented single-word name such as 'Velmorane'."""
    while True:
        n_syl = 1 if rng.random() < 0.45 else 2
        word = "".join(_syllable(rng) for _ in range(n_syl)) + rng.choice(ENDINGS)
        if _clean(word):
            return word.capitalize()


def given_name(rng: random.Random) -> str:
    """Return one invented given name."""
    while True:
        word = _syllable(rng) + rng.choice(GIVEN_ENDINGS)
        if rng.random() < 0.2:
            word = rng.choice(ONSETS) + rng.choice(VOWELS) + word
        if _clean(word) or (len(word) == 4 and word.lower() not in BLOCKLIST):
            return word.capitalize()


def unique_names(
    rng: random.Random, n: int, taken: set[str], reserved: frozenset[str]
) -> list[str]:
    """Return n distinct place-style names not in taken or reserved (taken is updated)."""
    out: list[str] = []
    while len(out) < n:
        name = place_name(rng)
        if name in taken or name.lower() in reserved:
            continue
        taken.add(name)
        out.append(name)
    return out


def person_name(
    rng: random.Random, taken: set[str], reserved: frozenset[str]
) -> tuple[str, str, str]:
    """Return (full name, given name, family name) unique within taken."""
    while True:
        given = given_name(rng)
        family = place_name(rng)
        if given.lower() in reserved or family.lower() in reserved:
            continue
        full = f"{given} {family}"
        if full not in taken:
            taken.add(full)
            return full, given, family


EPITHETS = (
    "the Elder",
    "the Younger",
    "the Grey",
    "the Navigator",
    "the Bold",
    "the Quiet",
    "the Lamplighter",
    "Saltbeard",
    "the Cartwright",
    "the Wise",
    "the Exile",
    "the Red",
    "Half-Hand",
    "the Tidewalker",
)


def person_alias(rng: random.Random, given: str, family: str) -> str:
    """Return an epithet-style alias for a person."""
    epithet = rng.choice(EPITHETS)
    base = given if rng.random() < 0.6 else family
    return f"{base} {epithet}"


def old_name(rng: random.Random, taken: AbstractSet[str], reserved: AbstractSet[str]) -> str:
    """Return an invented former or alternative name (not used as any title)."""
    while True:
        name = place_name(rng)
        if name not in taken and name.lower() not in reserved:
            return name
