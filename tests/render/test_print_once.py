"""Printing a round makes each unit's QR symbol once, and workers change no byte (but the
times a document carries)."""

from __future__ import annotations

from planner import codes
from planner.render import _qr


def test_a_session_makes_each_symbol_once(monkeypatch):
    made = []
    real = _qr._made

    def counting(texts):
        made.extend(texts)
        return real(texts)

    monkeypatch.setattr(_qr, "_made", counting)
    texts = ["K7QM-4X9PA", "ZZZZ-00000", "K7QM-4X9PA"]
    with _qr.session():
        _qr.prepare(texts)
        first = _qr.image_masks(texts)
        again = list(_qr.stream(texts))
        _qr.flowable("ZZZZ-00000", 40)
    assert sorted(made) == ["K7QM-4X9PA", "ZZZZ-00000"]
    assert first == again == [_qr.image_mask(_qr.matrix(t)) for t in texts]
    made.clear()
    _qr.image_masks(texts)  # outside a session nothing is kept
    assert len(made) == 3


def test_print_makes_each_units_symbol_once(tmp_path, monkeypatch):
    from planner.render import print_round
    from tests.render.conftest import ROUND, plan_example

    study, manifest, key = plan_example(tmp_path / "study")
    made = []
    real = _qr._made

    def counting(texts):
        made.extend(texts)
        return real(texts)

    monkeypatch.setattr(_qr, "_made", counting)
    print_round(study, tmp_path / "study", ROUND, key=key)
    # labels and run sheets both show them, yet each unit's symbol is made once
    assert sorted(made) == sorted(codes.format(u["code"]) for u in key["units"])


def _undated(pdf: bytes) -> bytes:
    """The PDF without its creation and change times and the file id made from them (the
    documents laid out by platypus carry the time they were written)."""
    import re

    pdf = re.sub(rb"/(CreationDate|ModDate) \(D:[^)]*\)", b"", pdf)
    return re.sub(rb"/ID\s*\[<[0-9a-fA-F]*>\s*<[0-9a-fA-F]*>\]", b"", pdf)


def test_documents_made_in_workers_are_the_same_bytes(tmp_path, monkeypatch):
    import planner.render as render
    from tests.render.conftest import ROUND, plan_example

    monkeypatch.setattr(render, "_LABS_PER_TASK", 1)  # the example's 5 laboratories in workers
    study, manifest, key = plan_example(tmp_path / "study")
    outputs = []
    for workers in (1, 2):
        paths = render.print_round(study, tmp_path / "study", ROUND, key=key, workers=workers)
        outputs.append([(p, _undated(p.read_bytes())) for p in paths if p.suffix == ".pdf"])
    one, two = outputs
    assert [p for p, _ in one] == [p for p, _ in two]  # the same documents in the same order
    assert len(one) == 2 + 2 * len(manifest["labs"])  # labels, prep; packing and run sheets
    assert [p.name for (p, a), (_, b) in zip(one, two) if a != b] == []
