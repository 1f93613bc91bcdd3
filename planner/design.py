"""Unit counts and per-laboratory run orders.

Two run-order schemes, one order per slot (laboratory, trial):

``random``
    A randomized complete block per slot: every material once, in its own
    independent random order (textbook practice, e.g. Montgomery, *Design and Analysis of
    Experiments*, cited from memory; the gauge R&R default of random, blind order). A
    laboratory never gets the same order in two trials when there are at
    least 3 materials and enough orders to go round (after all orders have
    been used, a new cycle starts).

``balanced``
    The rows of a Williams (1949) carryover-balanced Latin square (E. J.
    Williams, *Aust. J. Sci. Res. A* 2:149-168): over a complete set of rows
    each material stands in each position equally often and follows every
    other material equally often. Randomized by relabelling the materials and
    shuffling the rows, which keep the balance; columns are never permuted,
    which would destroy it.

Unit counts follow the split-sample design: one test unit per laboratory per
trial, plus spares per laboratory, units kept back by the host and units for
the homogeneity check.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from planner.draw import Stream

__all__ = ["SCHEMES", "UnitCounts", "williams", "run_orders", "unit_counts"]

SCHEMES = ("random", "balanced")
"""The run-order schemes ``run_orders`` knows."""

Slot = tuple[str, int]


def williams(n: int) -> list[tuple[int, ...]]:
    """Return the Williams carryover-balanced design on 0..n-1: n rows for even n, 2n for odd n.

    The first row is 0, 1, n-1, 2, n-2, 3, ...; row i adds i (mod n) to every
    entry; for odd n the reversed rows follow (Williams 1949; the same rows as
    the R package crossdes prints, there 1-based).
    """
    if n < 1:
        raise ValueError("a Williams design needs at least one treatment")
    if n == 1:
        return [(0,)]
    first = [0 if j == 0 else (j + 1) // 2 if j % 2 else n - j // 2 for j in range(n)]
    rows = [tuple((x + i) % n for x in first) for i in range(n)]
    if n % 2:
        rows += [row[::-1] for row in rows]
    return rows


def run_orders(materials: Sequence[str], slots: Sequence[Slot], *, scheme: str,
               stream: Stream) -> dict[Slot, tuple[str, ...]]:
    """Return for every slot (laboratory, trial) the materials in the order they are tested.

    The result keeps the order of ``slots``; with ``balanced`` the rows of the
    Williams design are dealt in that order, one complete shuffled set after
    another, so a number of slots that is a multiple of the rows is balanced;
    within a set a laboratory gets rows it has not had, where it can. Raises
    ValueError for repeated materials or slots or an unknown scheme (spec.py
    checks those first, so reaching it is our bug).
    """
    if len(set(materials)) != len(materials) or not materials:
        raise ValueError("materials must be distinct and not empty")
    if len(set(slots)) != len(slots):
        raise ValueError("slots must be distinct")
    if scheme == "random":
        return _random_orders(materials, slots, stream)
    if scheme == "balanced":
        return _balanced_orders(materials, slots, stream)
    raise ValueError(f"unknown run-order scheme {scheme!r}; expected one of {SCHEMES}")


def _random_orders(materials: Sequence[str], slots: Sequence[Slot],
                   stream: Stream) -> dict[Slot, tuple[str, ...]]:
    # Redrawing a repeated order keeps every slot's order uniform over all
    # orders (the rule treats all materials alike), while making the orders
    # of one laboratory differ. With 2 materials there are only two orders,
    # and forcing them to alternate would make the second trial predictable.
    avoid = len(materials) >= 3
    orders_in_all = math.factorial(len(materials))
    used: dict[str, set[tuple[str, ...]]] = {}
    out: dict[Slot, tuple[str, ...]] = {}
    for slot in slots:
        lab_used = used.setdefault(slot[0], set())
        if len(lab_used) >= orders_in_all:
            lab_used.clear()  # every order used once: start a new cycle
        order = tuple(stream.shuffle(materials))
        while avoid and order in lab_used:
            order = tuple(stream.shuffle(materials))
        lab_used.add(order)
        out[slot] = order
    return out


def _balanced_orders(materials: Sequence[str], slots: Sequence[Slot],
                     stream: Stream) -> dict[Slot, tuple[str, ...]]:
    rows = williams(len(materials))
    labels = stream.shuffle(materials)
    used: dict[str, set[int]] = {}
    out: dict[Slot, tuple[str, ...]] = {}
    for start in range(0, len(slots), len(rows)):
        # A complete, freshly shuffled set of rows is dealt before any row is
        # dealt again; that is what keeps positions and neighbours balanced.
        chunk = slots[start:start + len(rows)]
        deck = stream.shuffle(range(len(rows)))
        for slot, pick in zip(chunk, _deal(chunk, deck, used)):
            used.setdefault(slot[0], set()).add(pick)
            out[slot] = tuple(labels[x] for x in rows[pick])
    return out


def _deal(chunk: Sequence[Slot], deck: list[int], used: dict[str, set[int]]) -> list[int]:
    """Return one distinct row of the deck per slot, avoiding rows a laboratory already had.

    A maximum bipartite matching (augmenting paths, trying rows in deck order,
    so the result is fixed by the shuffle); slots it cannot serve get the rows
    left over. The set of rows dealt is the deck whatever the matching does.
    """
    owner: dict[int, int] = {}  # row -> index in chunk

    def allowed(i: int, row: int) -> bool:
        return row not in used.get(chunk[i][0], ())

    def place(i: int, seen: set[int]) -> bool:
        for row in deck:
            if row in seen or not allowed(i, row):
                continue
            seen.add(row)
            if row not in owner or place(owner[row], seen):
                owner[row] = i
                return True
        return False

    for i in range(len(chunk)):
        place(i, set())
    picks: dict[int, int] = {i: row for row, i in owner.items()}
    spare = [row for row in deck if row not in owner]
    return [picks[i] if i in picks else spare.pop(0) for i in range(len(chunk))]


@dataclass(frozen=True, slots=True)
class UnitCounts:
    """Units to prepare of one material, by kind, and their total."""

    test: int
    spare: int
    retained: int
    homogeneity: int
    total: int


def unit_counts(*, labs: int, trials: int, spares: int, retained: int,
                homogeneity: int) -> UnitCounts:
    """Return the units of one material: one per laboratory per trial, ``spares`` per
    laboratory, and the ``retained`` and ``homogeneity`` units of the host."""
    for name, value in (("labs", labs), ("trials", trials), ("spares", spares),
                        ("retained", retained), ("homogeneity", homogeneity)):
        if value < 0:
            raise ValueError(f"{name} must not be negative")
    test = labs * trials
    spare = labs * spares
    return UnitCounts(test=test, spare=spare, retained=retained,
                      homogeneity=homogeneity,
                      total=test + spare + retained + homogeneity)
