"""The served record's round trip: built from real rankings, written by the service's log
writer, read back by the parser training uses, with nothing lost or renamed on the way."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from api.servedlog import ServedLog, utc_now
from reranker import load_model, rank_clues
from reranker.servedrecords import (
    CANDIDATE_KEYS,
    FEEDBACK,
    FEEDBACK_KEYS,
    SERVED,
    SERVED_KEYS,
    feedback_record,
    parse_feedback,
    parse_served,
    served_record,
)
from reranker.training import read_logs
from retriever import load_index
from tests.api.svc_helpers import read_jsonl


def test_served_and_feedback_records_round_trip(
    index_dir: Path, model_path: Path, tmp_path: Path, test_questions: list[dict[str, Any]]
) -> None:
    index = load_index(index_dir)
    model = load_model(model_path, index=index)
    clues = [q["clue"] for q in test_questions[:3]]
    rankings = rank_clues(index, model, clues, k=4, include_features=True)
    when = utc_now()
    meta = [{"source": "Quellhaven Review"}, None, None]
    records = [
        served_record(f"r{i}", r, 4, False, when, meta[i], features=i == 1)
        for i, r in enumerate(rankings)
    ]
    log = ServedLog(tmp_path, max_bytes=10**7, backups=2)
    log.append(records)
    answer = rankings[0].candidates[1].doc_id
    log.append_feedback([feedback_record("r0", answer, when), feedback_record("r1", None, when)])
    log.close()

    raw = read_jsonl(tmp_path / SERVED)
    assert [set(x) for x in raw] == [{*SERVED_KEYS, "metadata"}, set(SERVED_KEYS), set(SERVED_KEYS)]
    for i, x in enumerate(raw):
        extra = {"features"} if i == 1 else set()
        assert all(set(c) == {*CANDIDATE_KEYS, *extra} for c in x["candidates"])
    assert all(set(x) == set(FEEDBACK_KEYS) for x in read_jsonl(tmp_path / FEEDBACK))

    where = {"file": str(tmp_path / SERVED)}
    for n, (x, r) in enumerate(zip(raw, rankings, strict=True)):
        line = parse_served(x, {**where, "line": n + 1})
        assert (line.request_id, line.clue, line.time, line.k, line.complete) == (
            f"r{n}",
            r.clue,
            when,
            4,
            False,
        )
        assert (line.model_k, line.index_version, line.model_version) == (
            r.model_k,
            r.index_version,
            r.model_version,
        )
        assert r.in_candidates is not None and line.in_candidates == r.in_candidates
        assert line.metadata == (meta[n] or {})
        assert line.ids == tuple(c.doc_id for c in r.candidates) and len(line.ids) == 4
        for got, want in zip(line.candidates, r.candidates, strict=True):
            assert want.pointwise is not None and got.pointwise == want.pointwise
            assert (got.title, got.score, got.rank, got.probability) == (
                want.title,
                want.score,
                want.rank,
                want.probability,
            )
            assert (got.features is not None) == (n == 1)
            if got.features is not None:
                assert got.features == want.features  # JSON floats round-trip exactly
        assert line.decision is not None
        assert (line.decision["action"], line.decision["id"]) == (
            r.decision.action,
            r.decision.doc_id,
        )
    fb = [parse_feedback(json.loads(t), {"file": FEEDBACK, "line": 1})
          for t in (tmp_path / FEEDBACK).read_text().splitlines()]  # fmt: skip
    assert [(f.request_id, f.answer, f.time) for f in fb] == [
        ("r0", answer, when),
        ("r1", None, when),
    ]

    # What training makes of the folder: the two labelled clues, with what was shown.
    labelled = {c.clue: c for c in read_logs([tmp_path])}
    assert set(labelled) == set(clues[:2])
    assert labelled[clues[0]].answer == answer and labelled[clues[1]].answer is None
    assert labelled[clues[0]].metadata == meta[0]
    assert labelled[clues[1]].served == tuple(c.doc_id for c in rankings[1].candidates)
