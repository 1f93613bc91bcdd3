"""The ledger holds every laboratory's results and every unit: it is its owner's alone, and
the order of its rows says nothing of the materials.

Found by reading the ledger as another user would: a world-readable ledger.sqlite whose units
table, read in row order, came in blocks of one material each (units were stored in the order
they are drawn, material by material), so every unit of the round could be tied to its
material without the key.
"""

from __future__ import annotations

import os
import sqlite3

from conftest import ROUND, plan_example_round

from planner.ledger import LEDGER_NAME, Ledger


def _mode(path) -> int:
    return os.stat(path).st_mode & 0o777


def test_a_new_ledger_is_owner_only_and_a_wider_one_is_narrowed(example_dir, passphrase):
    old = os.umask(0o022)
    try:
        plan_example_round(example_dir)
        path = example_dir / LEDGER_NAME
        assert _mode(path) == 0o600
        os.chmod(path, 0o644)  # as an older version left it
        with Ledger.open(example_dir):
            pass
        assert _mode(path) == 0o600
    finally:
        os.umask(old)


def test_units_are_stored_in_code_order_not_material_by_material(example_dir, passphrase):
    from planner import seal
    from planner import plan as planning

    plan_example_round(example_dir)
    with sqlite3.connect(example_dir / LEDGER_NAME) as db:
        stored = [c for (c,) in db.execute("SELECT code FROM units ORDER BY rowid")]
    assert stored == sorted(stored)
    key = seal.open_key(planning.round_dir(example_dir, ROUND), passphrase)
    material = {u["code"]: u["material"] for u in key["units"]}
    # in row order, a unit's neighbour holds the same material about as often as by chance
    # (6 materials: 1 in 6), not nearly always as in material-by-material blocks
    same = sum(material[a] == material[b] for a, b in zip(stored, stored[1:]))
    assert same / (len(stored) - 1) < 0.35


def test_a_new_ledger_appears_whole_or_not_at_all(tmp_path, monkeypatch):
    # A plan killed while the ledger was being started once left an empty ledger.sqlite,
    # which every later command refused as a lost ledger.
    study = tmp_path / "study"
    study.mkdir()
    dead = study / f".{LEDGER_NAME}.999999999.0000.ringplan-tmp"  # a start that was killed
    dead.write_bytes(b"")

    def broken(self, *, create):
        raise KeyboardInterrupt  # stopped while the schema is being made

    real = Ledger._migrate
    monkeypatch.setattr(Ledger, "_migrate", broken)
    try:
        Ledger.open(study)
    except KeyboardInterrupt:
        pass
    monkeypatch.setattr(Ledger, "_migrate", real)
    # no ledger, no temp file: neither the stopped start's nor the stale one of a dead process
    assert list(study.iterdir()) == []
    with Ledger.open(study) as ledger:
        assert ledger.rounds() == []
    assert sorted(p.name for p in study.iterdir()) == [LEDGER_NAME]
    assert _mode(study / LEDGER_NAME) == 0o600
