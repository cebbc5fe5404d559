"""The feature registry: user features by `module:function` path, bad features, metadata columns."""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

from reranker import FeatureError, ModelMismatchError, default_registry, load_model, rank_clue
from reranker.features import Feature, FeatureRegistry, MetadataColumns, candidate_set
from reranker.training import LabelledClue, train
from reranker.training.train import TrainResult
from retriever import Index
from tests.reranker.conftest import World

HERE = Path(__file__).resolve().parent
USER = "userfeatures:title_chars"
USER_NAME = "user:title_chars"


@pytest.fixture
def on_path(monkeypatch: pytest.MonkeyPatch) -> None:
    """Make tests/reranker/userfeatures.py importable as `userfeatures`."""
    monkeypatch.syspath_prepend(str(HERE))


@pytest.fixture(scope="module")
def custom_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Where the custom model below is written."""
    return tmp_path_factory.mktemp("custom") / "model.json"


@pytest.fixture(scope="module")
def custom(world: World, custom_file: Path) -> Iterator[TrainResult]:
    """A model trained with the sample user feature and two metadata fields of the log."""
    with pytest.MonkeyPatch.context() as mp:
        mp.syspath_prepend(str(HERE))
        yield train(
            world.index,
            [world.train_log],
            custom_file,
            user_features=[USER],
            metadata_features=["difficulty", "source"],
        )


# -- user features -------------------------------------------------------------------------
@pytest.mark.usefixtures("on_path")
def test_user_feature_by_path_is_registered_and_computed(tiny_index: Index) -> None:
    reg = default_registry().with_user_features([USER])
    assert USER not in default_registry().names
    f = reg["user:title_chars"]
    assert f.group == "user" and f.description == "Characters in the candidate's title."
    hits = tiny_index.search("grey stone", k=5)
    cs = candidate_set(tiny_index, "grey stone", hits)
    expected = [len(h.title) for h in hits]  # the titles' lengths, counted by Python
    np.testing.assert_array_equal(reg.matrix(cs, ["user:title_chars"])[:, 0], expected)


def test_user_feature_trains_saves_and_loads(
    custom: TrainResult, custom_file: Path, world: World
) -> None:
    art = custom.artifact
    assert "user:title_chars" in art["feature_names"]
    assert art["user_features"] == [USER]
    with pytest.MonkeyPatch.context() as mp:
        mp.syspath_prepend(str(HERE))
        loaded = load_model(custom_file, index=world.index, user_features=[USER])
    clue = "This river is known for something"
    a = rank_clue(world.index, custom.model, clue, include_features=True)
    b = rank_clue(world.index, loaded, clue, include_features=True)
    assert [c.doc_id for c in a.candidates] == [c.doc_id for c in b.candidates]
    assert [c.probability for c in a.candidates] == [c.probability for c in b.candidates]
    top = b.candidates[0]
    assert top.features["user:title_chars"] == len(top.title)


@pytest.mark.usefixtures("custom")
def test_model_with_user_feature_does_not_load_without_it(custom_file: Path, world: World) -> None:
    with pytest.raises(ModelMismatchError, match=r"user:title_chars"):
        load_model(custom_file, index=world.index)


@pytest.mark.usefixtures("on_path")
@pytest.mark.parametrize(
    ("spec", "needle"),
    [
        ("no_such_module_here:f", "no_such_module_here"),
        ("userfeatures:missing_function", "missing_function"),
        ("userfeatures:NOT_A_FUNCTION", "NOT_A_FUNCTION"),
        ("userfeatures", "module:function"),
        (":title_chars", "module:function"),
    ],
)
def test_bad_feature_path_names_it(spec: str, needle: str) -> None:
    with pytest.raises(FeatureError, match=needle) as err:
        default_registry().with_user_features([spec])
    assert spec in str(err.value)


def test_bad_feature_path_stops_training(world: World, tmp_path: Path) -> None:
    with pytest.raises(FeatureError, match="no_such_module_here"):
        train(
            world.index,
            [world.train_log],
            tmp_path / "m.json",
            user_features=["no_such_module_here:f"],
        )
    assert not (tmp_path / "m.json").exists()


@pytest.mark.usefixtures("on_path")
@pytest.mark.parametrize(
    ("func", "needle"),
    [
        ("wrong_shape", r"shape \(6,\), expected \(5,\)"),
        ("gives_nan", "NaN"),
        ("crashes", "deliberate"),
    ],
)
def test_bad_feature_values_name_the_feature(tiny_index: Index, func: str, needle: str) -> None:
    reg = default_registry().with_user_features([f"userfeatures:{func}"])
    cs = candidate_set(
        tiny_index, "grey stone river town", tiny_index.search("grey stone river town", k=5)
    )
    assert len(cs) == 5
    with pytest.raises(FeatureError, match=needle) as err:
        reg.matrix(cs, ["bm25_score", f"user:{func}"])
    assert f"user:{func}" in str(err.value)


@pytest.mark.usefixtures("on_path")
@pytest.mark.parametrize(
    "names",
    [
        # a user feature among enough built-ins for the fused path, in no particular order
        [
            "matched_rarity", USER_NAME, "score_zscore", "bm25_score", "title_overlap",
            "inlinks", "qualifier_frequency", "gap_to_best_rival", "bm25_score",
        ],
        ["inlinks", USER_NAME, "bm25_score"],  # too few built-ins: computed one by one
    ],
)  # fmt: skip
def test_matrix_puts_every_column_where_it_was_asked_for(
    tiny_index: Index, names: list[str]
) -> None:
    reg = default_registry().with_user_features([USER])
    clue = "grey stone river town"
    hits = tiny_index.search(clue, k=5)
    x = reg.matrix(candidate_set(tiny_index, clue, hits), names)
    assert x.shape == (len(hits), len(names))
    for j, name in enumerate(names):  # reference: each feature's function on its own
        expected = reg[name].compute(candidate_set(tiny_index, clue, hits))
        np.testing.assert_allclose(x[:, j], expected, rtol=1e-12, atol=1e-12, err_msg=name)


def test_registry_rejects_duplicates_and_unknown_names() -> None:
    reg = default_registry()
    with pytest.raises(FeatureError, match="already registered"):
        reg.add(Feature("bm25_score", "user", "again", lambda cs: cs.scores))
    with pytest.raises(FeatureError, match="no_such_feature"):
        reg["no_such_feature"]
    fresh = FeatureRegistry([Feature("one", "g", "the number one", lambda cs: np.ones(len(cs)))])
    assert fresh.names == ["one"] and fresh.groups() == {"g": ["one"]}


# -- metadata columns of the labelled log --------------------------------------------------
def _clue(meta: dict[str, object]) -> LabelledClue:
    return LabelledClue("some clue", "a1", meta, "log.jsonl", 1)


def test_metadata_columns_numeric_and_one_hot() -> None:
    clues = [
        _clue({"difficulty": 2, "source": "Beta"}),
        _clue({"difficulty": 4.5, "source": "Alpha"}),
        _clue({"source": "Beta", "flag": True}),
    ]
    cols = MetadataColumns.learn(clues, ["difficulty", "source", "flag"])
    assert cols.numeric == ("difficulty",)
    assert cols.categorical == {"source": ("Alpha", "Beta"), "flag": ("True",)}
    assert cols.names == [
        "meta:difficulty",
        "meta:source=Alpha",
        "meta:source=Beta",
        "meta:flag=True",
    ]
    np.testing.assert_array_equal(cols.row({"difficulty": 3, "source": "Beta"}), [3, 0, 1, 0])
    # an unseen category and a missing field give zeros
    np.testing.assert_array_equal(cols.row({"source": "Omega"}), [0, 0, 0, 0])
    with pytest.raises(ValueError, match="never appears"):
        MetadataColumns.learn(clues, ["colour"])


def test_metadata_features_train_and_serve(
    custom: TrainResult, custom_file: Path, world: World
) -> None:
    names = custom.artifact["feature_names"]
    meta = ["meta:difficulty", "meta:source=Alpha", "meta:source=Beta", "meta:source=Gamma"]
    assert names[-4:] == meta
    assert custom.artifact["metadata_columns"] == {
        "numeric": ["difficulty"],
        "categorical": {"source": ["Alpha", "Beta", "Gamma"]},
    }
    # Every training row carries its clue's metadata, read back from the log file itself.
    records = [json.loads(line) for line in world.train_log.read_text().splitlines()]
    table = custom.table
    first_rows = np.unique(table.clue_id, return_index=True)[1]
    resolved = [r for r in records if world.index.resolve(r["answer"]) is not None]
    assert len(first_rows) == len(resolved)
    for rec, row in zip(resolved, first_rows, strict=True):
        src = rec["metadata"]["source"]
        expected = [
            rec["metadata"]["difficulty"],
            *(float(src == s) for s in ("Alpha", "Beta", "Gamma")),
        ]
        np.testing.assert_array_equal(table.columns(meta)[row], expected)
    with pytest.MonkeyPatch.context() as mp:
        mp.syspath_prepend(str(HERE))
        loaded = load_model(custom_file, index=world.index, user_features=[USER])
    r = rank_clue(
        world.index,
        loaded,
        "This ship is known for x",
        include_features=True,
        metadata={"difficulty": 5, "source": "Omega"},
    )
    feats = r.candidates[0].features
    assert [feats[n] for n in meta] == [5, 0, 0, 0]


def test_feature_lists_take_group_names_as_the_ablation_table_shows_them() -> None:
    reg = default_registry()
    groups = reg.groups()
    assert reg.expand(["overlap"]) == groups["overlap"]
    # a group and one of its own features: each feature once, in the order given
    both = reg.expand(["bm25_score", "retrieval", "matched_terms"])
    assert both[0] == "bm25_score" and both.count("bm25_score") == 1
    assert both == ["bm25_score", *[n for n in groups["retrieval"] if n != "bm25_score"],
                    "matched_terms"]  # fmt: skip
    with pytest.raises(FeatureError, match=r"unknown feature or group 'overlapp'; groups: "):
        reg.expand(["overlapp"])


def test_training_on_a_group_uses_its_features(world: World, tmp_path: Path) -> None:
    res = train(world.index, [world.train_log], tmp_path / "m.json", features=["overlap"])
    assert res.artifact["feature_names"] == default_registry().groups()["overlap"]
