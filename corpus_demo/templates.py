"""Table of sentence templates (intro, kind facts, general facts) and reserved words."""

from __future__ import annotations

import re
from dataclasses import dataclass

from sklearn.feature_extraction.text import ENGLISH_STOP_WORDS

from corpus_demo.kinds import GENERAL_FACTS, KIND_INDEX, KINDS, NAMED_AFTER, VALUES

SLOT_RE = re.compile(r"\{([A-Za-z]+)(\d?)\}")


@dataclass(frozen=True)
class Template:
    """One sentence template and the link slots it needs."""

    text: str
    role: str
    refs: tuple[tuple[str, int], ...]


def _template(text: str, role: str) -> Template:
    """Parse the link slots (slot name, kind index) of a template."""
    refs: list[tuple[str, int]] = []
    for base, num in SLOT_RE.findall(text):
        slot = base + num
        if base in KIND_INDEX and slot not in [s for s, _ in refs]:
            refs.append((slot, KIND_INDEX[base]))
    return Template(text, role, tuple(refs))


TEMPLATES: list[Template] = []
INTRO_IDX: list[int] = []
FACT_IDX: list[list[int]] = []
for _spec in KINDS:
    INTRO_IDX.append(len(TEMPLATES))
    TEMPLATES.append(_template(_spec.intro, "intro"))
    FACT_IDX.append(list(range(len(TEMPLATES), len(TEMPLATES) + len(_spec.facts))))
    TEMPLATES.extend(_template(t, "fact") for t in _spec.facts)
GENERAL_IDX = list(range(len(TEMPLATES), len(TEMPLATES) + len(GENERAL_FACTS)))
TEMPLATES.extend(_template(t, "general") for t in GENERAL_FACTS)
NAMED_IDX = len(TEMPLATES)
TEMPLATES.append(_template(NAMED_AFTER, "named"))

_TEMPLATE_WORDS = {
    w.lower() for t in TEMPLATES for w in re.findall(r"[A-Za-z]+", SLOT_RE.sub(" ", t.text))
}
RESERVED = frozenset(
    _TEMPLATE_WORDS
    | set(ENGLISH_STOP_WORDS)
    | {w for vals in VALUES.values() for v in vals for w in v.split()}
    | {k.name for k in KINDS}
)
