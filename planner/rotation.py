"""Who hosts next: a fair, explained host schedule for the coming rounds.

The rules, applied round by round to the past rounds and then to each proposal:

* Only laboratories with ``can_host`` take part (the *pool*). A laboratory is
  available for a round when it has joined (``joined`` on or before the start
  of the host's duty) and no blackout overlaps the host's duty. The duty runs
  from the preparation lead before the round's date (``receive_by -
  prepare_on`` of the spec, or else the longest transit plus 3 days: one to
  prepare, two for a weekend) to the last day of the test window, because the
  host prepares and ships before the date and keeps the retained units and
  answers questions while everybody tests.
* Fair share: in every round each available laboratory of the pool is owed
  ``weight / (sum of the available laboratories' weights)`` of a turn. What a
  laboratory is owed minus the turns it took is its *credit*. A laboratory is
  *due* when its credit is above zero, and its next turn falls *due by* the
  round where, at its present share, its credit would reach one. Of the
  available laboratories, a due one with the nearest due-by round hosts. This
  is earliest-deadline-first over "proportionate fair" subtasks (Baruah, Cohen,
  Plaxton and Varvel, "Proportionate progress", Algorithmica 15, 1996; cited
  from memory), which on one resource keeps every laboratory's count within one
  turn of its exact share while no share exceeds one half (tests/test_rotation.py
  checks this as a property); plain "most credit first" was seen to drift past
  one turn with unequal weights. Everything is done in exact fractions, so no
  order of summation can change a decision.
* Late joiners and blacked-out laboratories are owed nothing for rounds they
  could not host: a laboratory that joins starts level, neither pushed to the
  front for every round it missed nor put in debt, and its waiting clock starts
  on its join date. A laboratory blacked out when its turn came keeps its credit
  and hosts at its next chance.
* Nobody hosts twice in a row while another laboratory is available.
* Ties in credit go to the laboratory that has waited longest (last hosted
  earliest; never hosted counts from the join date, or from the beginning),
  then to the lowest SHA-256 of ``study id NUL laboratory id``, so the choice
  does not depend on the order of laboratories in the spec.
* Past rounds hosted by a laboratory outside the pool (one that no longer
  hosts, or is no longer in the spec) are owed to nobody: they do not count.

Dates of the proposed rounds: the first is ``first_date``, or else the spec's
``receive_by`` (one interval after the last past round if the history already
reaches that date), then every ``round_interval_weeks`` weeks.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date, timedelta
from fractions import Fraction
from typing import TYPE_CHECKING

from planner.errors import SpecError, Where

if TYPE_CHECKING:
    from planner.spec import Lab, Study

__all__ = ["Proposal", "duty_span", "propose"]

# Preparation day plus a weekend between packing and arrival: our own rule when
# the spec gives no prepare_on to measure the lead from.
_LEAD_SLACK_DAYS = 3


@dataclass(frozen=True, slots=True)
class Proposal:
    """One proposed round: its place (1 = next), host, planned date and the reason in one line."""

    round_index: int
    host: str
    date: date
    reason: str


@dataclass(slots=True)
class _State:
    lab: Lab
    weight: Fraction
    order: bytes
    owed: Fraction = Fraction(0)
    share: Fraction = Fraction(0)
    hosted: int = 0
    last_round: str | None = None
    last_date: date | None = None

    @property
    def credit(self) -> Fraction:
        return self.owed - self.hosted

    def due_by(self) -> Fraction:
        """Rounds from now until the credit reaches one turn at the present share."""
        return (1 - self.credit) / self.share

    def waiting_since(self) -> date:
        if self.last_date is not None:
            return self.last_date
        return self.lab.joined if self.lab.joined is not None else date.min


def duty_span(study: Study, when: date) -> tuple[date, date]:
    """Return the first and last day of the host's duty for a round dated ``when``."""
    sched = study.schedule
    if sched.prepare_on is not None:
        lead = (sched.receive_by - sched.prepare_on).days
    else:
        longest = max([sched.transit_days, *(row.days for row in sched.transit),
                       *(lab.transit_days for lab in study.laboratories
                         if lab.transit_days is not None)])
        lead = longest + _LEAD_SLACK_DAYS
    return when - timedelta(days=lead), when + timedelta(days=sched.test_window_days - 1)


def _unavailable(lab: Lab, span: tuple[date, date]) -> str | None:
    """Return why ``lab`` cannot host during ``span``, or None if it can."""
    first, last = span
    if lab.joined is not None and lab.joined > first:
        return f"joins on {lab.joined}"
    for b in lab.blackouts:
        if b.start <= last and b.end >= first:
            why = f" ({b.reason})" if b.reason else ""
            return f"unavailable {b.start} to {b.end}{why}"
    return None


def _times(n: int) -> str:
    return {0: "never hosted", 1: "hosted once", 2: "hosted twice"}.get(n, f"hosted {n} times")


def _step(pool: dict[str, _State], span: tuple[date, date], previous: str | None, *,
          hosted_by: str | None = None) -> tuple[list[_State], dict[str, str]]:
    """Owe this round's shares; return the candidates best first and the reasons others are out.

    ``hosted_by`` (a past round's host) counts as available whatever the spec
    says, because it did host.
    """
    out: dict[str, str] = {}
    available = []
    for lab_id, state in pool.items():
        why = None if lab_id == hosted_by else _unavailable(state.lab, span)
        if why is None:
            available.append(state)
        else:
            out[lab_id] = why
    total = sum((s.weight for s in available), Fraction(0))
    for s in available:
        s.share = s.weight / total
        s.owed += s.share
    if previous is not None and len(available) > 1:
        keep = [s for s in available if s.lab.id != previous]
        if len(keep) < len(available):
            out[previous] = "hosted the previous round"
            available = keep
    available.sort(key=lambda s: (s.credit <= 0, s.due_by(), s.waiting_since(), s.order))
    return available, out


def propose(study: Study, past: Sequence[tuple[str, str, date]], *, rounds: int = 4,
            first_date: date | None = None) -> list[Proposal]:
    """Return the hosts of the next ``rounds`` rounds with a one-line reason each.

    ``past`` holds (round id, host, date) of earlier rounds, oldest first.
    Raise SpecError naming the date when no laboratory can host a round.
    """
    if rounds < 1:
        raise SpecError(f"{rounds!r} rounds asked for; propose at least 1",
                        Where(field="rounds"))
    pool = {lab.id: _State(lab, Fraction(lab.host_weight),
                           hashlib.sha256(f"{study.id}\0{lab.id}".encode()).digest())
            for lab in study.laboratories if lab.can_host}
    seen: set[str] = set()
    history = []
    for entry in sorted(past, key=lambda item: item[2]):
        if entry[0] not in seen:
            seen.add(entry[0])
            history.append(entry)

    previous: str | None = None
    for round_id, host, when in history:
        if host in pool:
            _step(pool, duty_span(study, when), None, hosted_by=host)
            state = pool[host]
            state.hosted += 1
            state.last_round, state.last_date = round_id, when
        previous = host

    interval = timedelta(weeks=study.schedule.round_interval_weeks)
    when = first_date if first_date is not None else study.schedule.receive_by
    if first_date is None and history and history[-1][2] >= when:
        when = history[-1][2] + interval
    proposals: list[Proposal] = []
    for index in range(1, rounds + 1):
        ranked, out = _step(pool, duty_span(study, when), previous)
        if not ranked:
            reasons = "; ".join(f"{lab}: {why}" for lab, why in sorted(out.items()))
            raise SpecError(f"no laboratory can host the round of {when}: "
                            f"{reasons or 'no laboratory has can_host: true'}",
                            Where(field="laboratories"))
        chosen = ranked[0]
        proposals.append(Proposal(index, chosen.lab.id, when, _reason(chosen, ranked, out)))
        chosen.hosted += 1
        chosen.last_round, chosen.last_date = f"proposed round {index}", when
        previous = chosen.lab.id
        when += interval
    return proposals


def _reason(chosen: _State, ranked: list[_State], out: dict[str, str]) -> str:
    """Say in one line why ``chosen`` hosts and why others do not."""
    last = f", last in {chosen.last_round}" if chosen.last_round else (
        f", waiting since joining on {chosen.lab.joined}" if chosen.lab.joined else "")
    weight = f", weight {chosen.weight}" if chosen.weight != 1 else ""
    parts = [(f"{chosen.lab.id}: {_times(chosen.hosted)}{last}, "
              f"fair share so far {float(chosen.owed):.1f}{weight}")]
    if len(ranked) > 1:
        runner = ranked[1]
        if runner.credit > 0 and runner.due_by() == chosen.due_by():
            tie = ("waited longer" if runner.waiting_since() != chosen.waiting_since()
                   else "tie broken by the study's fixed order")
            parts.append(f"ahead of {runner.lab.id}: turn due as soon, {tie}")
        elif runner.credit > 0:
            parts.append(f"ahead of {runner.lab.id}: turn due sooner")
        else:
            parts.append(f"{runner.lab.id} next in line, not yet due")
    elif out:
        parts.append("the only laboratory available")
    parts.extend(f"{lab_id} skipped: {why}" for lab_id, why in sorted(out.items()))
    return "; ".join(parts)
