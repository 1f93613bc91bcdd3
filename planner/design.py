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
    other material equally often. Relabelling the materials and shuffling the
    rows keep the balance; columns are never permuted, which would destroy it.

    The slots are dealt trial by trial (every laboratory's trial 1, then
    trial 2, ...) in sets of at most one complete set of rows, never two slots
    of one laboratory in a set, and every set gets its own random relabelling
    (a relabelled Williams square is still one, so each complete set balances
    on its own). One relabelling shared by the whole round would leak: a
    laboratory's trial-1 and trial-2 rows would come from one square, so which
    position of trial 2 holds the material of position p of trial 1 would
    depend only on the two row numbers, not on the secret relabelling, and a
    participant knowing the scheme could link its own units across trials (a
    square of R rows allows only R - 1 such position maps besides the
    identity, against n! - 1 for independent random orders of n materials).

    A laboratory does not get an order twice where it can (3 or more
    materials, as under ``random``). A relabelling whose rows include u
    earlier orders of a laboratory of the set (u the most of any) is kept only
    with chance (R - u) / R, the chance that a random row of it is new to that
    laboratory, and drawn again otherwise; the rows are then dealt so that no
    laboratory gets an order it has had. When the laboratories of every set
    have their earlier orders in the same squares (as many laboratories as a
    multiple of R), each laboratory's orders then follow the law of
    ``random``: every order it has not had is equally likely. Otherwise the
    law is close to it (for 4 materials the R - 1 position maps between rows
    of one square come a few per cent too often; the excess shrinks with
    n!). Keeping every such square, and only steering the laboratory to
    another of its rows, would favour those maps by a factor of about
    R / (R - 1).

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

__all__ = ["SCHEMES", "UnitCounts", "williams", "run_orders", "balance_note", "unit_counts"]

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

    The result keeps the order of ``slots``. With ``balanced`` the slots are dealt
    trial by trial, whatever order they come in, in sets of Williams rows with a
    relabelling of their own (see the module docstring): as many slots as a
    multiple of the rows, with at least as many laboratories as rows, are
    balanced exactly (``balance_note`` says when not). Raises ValueError for
    repeated materials or slots or an unknown scheme (spec.py checks those first,
    so reaching it is our bug).
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


def balance_note(parties: int, materials: int, trials: int) -> str | None:
    """Return None when the balanced scheme balances positions and neighbours exactly,
    else one sentence saying why not and how many laboratories would."""
    rows = len(williams(materials)) if materials > 0 else 1
    orders = parties * trials
    if orders == 0 or rows == 1 or (parties >= rows and orders % rows == 0):
        return None
    step = rows // math.gcd(rows, trials)  # laboratories come in multiples of it
    square = f"the {rows} rows of a balanced design for {materials} materials"
    if parties < rows:
        # The n rows of an even n hold each material once per position, the 2n of an odd n twice.
        most = "once" if materials % 2 == 0 else "twice"
        more = ", ".join(str(rows + k * step) for k in (1, 2))
        return (f"{_labs(parties)} {'is' if parties == 1 else 'are'} fewer than {square}, "
                f"so each trial gets {parties} of the {rows} rows with its own relabelling: "
                f"each material stands at most {most} in each position per trial, but positions "
                f"and neighbours are balanced only approximately; {_labs(rows)} (or {more}, …) "
                f"would balance them exactly")
    below, above = parties // step * step, (parties // step + 1) * step
    fix = f"{below} or {above}" if below >= rows else str(above)
    return (f"{_labs(parties)} with {trials} {'trial' if trials == 1 else 'trials'} make "
            f"{orders} run orders, not a multiple of {square}, so the last {orders % rows} "
            f"come from an incomplete set of rows: positions and neighbours are balanced only "
            f"approximately; {fix} laboratories would balance them exactly")


def _labs(count: int) -> str:
    return f"{count} {'laboratory' if count == 1 else 'laboratories'}"


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
    # As under random: with 2 materials avoiding a repeat would make trial 2 predictable.
    avoid = len(materials) >= 3
    orders_in_all = math.factorial(len(materials))
    used: dict[str, set[tuple[str, ...]]] = {}
    out: dict[Slot, tuple[str, ...]] = {}
    for chunk in _sets(slots, len(rows)):
        for slot in chunk:
            lab_used = used.setdefault(slot[0], set())
            if len(lab_used) >= orders_in_all:
                lab_used.clear()  # every order used once: start a new cycle
        seen = used if avoid else {}
        square = _relabelled(rows, materials, chunk, seen, stream)
        deck = stream.shuffle(square)
        for slot, order in zip(chunk, _deal(chunk, deck, seen)):
            used[slot[0]].add(order)
            out[slot] = order
    return {slot: out[slot] for slot in slots}


def _sets(slots: Sequence[Slot], size: int) -> list[list[Slot]]:
    """Return the slots trial by trial (stable within a trial) in sets of at most ``size``,
    a set closing early rather than take a second slot of one laboratory."""
    sets: list[list[Slot]] = [[]]
    for slot in sorted(slots, key=lambda s: s[1]):
        if len(sets[-1]) == size or any(s[0] == slot[0] for s in sets[-1]):
            sets.append([])
        sets[-1].append(slot)
    return [chunk for chunk in sets if chunk]


def _relabelled(rows: Sequence[tuple[int, ...]], materials: Sequence[str], chunk: Sequence[Slot],
                used: dict[str, set[tuple[str, ...]]], stream: Stream) -> list[tuple[str, ...]]:
    """Return the rows under a fresh random relabelling of the materials.

    A square holding u earlier orders of a laboratory of the set (u the most of any) is
    kept with chance (R - u) / R, the chance that a random row of it is new to that
    laboratory; never below 1 / R, so that laboratories that have had whole squares cannot
    stall the draw.
    """
    while True:
        labels = stream.shuffle(materials)
        square = [tuple(labels[x] for x in row) for row in rows]
        rows_here = set(square)
        most = max(len(rows_here.intersection(used.get(slot[0], ()))) for slot in chunk)
        if most == 0 or stream.below(len(square)) >= min(most, len(square) - 1):
            return square


def _deal(chunk: Sequence[Slot], deck: list[tuple[str, ...]],
          used: dict[str, set[tuple[str, ...]]]) -> list[tuple[str, ...]]:
    """Return one distinct order of the deck per slot, avoiding orders a laboratory already had.

    A maximum bipartite matching (augmenting paths, trying orders in deck order,
    so the result is fixed by the shuffle); slots it cannot serve get the orders
    left over. A full set deals the whole deck whatever the matching does.
    """
    owner: dict[tuple[str, ...], int] = {}  # order -> index in chunk

    def allowed(i: int, order: tuple[str, ...]) -> bool:
        return order not in used.get(chunk[i][0], ())

    def place(i: int, seen: set[tuple[str, ...]]) -> bool:
        for order in deck:
            if order in seen or not allowed(i, order):
                continue
            seen.add(order)
            if order not in owner or place(owner[order], seen):
                owner[order] = i
                return True
        return False

    for i in range(len(chunk)):
        place(i, set())
    picks = {i: order for order, i in owner.items()}
    spare = [order for order in deck if order not in owner]
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
