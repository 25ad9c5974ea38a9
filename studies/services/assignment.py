"""Study-design assignment: which reader reads which case, and in what order.

A pure function of its inputs (case keys, reader keys, design parameters, the
reads that already exist), written with numpy only so it can be tested without a
database. The service layer turns the returned plan into Read rows.

Rules (the study design of design.md, "The job"; assignment issue):

- Each case gets ``readers_per_case`` (k) distinct readers for its first read.
- First-read loads differ by at most one: with n cases and r readers every
  reader has floor(nk/r) or ceil(nk/r) first reads in a fresh design.
- Each reader repeats ``round_half_up(repeat_fraction * first reads)`` of their
  own cases (see :func:`repeat_count`); a repeat comes at least
  ``MIN_REPEAT_GAP`` positions after its first read in the worklist and at
  least one first read comes after the reader's first repeat, whenever the
  worklist is long enough for that (see :func:`plan_reads`).
- Reproducible: same inputs and seed, same plan, whatever the input order.
  (Streams come from numpy's ``Generator``; numpy's stream policy (NEP 19)
  allows them to change between numpy versions, which would only affect reads
  planned after an upgrade: existing reads are kept.)
"""

from __future__ import annotations

import hashlib
import math
from collections import Counter, defaultdict
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from decimal import ROUND_HALF_UP, Decimal

import numpy as np

__all__ = [
    "MIN_REPEAT_GAP",
    "Design",
    "DesignError",
    "ExistingRead",
    "PlannedRead",
    "is_available",
    "plan_extra_read",
    "plan_reads",
    "repeat_available_from",
    "repeat_count",
    "validate_design",
]

#: A repeat read sits at least this many positions after its first read
#: (so at least two other reads come in between), when the list allows it.
MIN_REPEAT_GAP = 3


class DesignError(ValueError):
    """Bad design parameters or inputs; the message names the parameter and value."""


@dataclass(frozen=True)
class Design:
    """Design parameters of a study (see module docstring)."""

    readers_per_case: int
    repeat_fraction: float
    washout_days: float
    seed: int
    max_readers_per_case: int | None = None


@dataclass(frozen=True)
class PlannedRead:
    """One read in the plan: ``position`` is 0-based and unique in the reader's worklist."""

    case: str
    reader: str
    read_number: int
    position: int


@dataclass(frozen=True)
class ExistingRead(PlannedRead):
    """A read already stored; ``opened`` once the reader has opened or submitted it."""

    opened: bool


# ----------------------------------------------------------------------------- validation


def _is_int(value: object) -> bool:
    return isinstance(value, int | np.integer) and not isinstance(value, bool)


def _is_real(value: object) -> bool:
    return isinstance(value, int | float | np.integer | np.floating) and not isinstance(value, bool)


def validate_design(design: Design, n_readers: int) -> None:
    """Raise DesignError unless ``design`` is usable with ``n_readers`` readers."""
    if not isinstance(design, Design):
        raise DesignError(f"design must be a Design, got {design!r}")
    if not _is_int(n_readers) or n_readers < 0:
        raise DesignError(f"n_readers must be a non-negative integer, got {n_readers!r}")
    k = design.readers_per_case
    if not _is_int(k) or k < 1:
        raise DesignError(f"readers_per_case must be an integer >= 1, got {k!r}")
    if k > n_readers:
        raise DesignError(
            f"readers_per_case={k!r} is larger than the number of readers ({n_readers})"
        )
    fraction = design.repeat_fraction
    if not _is_real(fraction) or not math.isfinite(fraction) or not 0 <= fraction <= 1:
        raise DesignError(f"repeat_fraction must be a number from 0 to 1, got {fraction!r}")
    _check_washout(design.washout_days)
    if not _is_int(design.seed) or design.seed < 0:
        raise DesignError(f"seed must be a non-negative integer, got {design.seed!r}")
    cap = design.max_readers_per_case
    if cap is not None and (not _is_int(cap) or cap < k):
        raise DesignError(
            f"max_readers_per_case must be None or an integer >= readers_per_case ({k}), "
            f"got {cap!r}"
        )


def _check_washout(washout_days: object) -> None:
    if not _is_real(washout_days) or not math.isfinite(washout_days) or washout_days < 0:
        raise DesignError(f"washout_days must be a finite number >= 0, got {washout_days!r}")


def _check_keys(keys: Sequence[str], name: str) -> list[str]:
    if isinstance(keys, str):
        raise DesignError(f"{name} must be a sequence of keys, not the string {keys!r}")
    seen: set[str] = set()
    for key in keys:
        if not isinstance(key, str) or not key:
            raise DesignError(f"{name} keys must be non-empty strings, got {key!r}")
        if key in seen:
            raise DesignError(f"{name} contains the key {key!r} more than once")
        seen.add(key)
    return sorted(seen)


def _check_existing(
    existing: Sequence[PlannedRead], cases: set[str] | None, readers: set[str]
) -> list[PlannedRead]:
    """Check existing reads for consistency; ``cases=None`` accepts any case key."""
    reads = list(existing)
    slots: set[tuple[str, int]] = set()
    keys: set[tuple[str, str, int]] = set()
    for read in reads:
        if not isinstance(read, PlannedRead):
            raise DesignError(f"existing must hold PlannedRead/ExistingRead, got {read!r}")
        if cases is not None and read.case not in cases:
            raise DesignError(f"existing read {read!r} names case {read.case!r} not in cases")
        if read.reader not in readers:
            raise DesignError(f"existing read {read!r} names reader {read.reader!r} not in readers")
        if read.read_number not in (1, 2):
            raise DesignError(f"existing read_number must be 1 or 2, got {read.read_number!r}")
        if not _is_int(read.position) or read.position < 0:
            raise DesignError(f"existing position must be an integer >= 0, got {read!r}")
        if (read.reader, read.position) in slots:
            raise DesignError(f"existing reads share reader and position: {read!r}")
        if (read.case, read.reader, read.read_number) in keys:
            raise DesignError(f"existing reads hold the same read twice: {read!r}")
        slots.add((read.reader, read.position))
        keys.add((read.case, read.reader, read.read_number))
    for case, reader, number in keys:
        if number == 2 and (case, reader, 1) not in keys:
            raise DesignError(
                f"existing repeat read of case {case!r} by reader {reader!r} has no first read"
            )
    return reads


# ----------------------------------------------------------------------------- helpers


def _rng(seed: int, *labels: str) -> np.random.Generator:
    """A stream derived from the seed and labels (stable, unlike Python's hash())."""
    words = [int.from_bytes(hashlib.sha256(lab.encode()).digest()[:8], "big") for lab in labels]
    return np.random.default_rng([int(seed), *words])


def _ranks(keys: list[str], seed: int, label: str) -> dict[str, int]:
    """A seeded random rank for each key (keys must already be sorted)."""
    order = _rng(seed, label).permutation(len(keys))
    return {keys[int(i)]: rank for rank, i in enumerate(order)}


def repeat_count(repeat_fraction: float, n_first_reads: int) -> int:
    """Number of repeat reads for a reader with ``n_first_reads`` first reads.

    ``fraction * n`` rounded half up on the decimal value of the fraction, so
    0.25 of 6 cases gives 2 and 0.5 of 3 cases gives 2 (Python's round() would
    round half to even and float products like 0.1 * 15 are inexact).
    """
    product = Decimal(repr(float(repeat_fraction))) * n_first_reads
    return int(product.to_integral_value(rounding=ROUND_HALF_UP))


class _Plan:
    """Working state of plan_reads: kept existing reads plus newly planned ones."""

    def __init__(self, reads: list[PlannedRead]) -> None:
        self.kept = {(r.case, r.reader, r.read_number): r for r in reads}
        self.new: set[tuple[str, str, int]] = set()
        self.first_readers: dict[str, set[str]] = defaultdict(set)
        self.loads: Counter[str] = Counter()
        for case, reader, number in self.kept:
            if number == 1:
                self.first_readers[case].add(reader)
                self.loads[reader] += 1

    def opened(self, key: tuple[str, str, int]) -> bool:
        read = self.kept.get(key)
        return bool(getattr(read, "opened", False))

    def add_first(self, case: str, reader: str) -> None:
        self.new.add((case, reader, 1))
        self.first_readers[case].add(reader)
        self.loads[reader] += 1

    def remove_first(self, case: str, reader: str) -> None:
        for number in (1, 2):
            self.kept.pop((case, reader, number), None)
            self.new.discard((case, reader, number))
        self.first_readers[case].discard(reader)
        self.loads[reader] -= 1

    def keys(self) -> set[tuple[str, str, int]]:
        return set(self.kept) | self.new


def _fill_cases(plan: _Plan, cases: list[str], readers: list[str], design: Design) -> None:
    """Give every case k distinct first readers: the least loaded, ties broken at random.

    Cases are visited in a seeded random order. Taking the k least-loaded
    readers keeps loads within one: if loads are m or m + 1 before a case, they
    are m and m + 1, or m + 1 and m + 2, after it. Ties are broken by a random
    draw per case (not a fixed reader cycle), so the same readers are not
    always paired with each other.
    """
    k = design.readers_per_case
    case_order = _rng(design.seed, "case-order").permutation(len(cases))
    for index in case_order:
        case = cases[int(index)]
        need = k - len(plan.first_readers[case])
        if need <= 0:
            continue
        draw = _rng(design.seed, "case-readers", case).random(len(readers))
        tie = {reader: float(draw[i]) for i, reader in enumerate(readers)}
        free = [r for r in readers if r not in plan.first_readers[case]]
        free.sort(key=lambda r: (plan.loads[r], tie[r], r))
        for reader in free[:need]:
            plan.add_first(case, reader)


def _movable_case(plan: _Plan, heavy: str, light: str) -> str | None:
    """A first read of ``heavy`` that may move to ``light``: not opened, repeat not opened."""
    options = []
    for case, readers in plan.first_readers.items():
        if heavy not in readers or light in readers:
            continue
        if plan.opened((case, heavy, 1)) or plan.opened((case, heavy, 2)):
            continue
        kept = plan.kept.get((case, heavy, 1))
        options.append((kept is not None, -(kept.position if kept else 0), case))
    return min(options)[2] if options else None


def _rebalance(plan: _Plan, readers: list[str], seed: int) -> None:
    """Move unopened first reads from heavy to light readers until loads are within one.

    Each move lowers the sum of squared loads, so the loop ends. A move is
    always possible while every read of the heavy reader is unopened (the heavy
    reader has more cases, so one of them is not the light reader's).
    """
    rank = _ranks(readers, seed, "rebalance")
    while True:
        order = sorted(readers, key=lambda r: (plan.loads[r], rank[r]))
        move = None
        for light in order:
            for heavy in reversed(order):
                if plan.loads[heavy] - plan.loads[light] < 2:
                    break
                case = _movable_case(plan, heavy, light)
                if case is not None:
                    move = (case, heavy, light)
                    break
            if move:
                break
        if move is None:
            return
        case, heavy, light = move
        plan.remove_first(case, heavy)
        plan.add_first(case, light)


def _plan_repeats(plan: _Plan, reader: str, design: Design) -> None:
    """Bring the reader's repeat reads to repeat_count(fraction, first reads)."""
    keys = plan.keys()
    firsts = sorted(c for c, r, n in keys if r == reader and n == 1)
    repeated = {c for c, r, n in keys if r == reader and n == 2}
    target = repeat_count(design.repeat_fraction, len(firsts))
    if len(repeated) > target:
        droppable = [c for c in repeated if not plan.opened((c, reader, 2))]
        # drop reads not yet stored first, then the latest-placed stored ones
        droppable.sort(
            key=lambda c: ((c, reader, 2) in plan.kept, -_position_of(plan, (c, reader, 2)), c)
        )
        for case in droppable[: len(repeated) - target]:
            plan.kept.pop((case, reader, 2), None)
            plan.new.discard((case, reader, 2))
    elif len(repeated) < target:
        eligible = [c for c in firsts if c not in repeated]
        order = _rng(design.seed, "repeats", reader).permutation(len(eligible))
        for index in order[: target - len(repeated)]:
            plan.new.add((eligible[int(index)], reader, 2))


def _position_of(plan: _Plan, key: tuple[str, str, int]) -> int:
    read = plan.kept.get(key)
    return read.position if read is not None else -1


# ----------------------------------------------------------------------------- ordering


def _completion(
    t: int, a: int, b: int, released: list[int], seen_repeat: bool, hold_back: bool
) -> tuple[int, bool] | None:
    """Smallest gap and mixing of a canonical completion of a partial worklist.

    From position ``t`` with ``a`` pending first reads that get a repeat,
    ``b`` that do not, and ``released`` (first positions of repeats whose first
    read is placed): place the first reads, then the repeats in order of their
    first read. With ``hold_back`` one first read is kept back and placed just
    after the earliest repeat, so a first read follows a repeat. Returns
    (smallest gap, whether a first read follows a repeat), or None.
    """
    if hold_back and a + b == 0:
        return None
    keep_repeated = hold_back and b == 0
    n_now = a + b - (1 if hold_back else 0)
    queue = sorted(released) + list(range(t, t + (a - 1 if keep_repeated else a)))
    pos = t + n_now
    gaps: list[int] = []
    mixed = seen_repeat and a + b > 0
    if hold_back:
        if not queue:
            return None
        gaps.append(pos - queue.pop(0))
        pos += 1
        if keep_repeated:
            queue.append(pos)
        pos += 1
        mixed = True
    for first_pos in queue:
        gaps.append(pos - first_pos)
        pos += 1
    return (min(gaps) if gaps else MIN_REPEAT_GAP), mixed


def _feasible(state: tuple, gap: int, need_mix: bool) -> bool:
    t, a, b, released, seen_repeat, mixed = state
    for hold_back in (False, True):
        result = _completion(t, a, b, released, seen_repeat, hold_back)
        if result is not None and result[0] >= gap and (mixed or result[1] or not need_mix):
            return True
    return False


class _Block:
    """A worklist block being ordered: pending first reads and released repeats."""

    def __init__(
        self, start: int, pending: list[str], repeats: set[str], first_pos: dict[str, int]
    ):
        self.t, self.pending, self.repeats = start, pending, repeats
        self.placed = {c: p for c, p in first_pos.items() if c in repeats}
        self.released = sorted(self.placed)
        self.seen_repeat = self.mixed = False

    def state(self, case: str | None = None, number: int = 0) -> tuple:
        """(t, a, b, released positions, seen_repeat, mixed), after placing ``case`` if given."""
        rest = [c for c in self.pending if c != case] if number == 1 else self.pending
        rel = [self.placed[c] for c in self.released if not (number == 2 and c == case)]
        if number == 1 and case in self.repeats:
            rel.append(self.t)
        a = sum(c in self.repeats for c in rest)
        seen = self.seen_repeat or number == 2
        mixed = self.mixed or (number == 1 and self.seen_repeat)
        return (self.t + (case is not None), a, len(rest) - a, rel, seen, mixed)

    def place(self, case: str, number: int) -> tuple[str, int, int]:
        if number == 1:
            self.pending.remove(case)
            self.mixed = self.mixed or self.seen_repeat
            if case in self.repeats:
                self.placed[case] = self.t
                self.released = sorted([*self.released, case])
        else:
            self.released.remove(case)
            self.seen_repeat = True
        self.t += 1
        return case, number, self.t - 1


def _order_block(
    rng: np.random.Generator,
    start: int,
    firsts: list[str],
    repeats: set[str],
    first_pos: dict[str, int],
) -> list[tuple[str, int, int]]:
    """Order new first reads and repeats from ``start``: (case, read_number, position).

    Each step picks a random allowed read (a repeat with probability repeats
    left / reads left, so repeats spread over the list instead of drifting to
    its end), keeping only choices after which a canonical completion still
    meets the goal: gap >= MIN_REPEAT_GAP and a first read after a repeat,
    relaxed (mixing first, then the gap) only when the block cannot meet it.
    """
    block = _Block(
        start, [firsts[int(i)] for i in rng.permutation(len(firsts))], repeats, first_pos
    )
    initial = block.state()
    gap, need_mix = next(
        (g, m)
        for g in range(MIN_REPEAT_GAP, 0, -1)
        for m in (True, False)
        if _feasible(initial, g, m)
    )
    out: list[tuple[str, int, int]] = []
    while block.pending or block.released:
        firsts_now = [(c, 1) for c in block.pending]
        repeats_now = [(c, 2) for c in block.released if block.t - block.placed[c] >= gap]
        left = len(block.released) + sum(c in repeats for c in block.pending)
        prefer_repeat = rng.random() * (len(block.pending) + left) < left
        groups = [repeats_now, firsts_now] if prefer_repeat else [firsts_now, repeats_now]
        options = [g[int(i)] for g in groups for i in rng.permutation(len(g))]
        choice = next((o for o in options if _feasible(block.state(*o), gap, need_mix)), None)
        if choice is None:  # pragma: no cover - the canonical next step always passes
            raise RuntimeError("assignment ordering found no allowed read")
        out.append(block.place(*choice))
    return out


# ----------------------------------------------------------------------------- public API


def plan_reads(
    cases: Sequence[str],
    readers: Sequence[str],
    design: Design,
    existing: Sequence[ExistingRead] = (),
) -> list[PlannedRead]:
    """The complete read plan of a study, sorted by reader then position.

    With ``existing=()`` a fresh balanced design. With existing reads (an open
    study to which readers or cases were added) every existing read is kept
    exactly (case, reader, read_number, position), except that unopened first
    reads move from the most to the least loaded readers while loads differ by
    two or more (their unopened repeats go with them), and unopened repeats are
    dropped when a reader has more than the repeat count. Cases short of k
    first readers get the least-loaded readers who have not read them. New
    reads of a reader are placed after all their kept reads (so after every
    opened read), ordered by the seeded rule of the module docstring; when
    kept reads were dropped, positions stay unique but may have gaps.

    Gap and mixing: with m >= MIN_REPEAT_GAP first reads in a fresh worklist
    every repeat is at least MIN_REPEAT_GAP positions after its first read;
    with m >= MIN_REPEAT_GAP + 1 and any repeat, at least one first read also
    comes after the reader's first repeat (repeats are not a tail block).

    Raises DesignError (and returns nothing) for a bad design, duplicate or
    non-string keys, or existing reads that are inconsistent or name unknown
    cases or readers. Inputs are never modified.
    """
    case_keys = _check_keys(cases, "cases")
    reader_keys = _check_keys(readers, "readers")
    validate_design(design, len(reader_keys))
    reads = _check_existing(existing, set(case_keys), set(reader_keys))
    plan = _Plan(reads)
    _fill_cases(plan, case_keys, reader_keys, design)
    _rebalance(plan, reader_keys, design.seed)
    new_reads: list[PlannedRead] = []
    for reader in reader_keys:
        _plan_repeats(plan, reader, design)
        new_reads.extend(_order_new_reads(plan, reader, design.seed))
    result = [
        PlannedRead(r.case, r.reader, r.read_number, r.position) for r in plan.kept.values()
    ] + new_reads
    return sorted(result, key=lambda r: (r.reader, r.position))


def _order_new_reads(plan: _Plan, reader: str, seed: int) -> list[PlannedRead]:
    """Place the reader's new reads after all the reader's kept reads."""
    kept = [r for key, r in plan.kept.items() if key[1] == reader]
    start = max((r.position for r in kept), default=-1) + 1
    firsts = sorted(c for c, r, n in plan.new if r == reader and n == 1)
    repeats = {c for c, r, n in plan.new if r == reader and n == 2}
    if not firsts and not repeats:
        return []
    first_pos = {r.case: r.position for r in kept if r.read_number == 1}
    order = _order_block(_rng(seed, "worklist", reader), start, firsts, repeats, first_pos)
    return [PlannedRead(case, reader, number, pos) for case, number, pos in order]


def plan_extra_read(
    case: str,
    readers: Sequence[str],
    design: Design,
    existing: Sequence[PlannedRead],
) -> PlannedRead | None:
    """One more first read of ``case`` for an adaptive design, or None.

    The new reader is one who has no read of the case, with the fewest first
    reads in ``existing`` (ties broken by a rank seeded from the seed and the
    case); the read goes at the end of that reader's worklist. None when the
    case already has ``max_readers_per_case`` distinct readers (None means no
    cap beyond the readers available) or every reader has read it.
    """
    if not isinstance(case, str) or not case:
        raise DesignError(f"case must be a non-empty string, got {case!r}")
    reader_keys = _check_keys(readers, "readers")
    validate_design(design, len(reader_keys))
    reads = _check_existing(existing, None, set(reader_keys))
    have = {r.reader for r in reads if r.case == case}
    cap = design.max_readers_per_case
    if cap is not None and len(have) >= cap:
        return None
    free = [r for r in reader_keys if r not in have]
    if not free:
        return None
    loads = Counter(r.reader for r in reads if r.read_number == 1)
    rank = _ranks(reader_keys, design.seed, f"extra-read:{case}")
    reader = min(free, key=lambda r: (loads[r], rank[r]))
    position = max((r.position for r in reads if r.reader == reader), default=-1) + 1
    return PlannedRead(case, reader, 1, position)


def repeat_available_from(
    first_submitted_at: datetime | None, washout_days: float
) -> datetime | None:
    """When a repeat read opens: None until the first read is submitted, else + washout."""
    _check_washout(washout_days)
    if first_submitted_at is None:
        return None
    if not isinstance(first_submitted_at, datetime):
        raise DesignError(
            f"first_submitted_at must be a datetime or None, got {first_submitted_at!r}"
        )
    return first_submitted_at + timedelta(days=float(washout_days))


def is_available(read_number: int, available_from: datetime | None, now: datetime) -> bool:
    """Whether a read may be opened at ``now``.

    A read with no ``available_from`` is available if it is a first read and
    not (yet) if it is a repeat read (its first read is not submitted); a read
    with one is available from that moment on.
    """
    if read_number not in (1, 2) or isinstance(read_number, bool):
        raise DesignError(f"read_number must be 1 or 2, got {read_number!r}")
    if not isinstance(now, datetime):
        raise DesignError(f"now must be a datetime, got {now!r}")
    if available_from is None:
        return read_number == 1
    if not isinstance(available_from, datetime):
        raise DesignError(f"available_from must be a datetime or None, got {available_from!r}")
    if (available_from.tzinfo is None) != (now.tzinfo is None):
        raise DesignError(
            f"available_from {available_from!r} and now {now!r} must both be aware or both naive"
        )
    return now >= available_from
