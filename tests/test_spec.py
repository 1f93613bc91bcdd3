"""study.yaml validation: one line per problem with file, line and field; exit 2 from the CLI."""

from __future__ import annotations

import pytest

from conftest import EXAMPLE, ROOT, run_cli
from planner import spec
from planner.errors import SpecError

GOOD = (EXAMPLE / "study.yaml").read_text(encoding="utf-8")


def _line_of(text: str, needle: str, nth: int = 1) -> int:
    seen = 0
    for number, line in enumerate(text.splitlines(), start=1):
        if needle in line:
            seen += 1
            if seen == nth:
                return number
    raise AssertionError(needle)


def test_example_and_template_are_valid():
    study = spec.load(EXAMPLE)
    assert study.id == "nvp-mfr"
    assert len(study.laboratories) >= 4 and len(study.hosts) >= 3
    assert len(study.materials) >= 6 and study.design.trials == 3
    assert len(study.history) >= 2
    assert spec.load(ROOT / "templates" / "study.yaml").id == "my-study"


# (name, edit of the good text, expected message part, needle on the expected line)
CASES = [
    ("yaml-syntax", lambda s: s.replace("trials: 3", "trials: [3"), "this is not valid YAML", None),
    ("unknown-key", lambda s: s.replace("tolerance: 4.0", "tolerence: 4.0"),
     "evaluation.tolerence: unknown key 'tolerence'; did you mean 'tolerance'?", "tolerence"),
    ("missing-field", lambda s: s.replace("  measurand: melt mass-flow rate, 190 °C / 2.16 kg\n", ""),
     "study.measurand: is required but missing", ("study:", 2)),
    ("wrong-type", lambda s: s.replace("trials: 3", "trials: three"),
     "design.trials: expected a whole number, got 'three'", "trials: three"),
    ("duplicate-id", lambda s: s.replace("  - id: tor", "  - id: kal"),
     "laboratories[1].id: 'kal' is used twice (first at laboratories[0]); ids must be unique",
     ("  - id: kal", 2)),
    ("unknown-reference-lab", lambda s: s.replace("reference_lab: kal", "reference_lab: kalx"),
     "evaluation.reference_lab: 'kalx' is not a laboratory of this study; did you mean 'kal'?",
     "reference_lab: kalx"),
    ("unknown-history-host", lambda s: s.replace("host: tor, date", "host: torr, date"),
     "history[1].host: 'torr' is not a laboratory of this study; did you mean 'tor'?", "host: torr"),
    ("history-host-cannot-host", lambda s: s.replace("host: tor, date", "host: crx, date"),
     "history[1].host: 'crx' cannot host (can_host is false)", "host: crx"),
    ("one-material", lambda s: s[:s.index("  - id: LL-F1")] + s[s.index("design:"):],
     "materials: needs at least 2 materials", "materials:"),
    ("trials-below-2", lambda s: s.replace("trials: 3", "trials: 1"),
     "design.trials: 1 is out of range; it must be >= 2", "trials: 1"),
    ("impossible-date", lambda s: s.replace("receive_by: 2027-01-19", "receive_by: 2027-02-30"),
     "schedule.receive_by: '2027-02-30' is not a valid date", "receive_by"),
    ("wrong-choice", lambda s: s.replace("run_order: balanced", "run_order: latin"),
     "design.run_order: 'latin' is not allowed; use one of 'random' or 'balanced'", "run_order"),
    ("receive-before-history", lambda s: s.replace("receive_by: 2027-01-19", "receive_by: 2026-09-01"),
     "schedule.receive_by: 2026-09-01 is not after the last past round", "receive_by"),
    ("sigma-pt-two-policies", lambda s: s.replace("sigma_pt: {percent: 5}",
                                                  "sigma_pt: {percent: 5, value: 0.2}"),
     "evaluation.sigma_pt: give exactly one of value, percent, precision, participants "
     "(found value, percent)", "sigma_pt: {percent: 5, value"),
    ("sigma-pt-unknown-policy", lambda s: s.replace("sigma_pt: {percent: 5}",
                                                    "sigma_pt: {percnt: 5}"),
     "evaluation.sigma_pt.percnt: unknown key 'percnt'; did you mean 'percent'?", "percnt"),
    ("sigma-pt-negative", lambda s: s.replace("sigma_pt: {percent: 5}", "sigma_pt: -0.2"),
     "evaluation.sigma_pt.value: -0.2 is out of range; it must be > 0", "sigma_pt: -0.2"),
    ("sigma-pt-precision-upside-down", lambda s: s.replace(
        "sigma_pt: {percent: 5}", "sigma_pt: {precision: {sigma_R: 0.1, sigma_r: 0.3}}"),
     "evaluation.sigma_pt.precision.sigma_R: 0.1 is smaller than sigma_r 0.3", "sigma_R: 0.1"),
    ("sigma-pt-tiny-minimum", lambda s: s.replace(
        "sigma_pt: {percent: 5}", "sigma_pt: {participants: {min_participants: 2}}"),
     "evaluation.sigma_pt.participants.min_participants: 2 is out of range; it must be >= 3",
     "min_participants"),
    ("duplicate-key", lambda s: s.replace("trials: 3", "trials: 3\n  trials: 4"),
     "the key 'trials' appears twice in this section (first on line", "trials: 4"),
    ("yaml-alias", lambda s: s.replace("trials: 3", "trials: &n 3").replace(
        "spares_per_lab: 1", "spares_per_lab: *n"),
     "anchors and aliases (&name, *name) are not allowed", "trials: &n 3"),
    ("retained-absurd", lambda s: s.replace("retained_by_host: 2", "retained_by_host: 20000000"),
     "design.retained_by_host: 20000000 is out of range; it must be <= 1000", "retained_by_host"),
    ("stability-absurd", lambda s: s.replace("stability_days: ", "stability_days: 99999999999 #", 1),
     "is out of range; it must be <= 3650", "stability_days: 99999999999"),
    ("sigma-pt-infinite", lambda s: s.replace("sigma_pt: {percent: 5}", "sigma_pt: .inf"),
     "evaluation.sigma_pt.value: inf is not a finite number", "sigma_pt: .inf"),
    ("sigma-pt-unknown-material", lambda s: s.replace(
        "  sigma_pt: {percent: 5}", "  sigma_pt: {percent: 5}\n  by_material:\n"
        "    PP-H21: {sigma_pt: 0.4}"),
     "evaluation.by_material.PP-H21: 'PP-H21' is not a material of this study; did you mean "
     "'PP-H12'?", "PP-H21"),
]


@pytest.mark.parametrize("edit,expected,needle", [c[1:] for c in CASES], ids=[c[0] for c in CASES])
def test_bad_spec_gives_one_located_line(edit, expected, needle, tmp_path, runner):
    text = edit(GOOD)
    folder = tmp_path / "study"
    folder.mkdir()
    (folder / "study.yaml").write_text(text, encoding="utf-8")
    with pytest.raises(SpecError) as info:
        spec.load(folder)
    message = str(info.value)
    assert expected in message
    if needle is not None:
        needle, nth = needle if isinstance(needle, tuple) else (needle, 1)
        assert info.value.where.line == _line_of(text, needle, nth)
        assert message.startswith(f"{folder / 'study.yaml'}:{info.value.where.line}: ")
    result = run_cli(runner, "check", folder)
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    # one line per problem; an edit may cause a follow-on problem, but the first line is ours
    assert all(line.startswith("error: ") for line in lines) and expected in lines[0]
    assert "Traceback" not in result.output + result.stderr


def test_several_problems_are_all_reported(tmp_path):
    text = GOOD.replace("trials: 3", "trials: three").replace("tolerance: 4.0", "tolerence: 4")
    with pytest.raises(SpecError) as info:
        spec.parse(text)
    assert len(info.value.problems) == 2
    assert len(str(info.value).splitlines()) == 2


def test_missing_spec_file(tmp_path, runner):
    result = run_cli(runner, "check", tmp_path)
    assert result.exit_code == 2
    assert "no study spec found; expected a file named 'study.yaml'" in result.stderr


def test_country_code_message():
    with pytest.raises(SpecError) as info:
        spec.parse(GOOD.replace("country: SE", "country: Sweden"))
    assert "'Sweden' is not a country code" in str(info.value)


def test_empty_spec():
    with pytest.raises(SpecError, match="the spec is empty"):
        spec.parse("")
