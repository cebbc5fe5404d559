"""Build the two compiled modules (metadata lives in pyproject.toml).

retriever._kernels: BM25 search and term overlap. reranker._fused: the built-in candidate
features. Both are optional: without a C compiler the install still succeeds and the code
uses its numpy or plain-Python twins, which give the same results more slowly.
`hunchwise index info` says which query path is in use.
"""

import sys

from setuptools import Extension, setup

# No fused multiply-add: the compiled and numpy paths must round each product the same way.
flags = [] if sys.platform == "win32" else ["-O3", "-ffp-contract=off"]

setup(
    ext_modules=[
        Extension(name, [source], extra_compile_args=flags, optional=True)
        for name, source in (
            ("retriever._kernels", "retriever/_kernels.c"),
            ("reranker.features._fused", "reranker/features/_fused.c"),
        )
    ]
)
