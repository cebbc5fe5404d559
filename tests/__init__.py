"""Tests for hunchwise, one folder per package."""
