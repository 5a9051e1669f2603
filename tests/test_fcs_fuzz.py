"""Fuzz of the FCS reader: a few hundred seeded mutations of fcsparser's files and the demo tubes.

Every outcome must be a successful read or an FcsFileError naming the file:
no other exception, no read longer than 5 s, no silent shift of values after
a moved DATA offset and no silently lost events after a changed $TOT (see
tests/fuzz_fcs.py; the longer run is tests/benchmarks/fuzz_benchmark.py).
"""

from tests.fuzz_fcs import run_cases


def test_mutated_fcs_files_give_a_read_or_our_error(tmp_path):
    result = run_cases(300, seed=20261202, scratch=str(tmp_path), limit=5.0)
    counts = result["counts"]
    assert sum(counts.values()) == 300
    assert counts["foreign"] == 0 and counts["hang"] == 0 and counts["shift"] == 0, result["examples"]
    # the mutations reach both outcomes (a fuzz that only errors or only reads tests little)
    assert counts["read"] >= 30 and counts["error"] >= 30
