"""Seeded fuzzing of plans, profiles, tables and run folders (see ``tests/_fuzz.py``).

CI runs :data:`_fuzz.DEFAULT_CASES` cases per seed; ``NOISEBENCH_FUZZ_CASES=5000`` makes a
nightly-size run. Every damaged input must be accepted or refused with a clean one-line error:
no traceback, no hang, and no intact journal line lost.

Behaviour tests only: no outside reference is involved.

Behaviour tests: no outside reference is involved (seeded random mutation of inputs is common
practice).
"""

from __future__ import annotations

import logging

import _fuzz
import pytest

# Settings no bench can have are refused, and legal but unusual ones are warned once, by the one
# range table (noisebench/science/ranges.py, issue 10). A value that is neither stays here until
# its range lands (the test below fails while a listed value is refused or warned).
AWAITING_RANGES: set[str] = set()
# legal on some bench, so warned rather than refused (attenuators have gain <= 0 dB; an LNA's
# output P1dB can be -1 dBm; an analyzer rated for -1 dBm input would be unusual, not impossible)
WARNED_AS_UNUSUAL = {
    "analyzer max_input_dbm = -1",
    "expected DUT gain 0 dB",
    "expected DUT gain -1 dB",
    "band gain_min_db = 0",
    "DUT output P1dB -1 dBm",
}


@pytest.fixture(scope="module")
def pristine(tmp_path_factory):
    return _fuzz.build_pristine(tmp_path_factory.mktemp("fuzz-pristine"))


@pytest.mark.parametrize("seed", [1, 2])
def test_damaged_inputs_get_a_clean_answer(pristine, tmp_path, seed):
    cases = _fuzz.cases_from_env()
    logging.disable(logging.CRITICAL)  # thousands of expected warnings would flood the log
    try:
        tally = _fuzz.fuzz(pristine, tmp_path, cases, seed=seed)
    finally:
        logging.disable(logging.NOTSET)
    counts = tally.counts()
    print(f"fuzz seed {seed}: {cases} cases {dict(counts)}")
    failures = [f"{o.target} [{o.mutation}] {o.kind}: {o.detail}" for o in tally.failures()]
    assert failures == [], f"{len(failures)} of {cases} bad outcomes, first:\n" + "\n".join(
        failures[:10]
    )
    # every target was exercised and most damage was refused, not silently accepted
    assert set(tally.by_target()) == set(_fuzz.TARGETS)
    assert counts["clean"] > cases // 3


def test_no_impossible_value_is_accepted_beyond_the_known_gaps(tmp_path):
    accepted, refused, warned = _fuzz.impossible_values_accepted(tmp_path)
    total = len(accepted) + len(refused) + len(warned)
    print(f"implausible values: {len(refused)} refused, {len(warned)} warned, of {total}")
    assert set(accepted) <= AWAITING_RANGES, set(accepted) - AWAITING_RANGES
    assert not AWAITING_RANGES & (set(refused) | set(warned)), "answered now: remove it"
    assert set(warned) == WARNED_AS_UNUSUAL
