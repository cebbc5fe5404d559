"""Each package's `__all__` lists exactly its public names, and each package ships py.typed.

A package's public surface is what its `__init__` binds without a leading underscore, apart from
its own submodules and `from __future__ import annotations`. Keeping `__all__` equal to that
surface means a name cannot become public by accident, nor be listed without existing.
"""

from __future__ import annotations

import importlib
import types
from pathlib import Path

import pytest

PACKAGES = ["retriever", "reranker", "api", "corpus_demo"]


def _public_names(module: types.ModuleType) -> set[str]:
    names = set()
    for name, value in vars(module).items():
        if name.startswith("_") or name == "annotations":
            continue
        if isinstance(value, types.ModuleType):
            continue  # submodules and imported modules are not part of the listed surface
        names.add(name)
    return names


@pytest.mark.parametrize("name", PACKAGES)
def test_all_equals_public_names(name: str) -> None:
    module = importlib.import_module(name)
    listed = list(module.__all__)
    assert len(listed) == len(set(listed)), f"{name}.__all__ lists a name twice"
    assert set(listed) == _public_names(module)


@pytest.mark.parametrize("name", PACKAGES)
def test_every_listed_name_resolves(name: str) -> None:
    module = importlib.import_module(name)
    for attr in module.__all__:
        assert hasattr(module, attr), f"{name}.__all__ lists {attr!r}, which does not exist"


@pytest.mark.parametrize("name", ["retriever", "reranker", "api"])
def test_package_ships_py_typed(name: str) -> None:
    module = importlib.import_module(name)
    assert module.__file__ is not None
    assert (Path(module.__file__).parent / "py.typed").is_file()
