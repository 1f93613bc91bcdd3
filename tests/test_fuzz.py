"""Fuzzing the two files a user or a participant hands to ringplan: study.yaml and a result form.

Hypothesis puts arbitrary values (huge and negative numbers, NaN, text with control
characters and odd Unicode, lists, mappings, nothing) into one or two fields of the example
study, or into cells of a filled result form, and runs the command line on it. Whatever the
value: the command ends with exit status 0 or 2 and no traceback; an exit 2 is one or more
lines each starting "error: "; a refused form leaves nothing recorded.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest
import yaml
from conftest import EXAMPLE, FIRST_ROW, NOW, PASSPHRASE, ROUND, filled, plan_example_round
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from planner import plan

# A deeper search: RINGPLAN_FUZZ_SEARCH=1 RINGPLAN_FUZZ_EXAMPLES=5000 python -m pytest tests/test_fuzz.py
_SCALE = int(os.environ.get("RINGPLAN_FUZZ_EXAMPLES", "0")) or None
SPEC_EXAMPLES = _SCALE or 300
FORM_EXAMPLES = _SCALE or 100

_text = st.text(st.characters(blacklist_categories=("Cs",)), max_size=30)
_scalar = st.one_of(
    st.none(), st.booleans(), st.integers(min_value=-(10 ** 30), max_value=10 ** 30),
    st.floats(allow_nan=True, allow_infinity=True), _text,
    st.sampled_from(["", "2027-02-30", "1e999", "-0", "∞", "NaN", "\u202e", "a" * 500]))
_value = st.one_of(_scalar, st.lists(_scalar, max_size=3),
                   st.dictionaries(st.sampled_from(["word", "note", "x", "from", "to"]),
                                   _scalar, max_size=2))


def _paths(node, prefix=()):
    """Yield the path of every scalar or list in a parsed YAML tree."""
    if isinstance(node, dict):
        for key, value in node.items():
            yield from _paths(value, (*prefix, key))
    elif isinstance(node, list) and node and isinstance(node[0], dict):
        for i, value in enumerate(node):
            yield from _paths(value, (*prefix, i))
    else:
        yield prefix


SPEC = yaml.safe_load((EXAMPLE / "study.yaml").read_text(encoding="utf-8"))
PATHS = sorted(_paths(SPEC), key=str)


def _put(tree, path, value):
    for part in path[:-1]:
        tree = tree[part]
    tree[path[-1]] = value


def _assert_clean(result) -> None:
    assert result.exit_code in (0, 2), (result.exit_code, result.stderr, result.exception)
    if result.exit_code == 2:
        lines = result.stderr.strip().splitlines()
        assert lines and all(x.startswith(("error: ", "warning: ")) for x in lines), lines
    assert result.exception is None or isinstance(result.exception, SystemExit), (
        repr(result.exception))
    assert "Traceback" not in result.stderr


@settings(max_examples=SPEC_EXAMPLES, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(changes=st.lists(st.tuples(st.sampled_from(PATHS), _value), min_size=1, max_size=2))
@example(changes=[(("laboratories", 2, "host_weight"), "1E310")])  # found by a CI run
@example(changes=[(("study", "unit"), "/")])  # '[/]' read as markup, found by a search run
def test_any_value_in_any_spec_field_is_one_line_or_a_valid_study(tmp_path_factory, changes):
    import copy

    from planner.cli import app

    data = copy.deepcopy(SPEC)
    for path, value in changes:
        _put(data, path, value)
    folder = tmp_path_factory.mktemp("spec")
    text = yaml.safe_dump(data, allow_unicode=True, sort_keys=False)
    (folder / "study.yaml").write_text(text, encoding="utf-8")
    before = sorted(p.name for p in folder.iterdir())
    result = CliRunner().invoke(app, ["check", str(folder)])
    _assert_clean(result)
    assert sorted(p.name for p in folder.iterdir()) == before  # check writes nothing


@pytest.fixture(scope="module")
def planned_template(tmp_path_factory):
    from planner.ledger import Ledger

    base = tmp_path_factory.mktemp("fuzz-form")
    study_dir = base / "norrvik-mfr"
    shutil.copytree(EXAMPLE, study_dir)
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(Ledger, "now", lambda self: NOW)
        mp.setenv("RINGPLAN_PASSPHRASE", PASSPHRASE)
        plan_example_round(study_dir)
    return study_dir


_COLUMNS = list(plan.FORM_COLUMNS)


@settings(max_examples=FORM_EXAMPLES, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(edits=st.lists(st.tuples(st.integers(min_value=0, max_value=17),
                                st.sampled_from(_COLUMNS),
                                st.one_of(_text, st.sampled_from(
                                    ["n.d.", "<0,5", "−1,5", "1e400", "12,5", "2027-01-25",
                                     "=1+1", ";", '"', "\x00", "1 000", "K7QM-4X9PA"]))),
                      min_size=1, max_size=3))
def test_any_text_in_any_form_cell_is_recorded_or_one_line_with_nothing_written(
        planned_template, tmp_path_factory, monkeypatch, edits):
    from planner.cli import app
    from planner.ledger import Ledger

    monkeypatch.setattr(Ledger, "now", lambda self: NOW)
    base = tmp_path_factory.mktemp("form")
    study_dir = base / "norrvik-mfr"
    shutil.copytree(planned_template, study_dir)
    lines = filled(study_dir, "kal")
    for row, column, text in edits:
        cells = lines[FIRST_ROW - 1 + row].split(";")
        cells[_COLUMNS.index(column)] = text.replace("\n", " ").replace("\r", " ")
        lines[FIRST_ROW - 1 + row] = ";".join(cells)
    form = base / "kal.csv"
    form.write_text("\n".join(lines) + "\n", encoding="utf-8")
    result = CliRunner().invoke(app, ["receive", str(study_dir), "--round", ROUND, str(form)])
    _assert_clean(result)
    folder = plan.round_dir(study_dir, ROUND)
    with Ledger.open(study_dir) as ledger:
        recorded = ledger.submissions(ROUND)
    if result.exit_code == 2:
        assert recorded == []
        for sub in ("results", ".intake"):
            assert not (folder / sub).exists() or not any((folder / sub).iterdir())
    else:
        assert len(recorded) == 1 and any((folder / "results").iterdir())
    leftovers = [p for p in Path(folder).rglob("*") if p.name.endswith(".tmp")]
    assert leftovers == []
