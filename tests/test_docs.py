"""The README keeps its promises: a one-paragraph job, two quick-start lines, CI runs line 2."""

from __future__ import annotations

import argparse
import re
from collections.abc import Iterator
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]


def quick_start_lines() -> list[str]:
    """Command lines in the README's quick-start code block."""
    readme = (ROOT / "README.md").read_text()
    section = readme.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    block = re.search(r"```sh\n(.*?)```", section, re.S)
    assert block, "the quick start has no ```sh block"
    return [line for line in block.group(1).splitlines() if line.strip()]


def test_quick_start_has_exactly_two_command_lines() -> None:
    lines = quick_start_lines()
    assert len(lines) == 2
    assert "hunchwise demo" in lines[0]
    assert "pytest" in lines[1]


def test_ci_runs_the_readme_test_command_verbatim() -> None:
    ci = (ROOT / ".ci" / "run").read_text()
    assert quick_start_lines()[1] in ci.splitlines()


def test_readme_opens_with_one_paragraph_stating_the_job() -> None:
    body = (ROOT / "README.md").read_text().split("\n", 1)[1].strip()
    first = body.split("\n\n", 1)[0]
    assert "\n" not in first.strip()
    for word in ("BM25", "calibrated", "probability", "HTTP", "retrain"):
        assert word in first


def test_readme_has_no_unfilled_placeholders() -> None:
    readme = (ROOT / "README.md").read_text()
    assert not re.search(r"^[A-Z_]{6,}$", readme, re.M), (
        "a section placeholder is still in the README"
    )


def test_readme_feedback_examples_use_the_id_of_your_own_response() -> None:
    # A request id is signed by the server that issued it: a literal one can only answer 404.
    readme = (ROOT / "README.md").read_text()
    blocks = re.findall(r"```sh\n(.*?)```", readme, re.S)
    calls = [b for b in blocks if "/v1/feedback" in b]
    assert calls, "the README shows no feedback call"
    for block in calls:
        sent = re.findall(r"request_id\W+([0-9a-f]{16,}\.[0-9a-f]+)", block)
        assert not sent, f"a literal request id in a feedback example: {sent}"


def _commands(parser: argparse.ArgumentParser, prefix: str) -> Iterator[tuple[str, Any]]:
    """(command line, its parser) for every leaf sub-command, e.g. 'hunchwise index info'."""
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                nested = any(isinstance(a, argparse._SubParsersAction) for a in sub._actions)
                if nested:
                    yield from _commands(sub, f"{prefix} {name}")
                else:
                    yield f"{prefix} {name}", sub


def test_readme_commands_show_every_option_the_parser_has() -> None:
    # The Commands section is what people read instead of --help: an option missing there,
    # or a help text that has moved on, misleads.
    from api.cli import build_parser

    readme = (ROOT / "README.md").read_text()
    commands = list(_commands(build_parser(), "hunchwise"))
    assert commands
    for command, sub in commands:
        assert f"### `{command}`" in readme, f"no README section for {command}"
        section = readme.split(f"### `{command}`", 1)[1].split("\n#", 1)[0]
        sub.formatter_class = lambda prog: argparse.HelpFormatter(prog, width=10_000)
        usage = " ".join(sub.format_usage().removeprefix("usage: ").split())
        assert f"`{usage}`" in section, f"README usage of {command} differs from: {usage}"
        for action in sub._actions:
            if isinstance(action, argparse._HelpAction):
                continue
            name = action.option_strings[0] if action.option_strings else action.metavar
            name = name or action.dest
            row = f"| `{name}` | {action.help} |"
            assert row in section, f"README {command}: missing or stale row {row}"


def test_the_contributor_guide_names_every_module() -> None:
    # DEVELOPERS.md's layout table is where a newcomer looks for a file: every source module
    # and compiled kernel of the tool's packages must be named there.
    guide = (ROOT / "DEVELOPERS.md").read_text()
    missing = [
        str(f.relative_to(ROOT))
        for pkg in ("retriever", "reranker", "api")
        for f in sorted((ROOT / pkg).rglob("*"))
        if f.suffix in {".py", ".c", ".h"}
        and f.name != "__init__.py"
        and "include" not in f.parts
        and f"`{f.name}`" not in guide
    ]
    assert not missing, f"DEVELOPERS.md does not name: {', '.join(missing)}"
