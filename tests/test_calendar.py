"""Tests for planner.calendar: ship, arrival, test and report dates, and stability.

Public holidays are those of the ``holidays`` package; each test that relies on
one names it and checks first that the package lists it (and that the other
country does not), so a change in the package shows up as that failure.
Weekdays of 2027 dates were checked against Python's ``date.weekday``.
"""

from __future__ import annotations

from datetime import date, timedelta
from pathlib import Path

import holidays
import pytest

from planner import calendar, spec
from planner.errors import SpecError

# The example study of the repository (not via conftest: several conftest modules exist).
EXAMPLE = Path(__file__).resolve().parent.parent / "examples" / "norrvik-mfr"


def _lab(lab_id: str, country: str, *, transit: int | None = None, can_host: bool = True) -> dict:
    out = {"id": lab_id, "name": f"Laboratory {lab_id}", "address": ["Street 1"],
           "contact": {"name": "Someone"}, "country": country, "can_host": can_host}
    if transit is not None:
        out["transit_days"] = transit
    return out


def _study(labs: list[dict], *, receive_by: date, prepare_on: date | None = None,
           ship_weekdays: tuple[str, ...] = ("mon", "tue", "wed", "thu"), transit: int = 2,
           window: int = 10, reporting: int = 5, margin: int = 0, table: list[dict] | None = None,
           stability: tuple[int, int] = (365, 365)) -> spec.Study:
    material = {"description": "pellets", "amount": 30, "amount_unit": "g", "storage": "dry"}
    schedule = {"receive_by": receive_by, "test_window_days": window, "reporting_days": reporting,
                "ship_weekdays": list(ship_weekdays), "transit_days": transit,
                "stability_margin_days": margin, "transit": table or []}
    if prepare_on is not None:
        schedule["prepare_on"] = prepare_on
    return spec.Study.model_validate({
        "study": {"id": "cal-1", "title": "t", "measurand": "m", "unit": "u"},
        "laboratories": labs,
        "materials": [{"id": "PE-A", "stability_days": stability[0], **material},
                      {"id": "PE-B", "stability_days": stability[1], **material}],
        "design": {"trials": 2},
        "schedule": schedule,
    })


# --- public holidays -------------------------------------------------------------

def test_norwegian_constitution_day_2027_moves_the_ship_date_from_norway():
    # 17 May 2027 (a Monday) is Constitution Day in Norway (and Whit Monday there);
    # Sweden has no public holiday that day.
    assert "Constitution Day" in holidays.country_holidays("NO", years=2027)[date(2027, 5, 17)]
    assert date(2027, 5, 17) not in holidays.country_holidays("SE", years=2027)
    assert date(2027, 5, 17) not in holidays.country_holidays("GB", years=2027)
    labs = [_lab("osl", "NO"), _lab("sth", "SE"), _lab("lon", "GB", transit=2, can_host=False)]
    study = _study(labs, receive_by=date(2027, 5, 19))   # a Wednesday
    # From Sweden: Monday 17 May + 2 British working days (Tue 18, Wed 19) arrives in time.
    from_se = calendar.schedule_round(study, "sth").lab("lon")
    assert (from_se.ship, from_se.arrive) == (date(2027, 5, 17), date(2027, 5, 19))
    # From Norway the Monday is a holiday; Friday is not a shipping day; so Thursday
    # 13 May, arriving Monday 17 May (Fri 14, Mon 17 are British working days).
    from_no = calendar.schedule_round(study, "osl").lab("lon")
    assert (from_no.ship, from_no.arrive) == (date(2027, 5, 13), date(2027, 5, 17))


def test_holiday_at_the_destination_moves_that_laboratory_only():
    # Same Norwegian holiday, now at the destination: a parcel shipped on Friday
    # 14 May with one transit day reaches Britain on Monday 17 but Norway only on Tuesday 18.
    labs = [_lab("sth", "SE"), _lab("osl", "NO", transit=1, can_host=False),
            _lab("lon", "GB", transit=1, can_host=False)]
    study = _study(labs, receive_by=date(2027, 5, 17),
                   ship_weekdays=("mon", "tue", "wed", "thu", "fri"))
    dates = calendar.schedule_round(study, "sth")
    assert (dates.lab("lon").ship, dates.lab("lon").arrive) == (date(2027, 5, 14), date(2027, 5, 17))
    assert (dates.lab("osl").ship, dates.lab("osl").arrive) == (date(2027, 5, 13), date(2027, 5, 14))
    # Testing cannot start on a Norwegian holiday: the common start is Tuesday 18 May.
    assert dates.test_start == date(2027, 5, 18)


def test_no_shipping_on_fridays_when_the_spec_leaves_friday_out():
    labs = [_lab("sth", "SE"), _lab("lon", "GB", transit=1, can_host=False)]
    monday = date(2027, 3, 8)
    with_friday = _study(labs, receive_by=monday, ship_weekdays=("mon", "tue", "wed", "thu", "fri"))
    without = _study(labs, receive_by=monday)
    assert calendar.schedule_round(with_friday, "sth").lab("lon").ship == date(2027, 3, 5)
    assert calendar.schedule_round(without, "sth").lab("lon").ship == date(2027, 3, 4)
    assert calendar.schedule_round(without, "sth").lab("lon").arrive == date(2027, 3, 5)


def test_transit_counts_working_days_over_the_weekend():
    labs = [_lab("sth", "SE"), _lab("lon", "GB", transit=3, can_host=False)]
    study = _study(labs, receive_by=date(2027, 3, 10))   # Wednesday
    lon = calendar.schedule_round(study, "sth").lab("lon")
    # Thu 4 Mar + 3 working days: Fri 5, Mon 8, Tue 9 (latest that arrives by Wed 10 is Fri,
    # not a shipping day, so Thursday).
    assert (lon.ship, lon.arrive, lon.transit_days) == (date(2027, 3, 4), date(2027, 3, 9), 3)


# --- transit days --------------------------------------------------------------

def test_transit_comes_from_table_then_laboratory_then_default():
    labs = [_lab("a", "SE"), _lab("b", "SE", transit=4), _lab("c", "SE")]
    table = [{"from": "a", "to": "b", "days": 1}]
    study = _study(labs, receive_by=date(2027, 3, 10), transit=2, table=table)
    assert calendar.transit_days(study, "a", "b") == 1     # table row
    assert calendar.transit_days(study, "b", "a") == 1     # the same row, other direction
    assert calendar.transit_days(study, "c", "b") == 4     # laboratory's own value
    assert calendar.transit_days(study, "a", "c") == 2     # schedule default
    assert calendar.transit_days(study, "a", "a") == 0


def test_host_units_are_not_shipped():
    study = spec.load(EXAMPLE)
    dates = calendar.schedule_round(study, "kal")
    kal = dates.lab("kal")
    assert (kal.ship, kal.arrive, kal.transit_days) == (date(2027, 1, 11), date(2027, 1, 11), 0)


# --- the round's dates ---------------------------------------------------------------

def test_example_round_dates():
    # Spec: prepare 2027-01-11, receive by Tue 2027-01-19, 10-day window, 5 reporting days.
    # No public holiday in SE, NO, DE, FI or GB falls on 18-19 January 2027.
    dates = calendar.schedule_round(spec.load(EXAMPLE), "kal")
    assert dates.prepare_on == date(2027, 1, 11)
    assert dates.test_start == date(2027, 1, 19)
    assert dates.test_end == date(2027, 1, 28)            # 19 + 10 - 1
    assert dates.results_due == date(2027, 2, 4)          # Fri 29, Mon 1 .. Thu 4: 5 weekdays
    # crx (GB, 3 days) from Sweden: Thu 14 -> Fri 15, Mon 18, Tue 19.
    assert dates.lab("crx").ship == date(2027, 1, 14)
    assert dates.lab("crx").arrive == date(2027, 1, 19)
    assert all(item.arrive <= dates.test_start for item in dates.labs)
    assert [item.lab for item in dates.labs] == ["kal", "tor", "hel", "lin", "crx"]


def test_to_json_gives_iso_strings():
    data = calendar.schedule_round(spec.load(EXAMPLE), "kal").to_json()
    assert set(data) == {"prepare_on", "test_start", "test_end", "results_due", "labs"}
    assert data["labs"]["crx"] == {"ship": "2027-01-14", "arrive": "2027-01-19", "transit_days": 3}
    assert data["prepare_on"] == "2027-01-11"


def test_late_preparation_delays_the_common_test_start():
    # Prepared Friday 5 March; a 3-day parcel can leave Monday 8 at the earliest
    # and arrives Thursday 11, after receive-by Tuesday 9; everybody starts on the 11th.
    labs = [_lab("sth", "SE"), _lab("lon", "GB", transit=3, can_host=False),
            _lab("got", "SE", transit=1, can_host=False)]
    study = _study(labs, receive_by=date(2027, 3, 9), prepare_on=date(2027, 3, 5), window=7)
    dates = calendar.schedule_round(study, "sth")
    assert (dates.lab("lon").ship, dates.lab("lon").arrive) == (date(2027, 3, 8), date(2027, 3, 11))
    assert dates.lab("got").arrive == date(2027, 3, 9)
    assert dates.test_start == date(2027, 3, 11)
    assert dates.test_end == date(2027, 3, 17)


def test_preparation_day_defaults_to_the_working_day_before_the_first_parcel():
    labs = [_lab("sth", "SE"), _lab("lon", "GB", transit=3, can_host=False)]
    study = _study(labs, receive_by=date(2027, 3, 10))
    dates = calendar.schedule_round(study, "sth")
    assert dates.lab("lon").ship == date(2027, 3, 4)
    assert dates.prepare_on == date(2027, 3, 3)


def test_other_receive_by_ignores_the_spec_preparation_day():
    study = spec.load(EXAMPLE)
    later = calendar.schedule_round(study, "kal", receive_by=date(2027, 4, 20))
    assert later.test_start == date(2027, 4, 20)
    assert later.prepare_on < min(item.ship for item in later.labs if item.lab != "kal")


def test_unknown_host_is_a_spec_error():
    with pytest.raises(SpecError, match="host 'nobody' is not a laboratory"):
        calendar.schedule_round(spec.load(EXAMPLE), "nobody")


# --- stability ----------------------------------------------------------------------

def test_too_short_stability_is_refused_with_name_and_shortfall():
    text = (EXAMPLE / "study.yaml").read_text(encoding="utf-8")
    # RE-MIX (120 days in the example) made to last 20 days.
    text = text.replace("stability_days: 120", "stability_days: 20")
    study = spec.parse(text)
    dates = calendar.schedule_round(study, "kal")
    with pytest.raises(SpecError) as caught:
        calendar.check_stability(study, dates)
    # Prepared 2027-01-11 + 20 days = stable until 2027-01-31; testing ends 2027-01-28,
    # plus the spec's 14-day margin is 2027-02-11: 11 days short.
    assert str(caught.value) == (
        "materials[4].stability_days: material 'RE-MIX' is stable until 2027-01-31 but all 5 "
        "laboratories test until 2027-01-28 plus a 14-day margin: 11 days short; prepare "
        "later, shorten the test window or raise stability_days")


def test_every_short_material_gets_its_own_line():
    labs = [_lab("sth", "SE"), _lab("got", "SE", transit=1, can_host=False)]
    study = _study(labs, receive_by=date(2027, 3, 9), prepare_on=date(2027, 3, 5), window=5,
                   margin=0, stability=(8, 9))
    dates = calendar.schedule_round(study, "sth")
    # Test window Tue 9 to Sat 13 March; PE-A lasts to 13 March (exactly enough),
    # PE-B to 14 March; with a longer window both fall short.
    calendar.check_stability(study, dates)
    longer = _study(labs, receive_by=date(2027, 3, 9), prepare_on=date(2027, 3, 5), window=8,
                    stability=(8, 9))
    with pytest.raises(SpecError) as caught:
        calendar.check_stability(longer, calendar.schedule_round(longer, "sth"))
    lines = str(caught.value).splitlines()
    assert len(lines) == 2
    assert "'PE-A' is stable until 2027-03-13" in lines[0] and ": 3 days short" in lines[0]
    assert "'PE-B' is stable until 2027-03-14" in lines[1] and ": 2 days short" in lines[1]


def test_stability_exactly_enough_passes():
    study = spec.load(EXAMPLE)
    dates = calendar.schedule_round(study, "kal")
    needed = (dates.test_end + timedelta(days=14) - dates.prepare_on).days   # 31 days
    text = (EXAMPLE / "study.yaml").read_text(encoding="utf-8")
    ok = spec.parse(text.replace("stability_days: 120", f"stability_days: {needed}"))
    calendar.check_stability(ok, calendar.schedule_round(ok, "kal"))
    short = spec.parse(text.replace("stability_days: 120", f"stability_days: {needed - 1}"))
    with pytest.raises(SpecError, match=": 1 day short;"):
        calendar.check_stability(short, calendar.schedule_round(short, "kal"))


def test_transit_table_names_must_be_laboratories_and_rows_unique():
    text = (EXAMPLE / "study.yaml").read_text(encoding="utf-8")
    bad = text.replace("  round_interval_weeks: 13\n", "  round_interval_weeks: 13\n  transit:\n"
                       "    - {from: kal, to: crx, days: 3}\n    - {from: kal, to: cxr, days: 1}\n"
                       "    - {from: kal, to: crx, days: 4}\n")
    with pytest.raises(SpecError) as caught:
        spec.parse(bad)
    lines = str(caught.value).splitlines()
    assert lines[0].endswith("schedule.transit[1].to: 'cxr' is not a laboratory of this study; "
                             "did you mean 'crx'?")
    assert lines[1].endswith("schedule.transit[2]: 'kal' to 'crx' is listed twice (first at "
                             "schedule.transit[0])")
