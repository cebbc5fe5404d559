"""No module of the tool imports, directly or through others, a module that imports it.

Cycles are found on the import graph built by grimp (the library import-linter uses), with
imports made only for type checking included: a cycle there still ties two modules together.
"""

from __future__ import annotations

import grimp

PACKAGES = ("retriever", "reranker", "api", "corpus_demo")


def _cycles(graph: grimp.ImportGraph) -> list[list[str]]:
    """Groups of two or more modules that reach each other (Tarjan's strongly connected
    components, iterative so a deep chain cannot overflow the stack)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []
    for root in sorted(graph.modules):
        if root in index:
            continue
        work = [(root, iter(sorted(graph.find_modules_directly_imported_by(root))))]
        index[root] = low[root] = len(index)
        stack.append(root)
        on_stack.add(root)
        while work:
            node, children = work[-1]
            child = next(children, None)
            if child is not None:
                if child not in index:
                    index[child] = low[child] = len(index)
                    stack.append(child)
                    on_stack.add(child)
                    work.append(
                        (child, iter(sorted(graph.find_modules_directly_imported_by(child))))
                    )
                elif child in on_stack:
                    low[node] = min(low[node], index[child])
                continue
            work.pop()
            if work:
                parent = work[-1][0]
                low[parent] = min(low[parent], low[node])
            if low[node] == index[node]:
                group = []
                while True:
                    member = stack.pop()
                    on_stack.discard(member)
                    group.append(member)
                    if member == node:
                        break
                if len(group) > 1:
                    found.append(sorted(group))
    return found


def test_the_cycle_finder_finds_a_planted_cycle() -> None:
    graph = grimp.ImportGraph()
    for name in ("p", "p.a", "p.b", "p.c"):
        graph.add_module(name)
    graph.add_import(importer="p.a", imported="p.b")
    graph.add_import(importer="p.b", imported="p.c")
    graph.add_import(importer="p.c", imported="p.a")
    assert _cycles(graph) == [["p.a", "p.b", "p.c"]]


def test_no_import_cycles_anywhere() -> None:
    graph = grimp.build_graph(*PACKAGES, include_external_packages=False, cache_dir=None)
    assert _cycles(graph) == []
