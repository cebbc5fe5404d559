"""Build the compiled modules (metadata lives in pyproject.toml).

retriever._kernels: BM25 search and term overlap. retriever._analysis: texts to term ids
while indexing. reranker._fused: the built-in candidate features. All are optional: without
a C compiler the install still succeeds and the code uses the numpy scoring path, the Python
indexing loop and the feature definitions themselves, which give the same results more
slowly. `hunchwise index info` says which query path is in use.
_kernels and _fused include include/hunchwise.h (buffer checks, the term overlap);
MANIFEST.in puts it in the source distribution.
"""

import sys

from setuptools import Extension, setup

# No fused multiply-add: the compiled and numpy paths must round each product the same way.
flags = [] if sys.platform == "win32" else ["-O3", "-ffp-contract=off"]
header = "include/hunchwise.h"
kernel_headers = [f"retriever/_{h}.h" for h in ("topk", "exhaustive", "window", "daat", "overlap")]
kernel_headers.append("reranker/features/_clueterms.h")

setup(
    ext_modules=[
        Extension(
            name,
            [source],
            include_dirs=["include"],
            depends=[header, *kernel_headers],
            extra_compile_args=flags,
            optional=True,
        )
        for name, source in (
            ("retriever._kernels", "retriever/_kernels.c"),
            ("retriever._analysis", "retriever/_analysis.c"),
            ("reranker.features._fused", "reranker/features/_fused.c"),
        )
    ]
)
