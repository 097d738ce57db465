"""A short, fixed-seed run of the fuzzers in tests/fuzz.py (the long run is
`python -m tests.fuzz --seconds 60`): mutated model files and random command lines
must end cleanly (an estimator or a UserError; exit code 0, 1 or 2, no traceback)."""

from __future__ import annotations

from fuzz import run


def test_fuzzers_find_only_clean_outcomes(capsys):
    outcomes = run(seconds=15, first_seed=0, echo=lambda _: None)
    with capsys.disabled():
        print("\nfuzz (15 s, seed 0): " + ", ".join(f"{k} {v}"
                                                    for k, v in sorted(outcomes.items())))
    assert outcomes["batches"] >= 2  # both fuzzers ran at least once
    assert outcomes["refused"] > 0 and outcomes["exit 2"] > 0
