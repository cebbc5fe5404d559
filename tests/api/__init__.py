"""Tests of the HTTP service: in-process, against real uvicorn, fuzzed and under load."""
