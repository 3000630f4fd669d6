"""Shared fixtures: small files the tests write themselves, and a byte-level catalog snapshot."""

from __future__ import annotations

from pathlib import Path

import pytest


def snapshot(root: Path) -> dict[str, bytes]:
    """Every file under ``root`` with its bytes (the lock file included), for byte-for-byte comparisons."""
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


@pytest.fixture
def write(tmp_path: Path):
    """write(name, text_or_bytes) -> path of a new file under the test's temporary folder."""

    def _write(name: str, content: str | bytes) -> Path:
        p = tmp_path / name
        p.parent.mkdir(parents=True, exist_ok=True)
        if isinstance(content, str):
            p.write_text(content, encoding="utf-8")
        else:
            p.write_bytes(content)
        return p

    return _write


SIMPLE_CSV = "t_s,bandwidth_bps,rtt_ms\n0,1000000,20\n1,2000000,22\n2,3000000,25\n3,0,\n"
