"""The README's Python examples run as written.

Source: common practice (STYLE.md, after meshio: README code blocks are executed in the
test run). Every fenced ```python block of README.md is executed, in order, in one
shared namespace (later blocks may use names from earlier ones), from a scratch folder
in which ``examples/`` and ``docs/`` of the repository are visible, so relative paths in
the README work and nothing is written into the repository. A block is skipped when
the line before its fence (ignoring blank lines) is ``<!-- no-test -->``.
"""

from __future__ import annotations

import os
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"
SKIP_MARK = "<!-- no-test -->"


def python_blocks(text: str) -> list[tuple[int, str, bool]]:
    """(first line number, code, skipped) of each ```python block."""
    lines = text.splitlines()
    blocks = []
    i = 0
    while i < len(lines):
        if re.match(r"^\s*```python\s*$", lines[i]):
            start = i
            j = i + 1
            while j < len(lines) and not re.match(r"^\s*```\s*$", lines[j]):
                j += 1
            k = start - 1
            while k >= 0 and not lines[k].strip():
                k -= 1
            skipped = k >= 0 and lines[k].strip() == SKIP_MARK
            blocks.append((start + 2, "\n".join(lines[start + 1:j]) + "\n", skipped))
            i = j + 1
        else:
            i += 1
    return blocks


def test_block_extraction_and_skip_mark():
    text = "intro\n```python\na = 1\n```\n<!-- no-test -->\n```python\nraise SystemExit\n```\n"
    blocks = python_blocks(text)
    assert [(b[1], b[2]) for b in blocks] == [("a = 1\n", False), ("raise SystemExit\n", True)]


def test_readme_python_blocks_run(tmp_path, monkeypatch):
    assert README.exists(), "README.md is missing"
    blocks = [b for b in python_blocks(README.read_text()) if not b[2]]
    assert blocks, "README.md has no Python block to run"
    for name in ("examples", "docs"):
        if (ROOT / name).exists():
            os.symlink(ROOT / name, tmp_path / name)
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("MPLBACKEND", "Agg")
    namespace: dict = {"__name__": "__readme__"}
    for line, code, _ in blocks:
        compiled = compile(code, f"README.md (block at line {line})", "exec")
        exec(compiled, namespace)  # noqa: S102 - our own README, run as documentation
