"""Exceptions raised by the retrieval core, all rooted in RetrieverError."""

from __future__ import annotations

from typing import Any


class RetrieverError(Exception):
    """Base class of every error the retrieval core raises on purpose."""


RECORDS = "<records>"  # the "file" of records given in memory (a list, a JSON array)

JSON_ARRAY = (  # a corpus file holding one JSON array, as both JSON Lines readers say it
    "this is a JSON array, but a corpus file holds one JSON object per line (JSON Lines); "
    "write each element on a line of its own, e.g. jq -c '.[]'"
)


def position(file: str, n: int) -> str:
    """'line N' in a file; 'item N' among records given in memory, which have no lines."""
    return f"item {n}" if (file or RECORDS) == RECORDS else f"line {n}"


def located(message: str, file: str = "", line: int = 0, field: str = "") -> str:
    """'FILE, line N, field 'F': message', the form every bad-input error takes.

    Records given in memory (a Python list, the JSON array of an admin call) have no lines:
    they are counted as items, 1 for the first.
    """
    where = file or RECORDS
    if line:
        where += f", {position(file, line)}"
    if field:
        where += f", field '{field}'"
    return f"{where}: {message}"


class CorpusError(RetrieverError):
    """Raised when a corpus file has a bad record; names the file, line and field."""

    def __init__(self, message: str, *, file: str = "", line: int = 0, field: str = "") -> None:
        self.file, self.line, self.field, self.reason = file, line, field, message
        super().__init__(located(message, file, line, field))

    def __reduce__(self) -> tuple[Any, ...]:
        """Pickled by its fields: raised in a Ray task, it comes back as it was."""
        return (_corpus_error, (self.reason, self.file, self.line, self.field))


def _corpus_error(message: str, file: str, line: int, field: str) -> CorpusError:
    return CorpusError(message, file=file, line=line, field=field)


class FilterError(RetrieverError):
    """Raised when a metadata filter is malformed; names the field it is about."""

    def __init__(self, message: str, *, field: str = "") -> None:
        self.field, self.reason = field, message
        super().__init__(f"filter field '{field}': {message}" if field else f"filter: {message}")


class IndexFormatError(RetrieverError):
    """Raised when a folder is not a readable hunchwise index (missing, foreign, corrupt)."""


class UnknownDocumentError(RetrieverError, KeyError):
    """Raised when an article id is not in the index."""

    def __init__(self, doc_id: str) -> None:
        self.doc_id = doc_id
        super().__init__(f"no article with id {doc_id!r} in the index")

    def __str__(self) -> str:
        return str(self.args[0])
