"""A laboratory's record over rounds, and whether hosting changes its scores.

``collect`` reads every evaluated round of a study folder (the rounds whose
``report/statistics.json`` exists) and returns, per laboratory and round, its
score and bias for each material, the round's host, and the host-effect
estimate of ``estimate_host_effect``. It reads only evaluations the ledger
recorded: a statistics.json is used when the round's last "evaluated" event
holds its SHA-256, so a file edited afterwards, or put into a round folder the
ledger never evaluated, is refused rather than quietly averaged in.

Per material the score is the one the round's performance band is read from
(z, or z' when the round used z'), against the consensus of all laboratories
(the same consensus for the host as for the others, so hosting and not
hosting are compared on one footing). Bias is the laboratory's mean minus the
assigned value, also given in per cent of the assigned value so that
materials of different levels can be averaged. A laboratory's round is summed
up as the mean |z|, mean z and mean relative bias over its materials.

The host effect compares, per laboratory and pooled over all laboratories,
the rounds a laboratory hosted with those it did not: mean |z| and mean
relative bias, the number of rounds behind each, and the difference. It is a
description, not a test. With fewer than ``MIN_ROUNDS`` rounds on either side
(our own rule: one round is no comparison) it says so instead of giving numbers.

All of it is per measurand: scores of different properties are not averaged
together. ``measurands.<id>`` holds each measurand's record (the rounds it was
measured in, ``labs``, ``host_effect``); a study of one measurand in the
single-measurand form (id "value", and every statistics.json written before
format 3) also has its ``labs`` and ``host_effect`` at the top, as before.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner.errors import DataError, Where

if TYPE_CHECKING:
    from planner.ledger import Ledger

__all__ = ["HISTORY_FORMAT", "MIN_ROUNDS", "collect", "estimate_host_effect", "SHORTHAND_ID"]

MIN_ROUNDS = 2
HISTORY_FORMAT = "ringplan-history/2"
SHORTHAND_ID = "value"
"""The measurand of a study in the single-measurand form (``spec.SHORTHAND_ID``), and of
every statistics.json written before format 3."""
_STATISTICS = Path("report") / "statistics.json"
_MANIFEST = "manifest.json"


def _mean(values: Iterable[float]) -> float | None:
    items = [v for v in values if v is not None and math.isfinite(v)]
    return sum(items) / len(items) if items else None


def _read_json(path: Path) -> dict[str, Any]:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except ValueError:
        raise DataError("the file is not valid JSON; evaluate the round again",
                        Where(str(path))) from None
    if not isinstance(data, dict):
        raise DataError("expected a JSON object; evaluate the round again", Where(str(path)))
    return data


def _material_entry(scores: Mapping[str, Any], lab: str) -> dict[str, Any] | None:
    """Return z, bias and relative bias of ``lab`` for one material, or None if it has none."""
    if "skipped" in scores:
        return None
    entry = scores.get("labs", {}).get(lab)
    if not entry:
        return None
    if entry.get("reference"):
        return None  # the reference laboratory is the assigned value, not scored
    use_prime = bool(scores.get("use_z_prime"))
    z = entry.get("z_prime") if use_prime else entry.get("z")
    mean, assigned = entry.get("mean"), scores.get("assigned_value")
    if z is None and (mean is None or assigned is None):
        return None
    # A round without bands (too few participants) still tells the bias, not the z.
    bias = mean - assigned if mean is not None and assigned is not None else None
    bias_pct = 100.0 * bias / assigned if bias is not None and assigned else None
    return {"z": z, "score": "z'" if use_prime else "z", "bias": bias, "bias_pct": bias_pct}


def _check_recorded(path: Path, round_id: str, ledger: Ledger) -> None:
    """Raise DataError unless the ledger's last evaluation of the round wrote this very file."""
    recorded = None
    for e in ledger.events(round_id):
        if e.kind == "planned":
            recorded = None  # a round planned again starts afresh
        elif e.kind == "evaluated":
            recorded = e
    if recorded is None:
        raise DataError(f"the ledger records no evaluation of round {round_id!r}, so "
                        "'ringplan evaluate' did not write this file here; remove it, or "
                        "evaluate the round", Where(str(path)))
    want = recorded.detail.get("statistics_sha256")
    if not want:
        raise DataError(f"the ledger's evaluation of round {round_id!r} holds no SHA-256 of "
                        "its statistics (an older ringplan wrote it); run 'ringplan evaluate' "
                        "for the round again", Where(str(path)))
    found = hashlib.sha256(path.read_bytes()).hexdigest()
    if found != want:
        raise DataError(f"the file was changed after round {round_id!r} was evaluated: its "
                        f"SHA-256 is {found[:16]}..., the ledger recorded {str(want)[:16]}...; "
                        "run 'ringplan evaluate' for the round again", Where(str(path)))


def _round_of(folder: Path, ledger: Ledger) -> dict[str, Any]:
    _check_recorded(folder / _STATISTICS, folder.name, ledger)
    stats = _read_json(folder / _STATISTICS)
    manifest_path = folder / _MANIFEST
    manifest = _read_json(manifest_path) if manifest_path.is_file() else {}
    host = stats.get("host") or manifest.get("host")
    if isinstance(stats.get("measurands"), dict):
        blocks = {str(mid): b for mid, b in stats["measurands"].items() if isinstance(b, dict)}
    else:
        # Up to format 2: one measurand, its blocks at the top.
        blocks = {SHORTHAND_ID: {"name": stats.get("measurand"), "unit": stats.get("unit"),
                                 "scores": stats.get("scores"),
                                 "materials": stats.get("materials")}}
    return {
        "round": str(stats.get("round") or folder.name),
        "host": str(host) if host else None,
        "date": (manifest.get("dates") or {}).get("test_start"),
        "measurands": {mid: {"name": b.get("name"), "unit": b.get("unit"),
                             "scores": b.get("scores") or {},
                             "materials": list(b.get("materials")
                                               or (b.get("scores") or {}).keys())}
                       for mid, b in blocks.items()},
    }


def collect(study_dir: Path, ledger: Ledger | None, *, labs: Sequence[str] = (),
            measurands: Sequence[str] = ()) -> dict[str, Any]:
    """Return the study's record: evaluated rounds and, per measurand, per laboratory and
    round the scores and the host effect.

    ``ledger`` is the study's ledger (None only where no round folder holds statistics:
    a statistics file without a ledger is refused). ``labs`` gives the order of laboratories (the
    spec's), ``measurands`` the order of measurands (the spec's); others found follow in
    order of appearance. Rounds come in order of their test start date, then id. Raise
    DataError if a statistics file cannot be read, or is not the one the ledger's last
    evaluation of its round recorded (edited since, or in a folder of a round the ledger
    never evaluated).
    """
    base = Path(study_dir) / "rounds"
    folders = sorted(p for p in base.iterdir() if (p / _STATISTICS).is_file()) if base.is_dir() else []
    if folders and ledger is None:
        raise DataError("round folders hold statistics, but there is no ledger to show they "
                        "were evaluated here", Where(str(folders[0] / _STATISTICS)))
    rounds = sorted((_round_of(f, ledger) for f in folders if ledger is not None),
                    key=lambda r: (r["date"] is None, r["date"] or "", r["round"]))
    order = list(dict.fromkeys(labs))
    for r in rounds:
        for block in r["measurands"].values():
            for sc in block["scores"].values():
                if isinstance(sc, dict):
                    order.extend(lab for lab in sc.get("labs", {}) if lab not in order)
    ids = list(dict.fromkeys([*measurands, *(mid for r in rounds for mid in r["measurands"])]))
    if not ids:
        ids = list(measurands) or [SHORTHAND_ID]
    per_measurand: dict[str, Any] = {}
    for mid in ids:
        seen = [r for r in rounds if mid in r["measurands"]]
        last = seen[-1]["measurands"][mid] if seen else {}
        table = _table(order, [{**r, **r["measurands"][mid]} for r in seen])
        per_measurand[mid] = {"name": last.get("name"), "unit": last.get("unit"),
                              "rounds": [r["round"] for r in seen], "labs": table,
                              "host_effect": estimate_host_effect(table)}
    # Rounds the ledger evaluated whose statistics file is gone: said, not silently dropped.
    shown = {r["round"] for r in rounds}
    lost = sorted({row.round for row in ledger.rounds() if ledger.events(row.round, "evaluated")}
                  - shown) if ledger is not None else []
    out: dict[str, Any] = {
        "format": HISTORY_FORMAT,
        "rounds": [{"round": r["round"], "host": r["host"], "date": r["date"]} for r in rounds],
        "measurands": per_measurand,
        "missing_statistics": lost,
    }
    if ids == [SHORTHAND_ID]:
        out["labs"] = per_measurand[SHORTHAND_ID]["labs"]
        out["host_effect"] = per_measurand[SHORTHAND_ID]["host_effect"]
    return out


def _table(order: Sequence[str], rounds: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    """Return per laboratory its rounds (scores by material, summaries) and hosted rounds."""
    table: dict[str, Any] = {}
    for lab in order:
        per_round: dict[str, Any] = {}
        for r in rounds:
            materials = {}
            for m in r["materials"]:
                sc = r["scores"].get(m)
                got = _material_entry(sc, lab) if isinstance(sc, dict) else None
                if got is not None:
                    materials[m] = got
            if not materials and r["host"] != lab:
                continue
            zs = [e["z"] for e in materials.values() if e["z"] is not None]
            per_round[r["round"]] = {
                "hosted": r["host"] == lab,
                "materials": materials,
                "mean_abs_z": _mean(abs(z) for z in zs),
                "mean_z": _mean(zs),
                "mean_bias_pct": _mean(e["bias_pct"] for e in materials.values()),
            }
        table[lab] = {"rounds": per_round, "hosted": [k for k, v in per_round.items() if v["hosted"]]}
    return table


def _side(rows: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    abs_z = [r["mean_abs_z"] for r in rows if r["mean_abs_z"] is not None]
    bias = [r["mean_bias_pct"] for r in rows if r["mean_bias_pct"] is not None]
    return {"rounds": len(abs_z), "mean_abs_z": _mean(abs_z), "mean_bias_pct": _mean(bias),
            "bias_rounds": len(bias)}


def _count(n: int, unit: str) -> str:
    return f"{n} {unit if n != 1 else unit.removesuffix('s')}"


def _compare(hosting: list[Mapping[str, Any]], other: list[Mapping[str, Any]], who: str,
             unit: str) -> dict[str, Any]:
    h, n = _side(hosting), _side(other)
    out: dict[str, Any] = {"hosting": h, "not_hosting": n, "difference": None}
    if h["rounds"] < MIN_ROUNDS or n["rounds"] < MIN_ROUNDS:
        out["statement"] = (
            f"too few rounds to say anything about {who}: {_count(h['rounds'], unit)} hosting "
            f"and {n['rounds']} not hosting; at least {MIN_ROUNDS} of each are needed")
        return out
    diff_z = h["mean_abs_z"] - n["mean_abs_z"]
    diff_b = (h["mean_bias_pct"] - n["mean_bias_pct"]
              if h["mean_bias_pct"] is not None and n["mean_bias_pct"] is not None else None)
    out["difference"] = {"mean_abs_z": diff_z, "mean_bias_pct": diff_b}
    bias_text = (f"; mean bias {h['mean_bias_pct']:+.2f} % against {n['mean_bias_pct']:+.2f} %"
                 if diff_b is not None else "")
    out["statement"] = (
        f"{who}: mean |z| {h['mean_abs_z']:.2f} over {h['rounds']} {unit} hosting against "
        f"{n['mean_abs_z']:.2f} over {n['rounds']} not hosting ({diff_z:+.2f}){bias_text}; "
        "a description of few rounds, not a significance test")
    return out


def estimate_host_effect(labs: Mapping[str, Any]) -> dict[str, Any]:
    """Return the host effect per laboratory that ever hosted, and pooled over them all.

    ``labs`` is the ``labs`` part of ``collect``'s result. Only laboratories
    that hosted at least once enter the pooled comparison, so that it compares
    the same laboratories in both states.
    """
    per_lab: dict[str, Any] = {}
    pooled_h: list[Mapping[str, Any]] = []
    pooled_n: list[Mapping[str, Any]] = []
    for lab, record in labs.items():
        rows = list(record["rounds"].values())
        hosting = [r for r in rows if r["hosted"]]
        if not hosting:
            continue
        other = [r for r in rows if not r["hosted"]]
        per_lab[lab] = _compare(hosting, other, f"laboratory {lab!r}", "rounds")
        pooled_h.extend(hosting)
        pooled_n.extend(other)
    pooled = _compare(pooled_h, pooled_n, "all hosts together", "laboratory-rounds")
    return {"min_rounds": MIN_ROUNDS, "labs": per_lab, "pooled": pooled}
