"""Test helper: run a process that is interrupted (Ctrl-C) after a number of written blocks."""

from __future__ import annotations

import pytest

import pmap.results as results


def interrupted(monkeypatch, run, after_blocks: int = 2) -> None:
    """Call ``run()`` with a KeyboardInterrupt raised once ``after_blocks`` blocks are done."""
    real, calls = results._write_block, {"n": 0}

    def killed(*a, **k):
        calls["n"] += 1
        if calls["n"] > after_blocks:
            raise KeyboardInterrupt  # as if Ctrl-C arrived after those blocks
        return real(*a, **k)

    monkeypatch.setattr(results, "_write_block", killed)
    with pytest.raises(KeyboardInterrupt):
        run()
    monkeypatch.setattr(results, "_write_block", real)
