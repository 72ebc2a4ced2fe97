"""Set-up for the docstring examples of ``topopt`` and ``filters`` (pytest --doctest-modules).

Each example runs in a scratch folder in which ``examples/`` of the repository is
visible, so paths such as ``"examples/mbb-beam.toml"`` work as written in the docstrings
and nothing an example writes lands in the repository. The tests in ``tests/`` keep
their own set-up (``tests/conftest.py``).
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent


@pytest.fixture(autouse=True)
def _docstring_examples_in_a_scratch_folder(request):
    if not isinstance(request.node, pytest.DoctestItem):
        yield
        return
    tmp_path = request.getfixturevalue("tmp_path")
    monkeypatch = request.getfixturevalue("monkeypatch")
    os.symlink(ROOT / "examples", tmp_path / "examples")
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("MPLBACKEND", "Agg")
    yield
