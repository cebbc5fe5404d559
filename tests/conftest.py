"""Shared test settings: every test folder is a package, so test module names may repeat."""

from __future__ import annotations

import os

import matplotlib

matplotlib.use("Agg")
os.environ.setdefault("MPLBACKEND", "Agg")
