"""Fixtures for the protocol and bench-profile tests (shared constants: protocol_helpers.py)."""
from __future__ import annotations

from pathlib import Path

import pytest

from protocol_helpers import DRIVER_NAMES, bench_profile_doc_example


@pytest.fixture
def bench_file(tmp_path: Path) -> Path:
    path = tmp_path / "bench.yaml"
    path.write_text(bench_profile_doc_example(), encoding="utf-8")
    return path


@pytest.fixture
def bench(bench_file: Path):
    from tracer.bench_profile import load_bench_profile
    return load_bench_profile(bench_file, known_drivers=DRIVER_NAMES)


@pytest.fixture
def write(tmp_path: Path):
    def _write(text: str | bytes, name: str = "protocol.yaml") -> Path:
        path = tmp_path / name
        if isinstance(text, bytes):
            path.write_bytes(text)
        else:
            path.write_text(text, encoding="utf-8")
        return path
    return _write
