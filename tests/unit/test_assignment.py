"""Tests for the study-design assignment (studies/services/assignment.py).

Source of the rules checked here: the assignment rules of the study design
(each case read by k distinct readers, balanced loads, seeded order, repeat
reads after a washout, extension without reshuffling opened reads, adaptive
reads up to a cap). The balance bound floor(nk/r) <= load <= ceil(nk/r) is the
pigeonhole bound for spreading nk reads over r readers; balanced allocation of
cases to readers is common practice in multi-reader studies. Properties are
checked with hypothesis (derandomized, no example database) so the run is
reproducible.
"""

from __future__ import annotations

import math
import subprocess
import sys
from collections import Counter, defaultdict
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from studies.services.assignment import (
    MIN_REPEAT_GAP,
    Design,
    DesignError,
    ExistingRead,
    PlannedRead,
    is_available,
    plan_extra_read,
    plan_reads,
    repeat_available_from,
    repeat_count,
    validate_design,
)

PROPS = settings(max_examples=40, deadline=None, database=None, derandomize=True)


def keys(prefix: str, n: int) -> list[str]:
    return [f"{prefix}-{i:03d}" for i in range(n)]


@st.composite
def studies(draw, max_cases: int = 24, max_readers: int = 7):
    """(cases, readers, design) with 1 <= k <= number of readers."""
    n_readers = draw(st.integers(1, max_readers))
    n_cases = draw(st.integers(1, max_cases))
    k = draw(st.integers(1, n_readers))
    fraction = draw(st.sampled_from([0.0, 0.1, 0.2, 0.25, 0.5, 0.75, 1.0]) | st.floats(0, 1))
    seed = draw(st.integers(0, 2**32 - 1))
    design = Design(k, fraction, draw(st.floats(0, 60)), seed)
    return keys("case", n_cases), keys("reader", n_readers), design


def by_reader(plan: list[PlannedRead]) -> dict[str, list[PlannedRead]]:
    lists: dict[str, list[PlannedRead]] = defaultdict(list)
    for read in sorted(plan, key=lambda r: (r.reader, r.position)):
        lists[read.reader].append(read)
    return lists


def first_readers(plan: list[PlannedRead]) -> dict[str, list[str]]:
    out: dict[str, list[str]] = defaultdict(list)
    for read in plan:
        if read.read_number == 1:
            out[read.case].append(read.reader)
    return out


def check_worklists(plan: list[PlannedRead]) -> None:
    """Positions unique per reader; every repeat has an earlier first read, same reader."""
    for reader, reads in by_reader(plan).items():
        positions = [r.position for r in reads]
        assert len(set(positions)) == len(positions), reader
        first_at = {r.case: r.position for r in reads if r.read_number == 1}
        for read in reads:
            if read.read_number == 2:
                assert read.case in first_at
                assert read.position > first_at[read.case]
    assert len({(r.case, r.reader, r.read_number) for r in plan}) == len(plan)


# ----------------------------------------------------------------------------- fresh designs


@PROPS
@given(studies())
def test_it_gives_every_case_exactly_k_distinct_readers(study):
    """Each case gets exactly k distinct first readers (design rule)."""
    cases, readers, design = study
    plan = plan_reads(cases, readers, design)
    got = first_readers(plan)
    assert sorted(got) == cases
    for case in cases:
        assert len(got[case]) == design.readers_per_case
        assert len(set(got[case])) == design.readers_per_case


@PROPS
@given(studies())
def test_it_keeps_first_read_loads_within_one(study):
    """Loads are floor(nk/r) or ceil(nk/r) (pigeonhole bound), so they differ by <= 1."""
    cases, readers, design = study
    plan = plan_reads(cases, readers, design)
    loads = Counter(r.reader for r in plan if r.read_number == 1)
    total = len(cases) * design.readers_per_case
    low, high = total // len(readers), math.ceil(total / len(readers))
    for reader in readers:
        assert low <= loads[reader] <= high
    assert sum(loads.values()) == total


@PROPS
@given(studies(), st.randoms(use_true_random=False))
def test_it_gives_the_same_plan_for_the_same_inputs_in_any_order(study, random):
    """Reproducible from the seed, independent of the input order (design rule)."""
    cases, readers, design = study
    shuffled_cases, shuffled_readers = list(cases), list(readers)
    random.shuffle(shuffled_cases)
    random.shuffle(shuffled_readers)
    assert plan_reads(cases, readers, design) == plan_reads(
        shuffled_cases, shuffled_readers, design
    )


def test_it_usually_gives_different_orders_for_different_seeds():
    """20 seeds on 12 cases x 4 readers (k=2) give at least 19 distinct plans (design rule)."""
    cases, readers = keys("case", 12), keys("reader", 4)
    plans = {tuple(plan_reads(cases, readers, Design(2, 0.25, 7, seed))) for seed in range(20)}
    assert len(plans) >= 19


def test_it_does_not_always_pair_the_same_readers():
    """With k=2 of 4 readers over 40 cases, more than two reader pairs occur.

    A plain round-robin over a fixed cycle would always pair the same two
    couples when r is a multiple of k; the design should mix readers (common
    practice, so agreement is not estimated on a few fixed pairs).
    """
    plan = plan_reads(keys("case", 40), keys("reader", 4), Design(2, 0.0, 0, 3))
    pairs = {tuple(sorted(rs)) for rs in first_readers(plan).values()}
    assert len(pairs) > 2


@PROPS
@given(studies())
def test_it_numbers_each_worklist_from_zero_without_gaps(study):
    """A fresh worklist uses positions 0..len-1, each once."""
    cases, readers, design = study
    for reads in by_reader(plan_reads(cases, readers, design)).values():
        assert [r.position for r in reads] == list(range(len(reads)))


# ----------------------------------------------------------------------------- repeat reads


@pytest.mark.parametrize(
    ("fraction", "n", "expected"),
    [(0.25, 6, 2), (0.5, 3, 2), (0.1, 15, 2), (0.1, 4, 0), (0.1, 5, 1), (1.0, 7, 7), (0, 9, 0)],
)
def test_it_rounds_the_repeat_count_half_up(fraction, n, expected):
    """fraction * n rounded half up (hand-computed: 1.5 -> 2, 0.4 -> 0, 0.5 -> 1)."""
    assert repeat_count(fraction, n) == expected


@PROPS
@given(studies())
def test_it_repeats_the_chosen_fraction_of_each_readers_cases(study):
    """Each reader repeats round_half_up(fraction * own first reads) distinct own cases."""
    cases, readers, design = study
    for reads in by_reader(plan_reads(cases, readers, design)).values():
        firsts = [r.case for r in reads if r.read_number == 1]
        repeats = [r.case for r in reads if r.read_number == 2]
        assert len(repeats) == repeat_count(design.repeat_fraction, len(firsts))
        assert len(set(repeats)) == len(repeats)
        assert set(repeats) <= set(firsts)


@PROPS
@given(studies())
def test_it_places_each_repeat_after_its_first_read_with_the_minimum_gap(study):
    """Repeat after its first read; >= MIN_REPEAT_GAP later when >= that many first reads."""
    cases, readers, design = study
    plan = plan_reads(cases, readers, design)
    check_worklists(plan)
    for reads in by_reader(plan).values():
        first_at = {r.case: r.position for r in reads if r.read_number == 1}
        if len(first_at) < MIN_REPEAT_GAP:
            continue
        for read in reads:
            if read.read_number == 2:
                assert read.position - first_at[read.case] >= MIN_REPEAT_GAP


@PROPS
@given(studies(max_cases=30))
def test_it_interleaves_repeats_with_first_reads(study):
    """With > MIN_REPEAT_GAP first reads and a repeat, a first read follows the first repeat.

    So repeats never form a block at the end of the worklist.
    """
    cases, readers, design = study
    for reads in by_reader(plan_reads(cases, readers, design)).values():
        numbers = [r.read_number for r in reads]
        if numbers.count(1) <= MIN_REPEAT_GAP or 2 not in numbers:
            continue
        assert 1 in numbers[numbers.index(2) :]


def test_it_spreads_repeats_over_long_worklists():
    """Over 6 readers x 100 first reads, repeats fall in every fifth of the worklists."""
    plan = plan_reads(keys("case", 200), keys("reader", 6), Design(3, 0.2, 14, 11))
    fifths = Counter(5 * r.position // 120 for r in plan if r.read_number == 2)
    assert sorted(fifths) == [0, 1, 2, 3, 4]
    assert min(fifths.values()) >= 5


# ----------------------------------------------------------------------------- washout


@PROPS
@given(
    st.datetimes(
        min_value=datetime(2020, 1, 1), max_value=datetime(2030, 1, 1), timezones=st.just(UTC)
    ),
    st.floats(0, 365),
)
def test_it_opens_a_repeat_only_after_the_washout(submitted, washout):
    """available_from = first submitted + washout days; not available a microsecond before."""
    start = repeat_available_from(submitted, washout)
    assert start == submitted + timedelta(days=washout)
    assert is_available(2, start, start)
    assert is_available(2, start, start + timedelta(days=1))
    if start - timedelta(microseconds=1) >= submitted:
        assert not is_available(2, start, start - timedelta(microseconds=1))
    if start > submitted:
        assert not is_available(2, start, submitted)


def test_it_keeps_a_repeat_closed_until_the_first_read_is_submitted():
    """No submission, no availability date: repeat closed, first read open."""
    now = datetime(2026, 3, 1, tzinfo=UTC)
    assert repeat_available_from(None, 14) is None
    assert not is_available(2, None, now)
    assert is_available(1, None, now)


def test_it_refuses_to_compare_naive_and_aware_times():
    """Mixing naive and aware datetimes is a clear DesignError, not a TypeError."""
    with pytest.raises(DesignError, match="aware"):
        is_available(2, datetime(2026, 3, 1), datetime(2026, 3, 2, tzinfo=UTC))


# ----------------------------------------------------------------------------- extension


@st.composite
def extensions(draw):
    """A fresh study, some reads opened (worklist prefixes), and added cases/readers."""
    cases, readers, design = draw(studies(max_cases=16, max_readers=5))
    plan = plan_reads(cases, readers, design)
    opened = set()
    for reader, reads in by_reader(plan).items():
        opened |= {(r.case, reader, r.read_number) for r in reads[: draw(st.integers(0, 6))]}
    existing = [
        ExistingRead(
            r.case, r.reader, r.read_number, r.position, (r.case, r.reader, r.read_number) in opened
        )
        for r in plan
    ]
    new_cases = keys("late-case", draw(st.integers(0, 8)))
    new_readers = keys("late-reader", draw(st.integers(0, 3)))
    return cases + new_cases, readers + new_readers, design, existing, new_cases


@PROPS
@given(extensions())
def test_it_extends_an_open_study_without_touching_opened_reads(ext):
    """Opened reads kept exactly; new cases get k readers; new reads after opened ones."""
    cases, readers, design, existing, new_cases = ext
    plan = plan_reads(cases, readers, design, existing)
    planned = set(plan)
    for read in existing:
        if read.opened:
            assert PlannedRead(read.case, read.reader, read.read_number, read.position) in planned
    got = first_readers(plan)
    for case in cases:
        assert len(set(got[case])) == len(got[case]) >= design.readers_per_case
    for case in new_cases:
        assert len(got[case]) == design.readers_per_case
    old = {PlannedRead(r.case, r.reader, r.read_number, r.position) for r in existing}
    last_opened = defaultdict(lambda: -1)
    for read in existing:
        if read.opened:
            last_opened[read.reader] = max(last_opened[read.reader], read.position)
    for read in plan:
        if read not in old:
            assert read.position > last_opened[read.reader]
    check_worklists(plan)


@PROPS
@given(extensions())
def test_it_rebalances_when_no_read_is_opened(ext):
    """With every existing read unopened, loads after extension differ by at most one."""
    cases, readers, design, existing, _ = ext
    unopened = [ExistingRead(r.case, r.reader, r.read_number, r.position, False) for r in existing]
    plan = plan_reads(cases, readers, design, unopened)
    loads = Counter(r.reader for r in plan if r.read_number == 1)
    assert max(loads[r] for r in readers) - min(loads[r] for r in readers) <= 1
    for reads in by_reader(plan).values():
        n_first = sum(r.read_number == 1 for r in reads)
        assert sum(r.read_number == 2 for r in reads) == repeat_count(
            design.repeat_fraction, n_first
        )
    check_worklists(plan)


@PROPS
@given(studies(), st.integers(1, 10))
def test_it_keeps_every_read_when_only_cases_are_added(study, n_new):
    """Adding cases (no readers) keeps every existing read, opened or not, and is balanced."""
    cases, readers, design = study
    plan = plan_reads(cases, readers, design)
    existing = [ExistingRead(r.case, r.reader, r.read_number, r.position, False) for r in plan]
    more = plan_reads(cases + keys("late-case", n_new), readers, design, existing)
    assert set(plan) <= set(more)
    loads = Counter(r.reader for r in more if r.read_number == 1)
    assert max(loads[r] for r in readers) - min(loads[r] for r in readers) <= 1


@PROPS
@given(studies())
def test_it_returns_the_same_plan_when_re_planned_with_nothing_added(study):
    """Re-planning a stored plan with the same inputs changes nothing."""
    cases, readers, design = study
    plan = plan_reads(cases, readers, design)
    existing = [ExistingRead(r.case, r.reader, r.read_number, r.position, False) for r in plan]
    assert plan_reads(cases, readers, design, existing) == plan


# ----------------------------------------------------------------------------- adaptive reads


@PROPS
@given(studies(max_cases=10), st.integers(0, 3), st.data())
def test_it_adds_adaptive_reads_from_new_readers_up_to_the_cap(study, extra, data):
    """Each extra read goes to a reader new to the case, least loaded; stops at the cap."""
    cases, readers, design = study
    cap = min(len(readers), design.readers_per_case + extra)
    design = Design(
        design.readers_per_case, design.repeat_fraction, design.washout_days, design.seed, cap
    )
    plan = plan_reads(cases, readers, design)
    case = data.draw(st.sampled_from(cases))
    while (read := plan_extra_read(case, readers, design, plan)) is not None:
        have = {r.reader for r in plan if r.case == case}
        assert read.reader not in have and read.read_number == 1
        loads = Counter(r.reader for r in plan if r.read_number == 1)
        assert loads[read.reader] == min(loads[r] for r in readers if r not in have)
        assert (
            read.position
            == max((r.position for r in plan if r.reader == read.reader), default=-1) + 1
        )
        plan = [*plan, read]
    assert len({r.reader for r in plan if r.case == case}) == cap
    check_worklists(plan)


def test_it_returns_none_when_every_reader_has_read_the_case():
    """No cap and no reader left: no extra read."""
    readers = keys("reader", 3)
    design = Design(3, 0.0, 0, 5)
    plan = plan_reads(["case-a"], readers, design)
    assert plan_extra_read("case-a", readers, design, plan) is None


def test_it_breaks_adaptive_ties_by_the_seed():
    """Same inputs, same extra reader; across seeds more than one reader gets chosen."""
    readers = keys("reader", 6)
    plan = plan_reads(keys("case", 6), readers, Design(2, 0.0, 0, 1))
    chosen = set()
    for seed in range(12):
        design = Design(2, 0.0, 0, seed)
        first = plan_extra_read("case-000", readers, design, plan)
        assert first == plan_extra_read("case-000", readers, design, plan)
        chosen.add(first.reader)
    assert len(chosen) > 1


# ----------------------------------------------------------------------------- bad input

GOOD = Design(2, 0.25, 14, 1)


@pytest.mark.parametrize(
    ("design", "n_readers", "names"),
    [
        (Design(4, 0.25, 14, 1), 3, "readers_per_case=4"),
        (Design(0, 0.25, 14, 1), 3, "readers_per_case"),
        (Design(2.0, 0.25, 14, 1), 3, "readers_per_case"),
        (Design(True, 0.25, 14, 1), 3, "readers_per_case"),
        (Design(2, -0.1, 14, 1), 3, "repeat_fraction"),
        (Design(2, 1.5, 14, 1), 3, "repeat_fraction"),
        (Design(2, float("nan"), 14, 1), 3, "repeat_fraction"),
        (Design(2, 0.25, -1, 1), 3, "washout_days"),
        (Design(2, 0.25, float("inf"), 1), 3, "washout_days"),
        (Design(2, 0.25, 14, -3), 3, "seed"),
        (Design(2, 0.25, 14, 1, 1), 3, "max_readers_per_case"),
    ],
)
def test_it_rejects_a_bad_design_naming_the_parameter(design, n_readers, names):
    """Bad design parameters raise DesignError naming the parameter and the value."""
    with pytest.raises(DesignError, match=names):
        validate_design(design, n_readers)
    with pytest.raises(DesignError, match=names):
        plan_reads(keys("case", 4), keys("reader", n_readers), design)


@pytest.mark.parametrize(
    ("cases", "readers", "names"),
    [
        (["a", "b", "a"], ["r1", "r2"], "cases contains the key 'a'"),
        (["a", "b"], ["r1", "r2", "r1"], "readers contains the key 'r1'"),
        (["a", ""], ["r1", "r2"], "cases keys"),
        (["a", 7], ["r1", "r2"], "cases keys"),
        ("ab", ["r1", "r2"], "cases must be a sequence"),
    ],
)
def test_it_rejects_bad_keys(cases, readers, names):
    """Duplicate, empty or non-string keys raise DesignError quoting the key."""
    with pytest.raises(DesignError, match=names):
        plan_reads(cases, readers, GOOD)


@pytest.mark.parametrize(
    ("read", "names"),
    [
        (ExistingRead("zz", "r1", 1, 0, True), "case 'zz' not in cases"),
        (ExistingRead("a", "zz", 1, 0, True), "reader 'zz' not in readers"),
        (ExistingRead("a", "r1", 3, 0, True), "read_number must be 1 or 2, got 3"),
        (ExistingRead("a", "r1", 1, -1, True), "position"),
        (ExistingRead("b", "r1", 2, 5, False), "has no first read"),
        (ExistingRead("b", "r1", 1, 0, False), "share reader and position"),
    ],
)
def test_it_rejects_inconsistent_existing_reads(read, names):
    """Existing reads that cannot belong to the study raise DesignError; inputs untouched."""
    existing = [ExistingRead("a", "r1", 1, 0, True), read]
    before = list(existing)
    with pytest.raises(DesignError, match=names):
        plan_reads(["a", "b"], ["r1", "r2"], GOOD, existing)
    assert existing == before


def test_it_rejects_bad_times_and_read_numbers():
    """Negative washout, non-datetime times and read numbers other than 1/2 raise DesignError."""
    when = datetime(2026, 3, 1, tzinfo=UTC)
    with pytest.raises(DesignError, match="washout_days"):
        repeat_available_from(when, -2)
    with pytest.raises(DesignError, match="first_submitted_at"):
        repeat_available_from("2026-03-01", 2)
    with pytest.raises(DesignError, match="read_number"):
        is_available(3, when, when)
    with pytest.raises(DesignError, match="now"):
        is_available(2, when, "later")


def test_it_rejects_a_bad_adaptive_request():
    """plan_extra_read checks the case key and the design like plan_reads."""
    with pytest.raises(DesignError, match="case"):
        plan_extra_read("", ["r1", "r2"], GOOD, [])
    with pytest.raises(DesignError, match="readers_per_case"):
        plan_extra_read("a", ["r1"], GOOD, [])


def test_it_does_not_import_django():
    """The assignment module is pure: importing it loads no Django (design rule)."""
    code = "import sys, studies.services.assignment; print('django' in sys.modules)"
    out = subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True,
        text=True,
        check=True,
        cwd=Path(__file__).resolve().parents[2],
    )
    assert out.stdout.strip() == "False"
