"""Logistics of a round: ship, arrival, test and report dates on working days.

The rules, in the order they are applied:

* Transit days from the host to a laboratory come from ``schedule.transit``
  (a row from the host to the laboratory, or else the row for the opposite
  direction), else the laboratory's own ``transit_days``, else the schedule's
  default. They are counted in working days of the destination: a parcel
  shipped on day *s* with 2 transit days arrives on the second working day
  after *s* in the destination country.
* A working day is Monday to Friday and not a public holiday of that country
  (the ``holidays`` package). A country the package does not know has weekends
  only.
* A parcel leaves on a shipping day: a working day of the host's country whose
  weekday is in ``schedule.ship_weekdays``. Each parcel leaves on the latest
  shipping day that still arrives by ``receive_by``, so material spends as little
  time as possible in transit and waiting; never on or before the preparation
  day. If even the first shipping day after preparation arrives late, that
  parcel ships then and testing starts later for everybody.
* The host's own units are not shipped: ship = arrive = the preparation day.
* ``prepare_on`` is the spec's date for the spec's own round; for any other
  receive-by date (or when the spec gives none) it is the host's working day
  before the earliest shipping day.
* Testing starts on one common day for all laboratories: the first day on or
  after ``receive_by`` and after every arrival that is a working day in every
  participant's country (looking two weeks ahead; if no day in that range is
  free everywhere, the first weekday). It ends ``test_window_days - 1`` calendar
  days later. Results are due ``reporting_days`` weekdays (Monday to Friday)
  after the end of testing; public holidays are not skipped there, because the
  results go to the coordinator, not to one country.

Stability (``check_stability``): a material prepared on ``prepare_on`` with
``stability_days`` is usable up to and including ``prepare_on + stability_days``;
that day must not be earlier than the end of testing plus
``schedule.stability_margin_days``.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from datetime import date, timedelta
from typing import TYPE_CHECKING, Any

from planner.errors import PlannerError, SpecError, Where

if TYPE_CHECKING:
    from planner.spec import Study

__all__ = [
    "LabDates",
    "RoundDates",
    "WorkingDays",
    "check_stability",
    "schedule_round",
    "transit_days",
]

_DAY = timedelta(days=1)
_WEEKDAY_INDEX = {"mon": 0, "tue": 1, "wed": 2, "thu": 3, "fri": 4, "sat": 5, "sun": 6}
# How far the searches look before giving up; far beyond any real transit or holiday run.
_SEARCH_DAYS = 60
_COMMON_START_DAYS = 14


@dataclass(frozen=True, slots=True)
class LabDates:
    """One laboratory's parcel: when it leaves the host and when it arrives."""

    lab: str
    ship: date
    arrive: date
    transit_days: int


@dataclass(frozen=True, slots=True)
class RoundDates:
    """The dates of one round; ``labs`` in the order of the spec's laboratories."""

    prepare_on: date
    test_start: date
    test_end: date
    results_due: date
    labs: tuple[LabDates, ...]

    def lab(self, lab_id: str) -> LabDates:
        """Return the dates of one laboratory (KeyError if it is not in the round)."""
        for item in self.labs:
            if item.lab == lab_id:
                return item
        raise KeyError(lab_id)

    def to_json(self) -> dict[str, Any]:
        """Return the dates as ISO strings, laboratories keyed by id."""
        return {
            "prepare_on": self.prepare_on.isoformat(),
            "test_start": self.test_start.isoformat(),
            "test_end": self.test_end.isoformat(),
            "results_due": self.results_due.isoformat(),
            "labs": {item.lab: {"ship": item.ship.isoformat(), "arrive": item.arrive.isoformat(),
                                "transit_days": item.transit_days} for item in self.labs},
        }


def _public_holidays(country: str, years: tuple[int, ...]) -> frozenset[date]:
    """Return the public holidays of ``country`` in ``years`` as the ``holidays`` package
    gives them (empty for a country it does not know), loading that country's module only.

    ``holidays.country_holidays`` imports the package's ``countries`` folder whole, some 250
    modules (about 0.04 s, most of what ``check`` spends on holidays), to use one. The
    package's registry names each country's module, so only that file is run; anything the
    registry or the folder does not say as expected falls back to the package's own way.
    """
    import holidays

    entity = None
    try:
        entity = _entity(country)
    except Exception:  # another layout of the package: its own lookup below still works
        entity = None
    if entity is None:
        try:
            return frozenset(holidays.country_holidays(country, years=years))
        except NotImplementedError:
            # An unknown country keeps weekends only; a spec must not fail for it.
            return frozenset()
    return frozenset(entity(years=years))


def _entity(country: str) -> Any:
    """Return the ``holidays`` class of ``country`` from its own module, or None."""
    import importlib.util
    import sys
    from pathlib import Path

    import holidays
    from holidays.registry import COUNTRIES

    for module, names in COUNTRIES.items():
        if country in names[1:]:
            break
    else:
        return None
    name = f"holidays.countries.{module}"
    loaded = sys.modules.get(name)
    if loaded is None:
        path = Path(holidays.__file__).parent / "countries" / f"{module}.py"
        spec = importlib.util.spec_from_file_location(name, path)
        if spec is None or spec.loader is None or not path.is_file():
            return None
        loaded = importlib.util.module_from_spec(spec)
        sys.modules[name] = loaded
        try:
            spec.loader.exec_module(loaded)
        except BaseException:
            del sys.modules[name]
            raise
    return getattr(loaded, country, None)


class WorkingDays:
    """Public holidays by country, loaded once per country for a span of years."""

    __slots__ = ("_by_country", "_years")

    def __init__(self, years: Iterable[int]) -> None:
        self._years = tuple(sorted(set(years)))
        self._by_country: dict[str, frozenset[date]] = {}

    def holidays(self, country: str) -> frozenset[date]:
        """Return the public holidays of ``country`` (empty if the package does not know it)."""
        found = self._by_country.get(country)
        if found is None:
            found = self._by_country[country] = _public_holidays(country, self._years)
        return found

    def is_working(self, day: date, country: str) -> bool:
        """Return whether ``day`` is Monday to Friday and not a public holiday of ``country``."""
        return day.weekday() < 5 and day not in self.holidays(country)

    def add(self, day: date, count: int, country: str) -> date:
        """Return the ``count``-th working day of ``country`` after ``day`` (``day`` itself if 0)."""
        while count > 0:
            day += _DAY
            if self.is_working(day, country):
                count -= 1
        return day

    def before(self, day: date, country: str) -> date:
        """Return the last working day of ``country`` before ``day``."""
        day -= _DAY
        while not self.is_working(day, country):
            day -= _DAY
        return day


def transit_days(study: Study, host: str, lab: str) -> int:
    """Return the transit days from ``host`` to ``lab``: table row, then lab value, then default."""
    if host == lab:
        return 0
    reverse = None
    for row in study.schedule.transit:
        if row.origin == host and row.destination == lab:
            return row.days
        if row.origin == lab and row.destination == host:
            reverse = row.days
    if reverse is not None:
        return reverse
    own = study.lab(lab).transit_days
    return own if own is not None else study.schedule.transit_days


def schedule_round(study: Study, host: str, *, receive_by: date | None = None) -> RoundDates:
    """Return the round's dates with ``host`` shipping; SpecError if no shipping day exists.

    ``receive_by`` defaults to the spec's; give another date (or a target test
    start) to schedule a later round.
    """
    sched = study.schedule
    target = sched.receive_by if receive_by is None else receive_by
    try:
        origin = study.lab(host).country
    except KeyError:
        raise SpecError(f"host {host!r} is not a laboratory of this study",
                        Where(field="laboratories")) from None
    ship_days = {_WEEKDAY_INDEX[name] for name in sched.ship_weekdays}
    work = WorkingDays(range(target.year - 1, target.year + 2))
    fixed_prep = sched.prepare_on if target == sched.receive_by else None

    def is_ship_day(day: date) -> bool:
        return day.weekday() in ship_days and work.is_working(day, origin)

    def latest_ship(country: str, days: int) -> date:
        day = target
        for _ in range(_SEARCH_DAYS):
            if is_ship_day(day) and work.add(day, days, country) <= target:
                return day
            day -= _DAY
        raise SpecError(f"no shipping day from {host!r} in the {_SEARCH_DAYS} days before "
                        f"{target} reaches a laboratory in {country!r} in {days} working days; "
                        "check schedule.ship_weekdays", Where(field="schedule.ship_weekdays"))

    def first_ship_after(day: date) -> date:
        for _ in range(_SEARCH_DAYS):
            day += _DAY
            if is_ship_day(day):
                return day
        raise SpecError(f"no shipping day from {host!r} in the {_SEARCH_DAYS} days after {day}; "
                        "check schedule.ship_weekdays", Where(field="schedule.ship_weekdays"))

    # Laboratories with the same country and transit share one answer; this keeps
    # hundreds of laboratories cheap.
    plans: dict[tuple[str, int], date] = {}
    wanted: list[tuple[str, str, int]] = []
    for lab in study.laboratories:
        if lab.id == host:
            continue
        days = transit_days(study, host, lab.id)
        wanted.append((lab.id, lab.country, days))
        if (lab.country, days) not in plans:
            plans[lab.country, days] = latest_ship(lab.country, days)

    if fixed_prep is not None:
        prepare_on = fixed_prep
    elif plans:
        prepare_on = work.before(min(plans.values()), origin)
    else:
        prepare_on = work.before(target, origin)
    earliest = first_ship_after(prepare_on) if plans else prepare_on
    shipped: dict[str, LabDates] = {}
    for lab_id, country, days in wanted:
        ship = plans[country, days]
        if ship <= prepare_on:
            ship = earliest
        shipped[lab_id] = LabDates(lab_id, ship, work.add(ship, days, country), days)
    shipped[host] = LabDates(host, prepare_on, prepare_on, 0)
    labs = tuple(shipped[lab.id] for lab in study.laboratories)

    start = max([target, *(item.arrive for item in labs)])
    countries = sorted({lab.country for lab in study.laboratories})
    test_start = _common_working_day(start, countries, work)
    test_end = test_start + timedelta(days=sched.test_window_days - 1)
    results_due = test_end
    for _ in range(sched.reporting_days):
        results_due += _DAY
        while results_due.weekday() >= 5:
            results_due += _DAY
    return RoundDates(prepare_on, test_start, test_end, results_due, labs)


def _common_working_day(start: date, countries: list[str], work: WorkingDays) -> date:
    day = start
    for _ in range(_COMMON_START_DAYS):
        if all(work.is_working(day, country) for country in countries):
            return day
        day += _DAY
    day = start
    while day.weekday() >= 5:
        day += _DAY
    return day


def check_stability(study: Study, dates: RoundDates) -> None:
    """Return None if every material lasts to the end of testing plus the margin; else SpecError.

    The error has one line per material that falls short, with the shortfall in days.
    """
    margin = study.schedule.stability_margin_days
    needed = dates.test_end + timedelta(days=margin)
    problems: list[PlannerError] = []
    margin_text = f" plus a {margin}-day margin" if margin else ""
    # In split mode every laboratory tests in the same window, so a material that
    # falls short fails for all of them; the line says so rather than picking one.
    count = len(dates.labs)
    who = f"all {count} laboratories test" if count != 1 else f"laboratory {dates.labs[0].lab!r} tests"
    for i, material in enumerate(study.materials):
        stable_until = dates.prepare_on + timedelta(days=material.stability_days)
        if stable_until < needed:
            short = (needed - stable_until).days
            problems.append(PlannerError(
                f"material {material.id!r} is stable until {stable_until} but {who} "
                f"until {dates.test_end}{margin_text}: {short} day{'s' if short != 1 else ''} "
                f"short; prepare later, shorten the test window or raise stability_days",
                Where(field=f"materials[{i}].stability_days")))
    if problems:
        raise SpecError(problems[0].message, problems[0].where, problems)
