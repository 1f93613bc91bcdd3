"""Circulating sets: one set of artefacts travels from laboratory to laboratory.

For non-destructive tests the same artefacts go round: the host measures them
first, passes them on, and measures them again at the end (and in the middle of
a long route) so that drift of the artefacts can be seen apart from the
laboratories' differences. Our rules:

* The route starts and ends at the host and visits every other laboratory once,
  in the order with the least total transit time (working days, from
  ``calendar.transit_days``). Up to 8 other laboratories every order is tried;
  beyond that nearest neighbour improved by 2-opt. Ties go to the order of a
  hash of (study id, laboratory id), never to the order of the spec.
* A route with 5 or more other laboratories is long: the host measures again
  after the first half of them.
* Every stop has ``schedule.test_window_days`` calendar days from its first
  working day after arrival; the set leaves on the next shipping day of that
  laboratory's country after its window and arrives ``transit`` working days
  later in the next one's. The route starts at the host on ``prepare_on`` (or
  ``receive_by`` when no preparation day is given).
* Each artefact has one code for the whole route (it is the same object at
  every stop); every stop gets its own run order per trial.
"""

from __future__ import annotations

import hashlib
import itertools
from dataclasses import dataclass
from datetime import date, timedelta
from typing import TYPE_CHECKING, Any

from planner import calendar
from planner.errors import PlannerError, SpecError, Where

if TYPE_CHECKING:
    from planner.spec import Study

__all__ = ["Station", "Route", "plan_route", "stops", "schedule_route", "round_dates",
           "station_key", "check_stability", "LONG_ROUTE", "HOST_VISITS"]

LONG_ROUTE = 5
HOST_VISITS = ("start", "middle", "end")
_EXACT_UP_TO = 8
_DAY = timedelta(days=1)
_WEEKDAY_INDEX = {"mon": 0, "tue": 1, "wed": 2, "thu": 3, "fri": 4, "sat": 5, "sun": 6}


@dataclass(frozen=True, slots=True)
class Station:
    """One stop of the route: who has the set, from whom, until when, and to whom it goes."""

    index: int
    lab: str
    visit: str | None
    received_from: str | None
    arrive: date
    test_start: date
    test_end: date
    pass_on: date | None
    next_lab: str | None
    transit_days: int

    @property
    def key(self) -> str:
        return station_key(self.lab, self.visit)

    def to_json(self) -> dict[str, Any]:
        return {"index": self.index, "lab": self.lab, "visit": self.visit, "key": self.key,
                "received_from": self.received_from, "arrive": self.arrive.isoformat(),
                "test_start": self.test_start.isoformat(), "test_end": self.test_end.isoformat(),
                "pass_on": self.pass_on.isoformat() if self.pass_on else None,
                "next_lab": self.next_lab, "transit_days": self.transit_days}


@dataclass(frozen=True, slots=True)
class Route:
    host: str
    stations: tuple[Station, ...]
    transit_total: int

    def to_json(self) -> list[dict[str, Any]]:
        return [s.to_json() for s in self.stations]


def station_key(lab: str, visit: str | None) -> str:
    """Return the id of a stop: the laboratory itself (the host's first stop too), or
    ``host@visit`` for the host's later stops. Run orders, result forms and submissions
    are all keyed by it."""
    return lab if visit in (None, "start") else f"{lab}@{visit}"


def _cost(study: Study, order: tuple[str, ...]) -> int:
    return sum(calendar.transit_days(study, a, b) for a, b in itertools.pairwise(order))


def plan_route(study: Study, host: str) -> tuple[str, ...]:
    """Return the other laboratories in visiting order, the least total transit first."""
    def tie(lab: str) -> str:
        return hashlib.sha256(f"{study.id}/{lab}".encode()).hexdigest()

    others = sorted((lab.id for lab in study.laboratories if lab.id != host), key=tie)
    if len(others) <= _EXACT_UP_TO:
        best = min(itertools.permutations(others),
                   key=lambda p: _cost(study, (host, *p, host)))
        return tuple(best)
    order, left = [], list(others)
    here = host
    while left:
        nxt = min(left, key=lambda lab: calendar.transit_days(study, here, lab))
        order.append(nxt)
        left.remove(nxt)
        here = nxt
    improved = True
    while improved:
        improved = False
        for i in range(len(order) - 1):
            for j in range(i + 2, len(order) + 1):
                candidate = order[:i] + order[i:j][::-1] + order[j:]
                if _cost(study, (host, *candidate, host)) < _cost(study, (host, *order, host)):
                    order, improved = candidate, True
    return tuple(order)


def stops(study: Study, host: str) -> list[tuple[str, str | None]]:
    """Return the route's stops as (laboratory, host visit or None), from the host back to it."""
    order = plan_route(study, host)
    out: list[tuple[str, str | None]] = [(host, "start")]
    for i, lab in enumerate(order):
        if len(order) >= LONG_ROUTE and i == (len(order) + 1) // 2:
            out.append((host, "middle"))
        out.append((lab, None))
    out.append((host, "end"))
    return out


def schedule_route(study: Study, host: str, *, start: date | None = None) -> Route:
    """Return the route with its hand-over dates; SpecError if no shipping day can be found."""
    sched = study.schedule
    stops_ = stops(study, host)
    first = start or sched.prepare_on or sched.receive_by
    span = 2 + (len(stops_) * (sched.test_window_days + 30)) // 365
    work = calendar.WorkingDays(range(first.year - 1, first.year + span + 1))
    ship_days = {_WEEKDAY_INDEX[d] for d in sched.ship_weekdays}

    def first_working(day: date, country: str) -> date:
        while not work.is_working(day, country):
            day += _DAY
        return day

    def next_ship(after: date, country: str) -> date:
        day = after + _DAY
        for _ in range(60):
            if day.weekday() in ship_days and work.is_working(day, country):
                return day
            day += _DAY
        raise SpecError(f"no shipping day in {country!r} within 60 days after {after}; check "
                        "schedule.ship_weekdays", Where(field="schedule.ship_weekdays"))

    stations: list[Station] = []
    arrive, previous, transit = first, None, 0
    for index, (lab, visit) in enumerate(stops_, start=1):
        country = study.lab(lab).country
        test_start = first_working(arrive, country)
        test_end = test_start + timedelta(days=sched.test_window_days - 1)
        is_last = index == len(stops_)
        next_lab = None if is_last else stops_[index][0]
        pass_on = None if is_last else next_ship(test_end, country)
        stations.append(Station(index, lab, visit, previous, arrive, test_start, test_end,
                                pass_on, next_lab, transit))
        if not is_last:
            assert next_lab is not None and pass_on is not None
            transit = calendar.transit_days(study, lab, next_lab)
            arrive = work.add(pass_on, transit, study.lab(next_lab).country)
            previous = lab
    total = sum(s.transit_days for s in stations)
    return Route(host, tuple(stations), total)


def round_dates(study: Study, route: Route) -> calendar.RoundDates:
    """Return the route as RoundDates: each laboratory's arrival, reporting after the last stop."""
    first, last = route.stations[0], route.stations[-1]
    due = last.test_end
    for _ in range(study.schedule.reporting_days):
        due += _DAY
        while due.weekday() >= 5:
            due += _DAY
    by_lab: dict[str, calendar.LabDates] = {}
    for previous, station in zip((None, *route.stations), route.stations, strict=False):
        if station.lab in by_lab:
            continue
        ship = previous.pass_on if previous and previous.pass_on else station.arrive
        by_lab[station.lab] = calendar.LabDates(station.lab, ship, station.arrive,
                                                station.transit_days)
    labs = tuple(by_lab[lab.id] for lab in study.laboratories)
    return calendar.RoundDates(first.arrive, first.test_start, last.test_end, due, labs)


def check_stability(study: Study, route: Route) -> None:
    """Return None if every artefact lasts the whole route plus the margin; else SpecError.

    One line per material, naming the first stop that would test it too late.
    """
    margin = timedelta(days=study.schedule.stability_margin_days)
    start = route.stations[0].arrive
    problems: list[PlannerError] = []
    for i, material in enumerate(study.materials):
        stable_until = start + timedelta(days=material.stability_days)
        late = next((s for s in route.stations if s.test_end + margin > stable_until), None)
        if late is not None:
            need = route.stations[-1].test_end + margin
            short = (need - stable_until).days
            problems.append(PlannerError(
                f"material {material.id!r} is stable until {stable_until} but laboratory "
                f"{late.lab!r} tests it until {late.test_end} (stop {late.index} of "
                f"{len(route.stations)}); the whole route needs {short} more day"
                f"{'s' if short != 1 else ''}", Where(field=f"materials[{i}].stability_days")))
    if problems:
        raise SpecError(problems[0].message, problems[0].where, problems)
