"""The README's examples run as written (a user's first contact must not fail)."""

from __future__ import annotations

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _blocks(language: str) -> list[str]:
    """Fenced blocks of README.md opened with ```language (pairs of fences, in order)."""
    blocks, current, opened = [], [], None
    for line in (ROOT / "README.md").read_text(encoding="utf-8").splitlines():
        if line.startswith("```"):
            if opened is None:
                opened, current = line[3:].strip(), []
            else:
                if opened == language:
                    blocks.append("\n".join(current) + "\n")
                opened = None
        elif opened is not None:
            current.append(line)
    return blocks


def test_python_example_runs(monkeypatch):
    blocks = _blocks("python")
    assert blocks
    monkeypatch.chdir(ROOT)
    namespace: dict = {}
    exec(compile(blocks[0], "README.md", "exec"), namespace)  # noqa: S102 - our own README
    assert namespace["sino"].shape == namespace["poses"].projection_shape
    assert namespace["truth"].shape == (512, 512)  # the image size the README example asks for


@pytest.mark.parametrize("line", [ln for b in _blocks("") for ln in b.splitlines()
                                  if ln.startswith("simbench ")])
def test_command_examples_parse(line):
    # Every command shown in the tour is a valid command line (parsed, not run).
    from simbench.cli import build_parser

    import shlex

    words = shlex.split(line.split("  #")[0])[1:]
    args = build_parser().parse_args(words)
    assert args.command == words[0]
