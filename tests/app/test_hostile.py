"""The hostile corpus (tests/app/hostile): every case run as a subprocess under a memory limit
(RLIMIT_AS) and a time limit; none may end in an internal error, a trace, a hang or a kill, and each must
have its expected outcome (error with its exit code and the file, key or photo named; warning; result).

Exit codes are those of the table in DEVELOPERS.md ("Exit codes")."""

from __future__ import annotations

import os

import pytest

from tests.app.hostile.corpus import build_corpus
from tests.app.hostile.runner import run_all, summary


@pytest.fixture(scope="module")
def outcomes(tmp_path_factory):
    cases = build_corpus(tmp_path_factory.mktemp("hostile"))
    return run_all(cases, workers=max(2, min(4, os.cpu_count() or 2)))


def test_corpus_is_large_and_covers_every_kind_of_input(outcomes):
    groups = {o.case.name.split("/")[0] for o in outcomes}
    assert len(outcomes) >= 150
    assert {"photo", "cell", "parts", "calibration", "state", "out"} <= groups
    assert {o.case.kind for o in outcomes} == {"error", "warning", "result"}


def test_no_internal_error_trace_hang_or_kill(outcomes):
    bad = [f"{o.case.name}: {o.kind}: {o.output.strip()[:300]}" for o in outcomes
           if o.kind in ("internal", "traceback", "hang", "killed")]
    assert not bad, "\n".join(bad)


def test_every_case_has_its_expected_outcome(outcomes):
    assert all(o.as_expected for o in outcomes), summary(outcomes)


def test_every_error_is_one_line_naming_what_to_fix(outcomes):
    for o in outcomes:
        if o.kind != "error" or o.case.name.startswith("misc/"):
            continue
        errors = [line for line in o.output.splitlines() if line.startswith("error: ")]
        assert len(errors) >= 1, (o.case.name, o.output)
        assert all(len(line) < 600 for line in errors), (o.case.name, errors)
