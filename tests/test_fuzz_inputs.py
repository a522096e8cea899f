"""Fuzzing the command line: every bad input is refused in one line with exit
status 2, never a traceback or a hang, and a refused command writes nothing.

Common practice, no source: a command-line tool reports a bad input as one
line naming it and exits with a usage status (2 here). The cases are our own
(``tests/fuzz_inputs.py``, derived from the bundled files by a seeded
generator); hypothesis picks the category and the seed, derandomized so the
suite sees the same few hundred cases every time. ``bench/fuzz.py`` runs
thousands and prints counts per category.
"""

import os
import shutil
import tempfile

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import fuzz_inputs as fz  # noqa: E402  (tests/ is on sys.path under pytest)

CASES = int(os.environ.get("ATTNSIM_FUZZ_CASES", "330"))
TIMEOUT_S = 120.0   # per case, generous: a hang, not a slow machine, should trip it


@settings(max_examples=CASES, deadline=None, derandomize=True, database=None,
          suppress_health_check=list(HealthCheck))
@given(category=st.sampled_from(fz.CATEGORIES), seed=st.integers(0, 10 ** 6))
def test_bad_input_is_one_line_exit_2_and_writes_nothing(category, seed):
    folder = tempfile.mkdtemp(prefix="attnsim-fuzz-")
    cwd = os.getcwd()
    try:
        case = fz.make_case(category, seed, folder)
        os.chdir(folder)
        before = fz.listing(folder), fz.listing(fz.repo("reports")), fz.listing(fz.repo("traces"))
        outcome = fz.run_case(case, TIMEOUT_S)
        after = fz.listing(folder), fz.listing(fz.repo("reports")), fz.listing(fz.repo("traces"))
    finally:
        os.chdir(cwd)
        shutil.rmtree(folder, ignore_errors=True)
    assert outcome.kind != "traceback", (case, outcome)
    assert outcome.kind != "hang", (case, outcome)
    if case.must_refuse:
        assert outcome.kind == "refused", (case, outcome)
    else:
        assert outcome.kind in ("refused", "accepted"), (case, outcome)
    if outcome.kind == "refused":
        assert before == after, (case, "a refused command changed files")
