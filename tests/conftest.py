"""Shared test settings: every test folder is a package, so test module names may repeat."""

from __future__ import annotations

import os

import matplotlib
import pytest

matplotlib.use("Agg")
# The service helpers compare replies with assert: their failures explained as a test's are.
pytest.register_assert_rewrite("tests.api.svc_helpers")
os.environ.setdefault("MPLBACKEND", "Agg")
