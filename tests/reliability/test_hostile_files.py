"""Hostile protocol files, bench profiles and CSV curves through the ``tracer`` command
(``tracer.reliability.fuzz_files``): a clear refusal (exit 2, bounded lines on stderr, no
traceback) or a clean acceptance, and nothing half-written.

CI: :data:`CI_CASES` per kind. ``--run-slow`` (nightly): :data:`NIGHTLY_CASES` per kind.
"""
from __future__ import annotations

import pytest

from tracer.reliability import fuzz_files

CI_CASES = 100
NIGHTLY_CASES = 2000


def _count(request) -> int:
    return NIGHTLY_CASES if request.config.getoption("--run-slow") else CI_CASES


@pytest.mark.timeout(1800)
@pytest.mark.parametrize("kind", fuzz_files.KINDS)
def test_hostile_files_are_refused_clearly(kind, request, tmp_path):
    count = _count(request)
    summary = fuzz_files.fuzz(kind, count, seed=7, workdir=tmp_path)
    assert not summary.skipped, summary.skipped
    assert summary.failures == 0, summary.summary()
    assert summary.cases >= count


def test_the_judge_sees_a_traceback_an_unnamed_file_and_a_huge_line():
    # the checks above are only as good as this judge: it must flag each of these
    bad = fuzz_files.CliOutcome(2, "", "Traceback (most recent call last):\n  x\n")
    assert any("traceback" in p for p in fuzz_files.judge_refusal(bad, allowed=(0, 2), file_name=None))
    unnamed = fuzz_files.CliOutcome(2, "", "1 problem:\n  something is wrong\n")
    assert fuzz_files.judge_refusal(unnamed, allowed=(0, 2), file_name="p.yaml")
    huge = fuzz_files.CliOutcome(2, "", "p.yaml: " + "x" * 5000 + "\n")
    assert fuzz_files.judge_refusal(huge, allowed=(0, 2), file_name="p.yaml")
    internal = fuzz_files.CliOutcome(1, "", "internal error while checking p.yaml: KeyError\n")
    assert fuzz_files.judge_refusal(internal, allowed=(0, 2), file_name="p.yaml")
    silent = fuzz_files.CliOutcome(2, "", "")
    assert fuzz_files.judge_refusal(silent, allowed=(0, 2), file_name=None)
    escaped = fuzz_files.CliOutcome(None, "", "", escaped="ValueError: boom")
    assert fuzz_files.judge_refusal(escaped, allowed=(0, 2), file_name=None)
    fine = fuzz_files.CliOutcome(2, "", "1 problem:\n  p.yaml:3: limits: missing\n")
    assert fuzz_files.judge_refusal(fine, allowed=(0, 2), file_name="p.yaml") == []


def test_every_base_file_is_valid_to_begin_with(tmp_path):
    # mutations start from valid files, so a refusal is the mutation's doing
    import yaml

    bench = tmp_path / "bench.yaml"
    bench.write_text(yaml.safe_dump(fuzz_files.bench_document()), encoding="utf-8")
    texts, _ = fuzz_files.protocol_bases()
    for k, text in enumerate(texts):
        path = tmp_path / f"p{k}.yaml"
        path.write_bytes(text)
        outcome = fuzz_files.run_cli(["check", str(path), "--bench", str(bench)])
        assert outcome.code == 0, outcome.err
    curve = tmp_path / "curve.csv"
    curve.write_bytes(fuzz_files.csv_base())
    outcome = fuzz_files.run_cli(["fit", str(curve)])
    assert outcome.code == 0, outcome.err


@pytest.mark.parametrize("scalar", ["!!timestamp 2024-01-01x", "!!bool maybe", "!!int 0x",
                                    "!!float one", "!!binary '%%%'"])
def test_explicitly_tagged_scalars_that_do_not_construct_are_refused(scalar, tmp_path):
    # found by the fuzzer: PyYAML raised AttributeError (timestamp) and KeyError (bool)
    for text in (f"schema: 1\nname: {scalar}\n", f"{scalar}: 1\nschema: 1\n"):
        path = tmp_path / "p.yaml"
        path.write_text(text, encoding="utf-8")
        outcome = fuzz_files.run_cli(["check", str(path)])
        assert fuzz_files.judge_refusal(outcome, allowed=(2,), file_name="p.yaml") == [], outcome.err
