"""One raw corpus item -> a validated Article: JSON Lines records parsed by orjson wherever
it gives the value Python's json gives, else by json itself (retriever/ingest.py's workers)."""

from __future__ import annotations

import json
from typing import Any

import orjson

from .corpus import Article, CorpusError, validate_record

# orjson reads an integer past 64 bits as a float where Python's json keeps it exact; a
# float this large or larger might be one, and its record is read again by json.
_BIG = float(2**63)


def _has_big_float(value: Any) -> bool:
    """Whether a float of 2**63 or more (or an infinity) is somewhere in `value`."""
    if isinstance(value, float):
        return not -_BIG < value < _BIG  # NaN cannot come from orjson
    if isinstance(value, dict):
        value = value.values()
    elif not isinstance(value, list):
        return False
    return any(_has_big_float(v) for v in value)


def _record_has_big_float(record: Any) -> bool:
    """Whether a big float sits where the record's reading could show it: a top-level value
    (popularity, or a required field's type in an error) or anywhere in an object
    (metadata). Lists of strings at the top (links, aliases) are refused the same way
    whatever their numbers, and the text is a string: neither is walked."""
    if not isinstance(record, dict):
        return False  # "each record must be a JSON object" either way
    for v in record.values():
        if isinstance(v, float):
            if not -_BIG < v < _BIG:
                return True
        elif isinstance(v, dict) and _has_big_float(v):
            return True
    return False


def _loads(raw: bytes) -> Any:
    """One JSON Lines record as Python's json reads it, parsed by orjson (several times
    faster) whenever that gives the same value. Anything orjson refuses (malformed JSON,
    invalid UTF-8, but also NaN, Infinity, lone surrogates, which json accepts) and any
    record holding a number of 2**63 or more goes to json, whose result or error stands."""
    try:
        value = orjson.loads(raw)
    except orjson.JSONDecodeError:
        return _json_loads(raw)
    return _json_loads(raw) if _record_has_big_float(value) else value


def _json_loads(raw: bytes) -> Any:
    """Python's json on one line, with its errors as CorpusError reasons (no file or line)."""
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ValueError(f"not valid UTF-8 ({exc.reason} at byte {exc.start})") from exc
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise ValueError(f"malformed JSON: {exc.msg} (column {exc.colno})") from exc


def parse_item(raw: Any, file: str, line: int) -> Article:
    """One raw item (a JSON Lines line, a parsed record, an Article, or an error the reader
    already found) as a validated Article; CorpusError names the file, line and field."""
    if isinstance(raw, Article):
        return raw
    if isinstance(raw, tuple):  # an error the reader already found
        raise CorpusError(raw[1], file=file, line=line, field=raw[2])
    if isinstance(raw, bytes):
        try:
            raw = _loads(raw)
        except ValueError as exc:
            raise CorpusError(str(exc), file=file, line=line) from exc
    return validate_record(raw, file=file, line=line)
