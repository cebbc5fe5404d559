"""`hunchwise serve`'s Ray options, checked by the real command line before anything starts."""

from __future__ import annotations

from pathlib import Path

import pytest

from .test_rank import run


@pytest.mark.parametrize(
    ("given", "named"),
    [
        (("--front-replicas", "2"), "--front-replicas"),
        (("--shard-replicas", "3"), "--shard-replicas"),
        (("--shard-replicas", "1"), "--shard-replicas"),  # even the default, when given
        (("--shard-replicas", "2", "--front-replicas", "2"), "--shard-replicas, --front-replicas"),
    ],
)
def test_replicas_without_ray_are_an_error_naming_them(
    tmp_path: Path, given: tuple[str, ...], named: str
) -> None:
    res = run("serve", "--index", tmp_path / "idx", "--state-dir", tmp_path / "state", *given)
    assert res.returncode != 0
    assert res.stderr.count("\n") == 1, res.stderr
    assert f"{named}: only with --ray" in res.stderr and "--workers" in res.stderr
    assert "no such index folder" not in res.stderr  # refused before the index is looked at


@pytest.mark.parametrize("option", ["--front-replicas", "--shard-replicas"])
def test_replicas_below_one_are_refused_by_the_parser(tmp_path: Path, option: str) -> None:
    res = run("serve", "--index", tmp_path / "idx", "--ray", "local", option, "0")
    assert res.returncode == 2
    assert f"argument {option}: expected a whole number of at least 1, got '0'" in res.stderr
