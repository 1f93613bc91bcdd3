"""Public holidays come from one country's module of the ``holidays`` package, not all 250."""

from __future__ import annotations

import subprocess
import sys

from planner import calendar

YEARS = (2026, 2027, 2028)


def test_holidays_are_the_packages_own_for_every_country():
    # External check: the package's own lookup (holidays.country_holidays) for each of the
    # countries its registry lists, and an unknown code has weekends only.
    import holidays
    from holidays.registry import COUNTRIES

    found = [names[1] for names in COUNTRIES.values()]
    assert len(found) > 200
    differ = [c for c in found if calendar._public_holidays(c, YEARS)
              != frozenset(holidays.country_holidays(c, years=YEARS))]
    assert differ == []
    assert calendar._public_holidays("XX", YEARS) == frozenset()


def test_only_the_studys_countries_are_loaded():
    probe = ("import sys; from planner import calendar; "
             "w = calendar.WorkingDays(range(2026, 2029)); "
             "[w.is_working(__import__('datetime').date(2027, 5, 17), c) for c in ('NO', 'SE')];"
             "print(sorted(m for m in sys.modules if m.startswith('holidays.countries.')))")
    run = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True,
                         check=True)
    assert run.stdout.strip() == "['holidays.countries.norway', 'holidays.countries.sweden']"
