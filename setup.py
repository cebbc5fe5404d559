"""Build the one compiled module, retriever._kernels (metadata lives in pyproject.toml).

It is optional: without a C compiler the install still succeeds and retriever/scoring.py
uses its numpy path, which returns the same scores more slowly. `hunchwise index info`
says which path is in use.
"""

import sys

from setuptools import Extension, setup

# No fused multiply-add: the compiled and numpy paths must round each product the same way.
flags = [] if sys.platform == "win32" else ["-O3", "-ffp-contract=off"]

setup(
    ext_modules=[
        Extension(
            "retriever._kernels", ["retriever/_kernels.c"], extra_compile_args=flags, optional=True
        )
    ]
)
