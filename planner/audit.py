"""Opening and auditing the key: the unsealing gate, and rebuilding a round from its secret.

``unseal_round`` writes key.json only when every laboratory's results (for a
circulating set: every stop's, the host's later stops as ``host@visit``) are in
the ledger (or when forced with a recorded reason) and checks that its SHA-256
equals the fingerprint published before shipping. ``verify_round`` rebuilds
the round from the spec and the key's secret and names every unit that differs,
so anyone can check that the key was not edited after the results came in.

``check_fingerprint`` is the one place a key meets its fingerprint. It trusts
the fingerprint the ledger recorded at planning, and the manifest's must agree;
``key.fingerprint`` is a copy for ``sha256sum`` that anyone can rewrite, so no
check reads it. ``read_key`` and ``open_key`` hand out only keys that passed.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import circulate, files, plan, seal
from planner.errors import LedgerError, SealError, Where

if TYPE_CHECKING:
    from planner.ledger import Ledger
    from planner.spec import Study

__all__ = ["missing_labs", "check_gate", "unseal_round", "verify_round", "verify_key", "Verdict",
           "report_slots", "round_slots", "slot_runs", "split_slot", "check_fingerprint",
           "read_key", "open_key"]


def split_slot(slot: str) -> tuple[str, str | None]:
    """Return (laboratory, visit or None) of a submission slot."""
    lab, at, visit = slot.partition("@")
    return (lab, visit) if at else (lab, None)


def report_slots(manifest: Mapping[str, Any]) -> list[str]:
    """Return every slot a result form is due for: the laboratories (manifest order), or for a
    circulating set its stops in route order, the host's later stops as ``host@visit``."""
    if manifest.get("mode") == "circulate" and manifest.get("route"):
        return [circulate.station_key(str(s["lab"]), s.get("visit")) for s in manifest["route"]]
    return list(manifest["labs"])


def slot_runs(manifest: Mapping[str, Any], slot: str) -> list[list[str]]:
    """Return the codes in run order per trial of a slot (KeyError for an unknown slot)."""
    lab, visit = split_slot(slot)
    if visit is not None:
        return list(manifest["host_visits"][visit])
    return list(manifest["labs"][lab]["trials"])


def missing_labs(study: Study, ledger: Ledger, round_id: str, *,
                 manifest: Mapping[str, Any]) -> list[str]:
    """Return the slots of a round whose results are not complete.

    A slot is complete when every code it was sent (spares in place of replaced units;
    every artefact in every trial of a circulating stop) has, in the merge of its
    forms, a value or a remark saying why not: a form of one row is not "reported".
    With several measurands, every measurand measured on the code's material needs one.
    Split mode: the laboratories in spec order; a circulating set: every stop of the
    route in order (``host@middle``, ``host@end`` for the host's later stops).
    """
    from planner import intake, returns

    swaps = intake.spare_swaps(ledger, round_id)
    absent = plan.not_applicable(manifest, swaps)
    return [s for s in round_slots(study, ledger, round_id, manifest=manifest)
            if not returns.slot_state(manifest, ledger, round_id, s, swaps=swaps,
                                      absent=absent).complete]


def round_slots(study: Study, ledger: Ledger, round_id: str, *,
                manifest: Mapping[str, Any] | None = None) -> list[str]:
    """Return the slots of a round as ``missing_labs`` orders them (see there)."""
    if manifest is not None and manifest.get("mode") == "circulate":
        return report_slots(manifest)
    current = ledger.current_round(round_id)
    if study.design.mode == "circulate" and current is not None:
        return [circulate.station_key(lab, visit) for lab, visit in circulate.stops(study, current.host)]
    return [lab.id for lab in study.laboratories]


def check_gate(study: Study, ledger: Ledger, round_id: str, *, manifest: Mapping[str, Any],
               force: bool = False, reason: str | None = None) -> list[str]:
    """Return the slots still missing; raise LedgerError if the key may not open yet."""
    if ledger.current_round(round_id) is None:
        raise LedgerError(f"round {round_id!r} is not in the ledger; it was not planned in "
                          "this study folder")
    if ledger.round_status(round_id) in ("unsealed", "evaluated"):
        raise LedgerError(f"round {round_id!r} is already unsealed; key.json is in its folder")
    missing = missing_labs(study, ledger, round_id, manifest=manifest)
    if missing and not force:
        what = ("every code sent has a value or a remark" if study.shorthand else
                "every code sent has, for each measurand measured on it, a value or a remark")
        raise LedgerError(f"results are still missing or incomplete from {', '.join(missing)}; "
                          f"the key opens when {what} (or use --force --reason TEXT)")
    if force and missing and not (reason and reason.strip()):
        raise LedgerError("--force needs --reason TEXT saying why the key is opened early; "
                          "the reason is recorded in the ledger")
    return missing


def _short(print_: str) -> str:
    return f"{print_[:16]}..."


def check_fingerprint(folder: Path, ledger: Ledger, round_id: str, key_json: bytes, *,
                      source: str = seal.KEY_NAME) -> str:
    """Return the round's fingerprint once the SHA-256 of ``key_json`` equals both the one the
    ledger recorded at planning and the manifest's.

    ``source`` is the file the key came from: key.json, or key.sealed for a key decrypted
    in memory (pass its canonical JSON). Raises LedgerError when the round is not in the
    ledger, else SealError naming the two that differ: the key and the ledger (at the key's
    file) or the manifest and the ledger (at manifest.json).
    """
    current = ledger.current_round(round_id)
    if current is None:
        raise LedgerError(f"round {round_id!r} is not in the ledger; it was not planned in "
                          "this study folder")
    # The ledger's copy is the reference: the manifest and key.fingerprint are plain files
    # beside the key, and whoever can rewrite the key can rewrite them too.
    planned = current.fingerprint
    published = str(plan.read_manifest(folder).get("fingerprint"))
    actual = seal.fingerprint(key_json)
    if actual != planned:
        if published == actual:
            also = f"; {plan.MANIFEST_NAME} was rewritten to match the key"
        elif published != planned:
            also = f"; {plan.MANIFEST_NAME} holds a third one, {_short(published)}"
        else:
            also = ""
        what = ("its SHA-256" if source == seal.KEY_NAME
                else "the SHA-256 of the key decrypted from it")
        raise SealError(f"{what} {_short(actual)} does not equal the fingerprint recorded in the "
                        f"ledger at planning, {_short(planned)}{also}; this is not the key "
                        "fixed before shipping", Where(str(folder / source)))
    if published != planned:
        raise SealError(f"its fingerprint {_short(published)} does not equal the one recorded "
                        f"in the ledger at planning, {_short(planned)}, which the key matches; "
                        "the manifest was changed", Where(str(folder / plan.MANIFEST_NAME)))
    return planned


def check_published_fingerprint(folder: Path, ledger: Ledger, round_id: str) -> str:
    """Return the planned fingerprint once the manifest's equals it (documents made without
    the key print the manifest's); raise SealError naming the manifest otherwise."""
    current = ledger.current_round(round_id)
    if current is None:
        raise LedgerError(f"round {round_id!r} is not in the ledger; it was not planned in "
                          "this study folder")
    published = str(plan.read_manifest(folder).get("fingerprint"))
    if published != current.fingerprint:
        raise SealError(f"its fingerprint {_short(published)} does not equal the one recorded "
                        f"in the ledger at planning, {_short(current.fingerprint)}; the "
                        "manifest was changed", Where(str(folder / plan.MANIFEST_NAME)))
    return current.fingerprint


def read_key(folder: Path, ledger: Ledger, round_id: str) -> dict[str, Any]:
    """Return the decoded key.json of an unsealed round once ``check_fingerprint`` passed it;
    raise SealError while the key is sealed or when it does not match."""
    key_json = seal.read_key_json(folder)
    check_fingerprint(folder, ledger, round_id, key_json)
    return dict(json.loads(key_json))


def open_key(folder: Path, ledger: Ledger, round_id: str, *, passphrase: str,
             host_key: bytes | None = None) -> dict[str, Any]:
    """Return the key decrypted in memory once ``check_fingerprint`` passed its canonical JSON.

    A round sealed with one passphrase opens from key.sealed. A round sealed for trustees
    opens here only from the host's own copy (key.host.sealed), with the host's private
    key ``host_key`` and its ``passphrase``: the trustees' copy opens only at ``unseal``.
    Raises SealError if it cannot be opened or does not match.
    """
    from planner.sealing import trustees

    sealed = _read_sealed(folder / seal.SEALED_NAME)
    if trustees.is_envelope(sealed):
        if host_key is None:
            raise SealError("this round's key is sealed for its trustees: the host opens its "
                            "own copy with --host-key FILE (its private key); the trustees' "
                            "copy opens only at unseal, with their releases",
                            Where(str(folder / seal.SEALED_NAME)))
        path = folder / plan.HOST_SEALED_NAME
        key_json = trustees.open_with_private_key(_read_sealed(path), host_key, passphrase)
        check_fingerprint(folder, ledger, round_id, key_json, source=plan.HOST_SEALED_NAME)
        return dict(json.loads(key_json))
    if host_key is not None:
        raise SealError("this round's key is sealed with a passphrase, not for a host key; "
                        "leave out --host-key", Where(str(folder / seal.SEALED_NAME)))
    key = seal.open_key(folder, passphrase)
    check_fingerprint(folder, ledger, round_id, seal.canonical(key), source=seal.SEALED_NAME)
    return key


def _check_recipients(ledger: Ledger, round_id: str, info: Mapping[str, Any],
                      where: Where) -> None:
    """Raise SealError when the envelope is not sealed to the trustees planning recorded."""
    planned = ledger.events(round_id, "planned")
    sealing = planned[-1].detail.get("sealing") if planned else None
    if not sealing or sealing.get("kind") != "trustees":
        raise SealError("this round was planned with a passphrase, but its key.sealed is sealed "
                        "for trustees; it was replaced after planning", where)
    recorded = sealing.get("keys")
    if (info["threshold"] != sealing.get("threshold")
            or info["recipients"] != list(sealing.get("trustees") or ())
            or (recorded is not None and info["keys"] != recorded)):
        raise SealError("key.sealed is not sealed to the trustees planning recorded (their "
                        "ids, keys or threshold differ); it was replaced after planning, for "
                        "example by the host's copy", where)


def _read_sealed(path: Path) -> bytes:
    try:
        return path.read_bytes()
    except OSError:
        raise SealError("the sealed key is missing; the round folder is incomplete",
                        Where(str(path))) from None


def unseal_round(study: Study, study_dir: Path, round_id: str, ledger: Ledger, *,
                 passphrase: str | None = None, releases: Sequence[bytes] = (),
                 force: bool = False, reason: str | None = None) -> Path:
    """Record the opening, then decrypt the key into key.json (owner-only); return its path.

    Raises LedgerError while results are missing (unless ``force`` with a
    ``reason``) and SealError for a wrong passphrase, a damaged file or a key
    that does not match its fingerprint (``check_fingerprint``).
    """
    folder = plan.round_dir(study_dir, round_id)
    manifest = plan.read_manifest(folder)
    target = folder / seal.KEY_NAME
    # An opening the ledger recorded but whose key.json was never written (the process
    # was stopped in between) is completed, without a second event.
    completing = (ledger.round_status(round_id) in ("unsealed", "evaluated")
                  and not target.exists())
    missing = [] if completing else check_gate(study, ledger, round_id, force=force,
                                               reason=reason, manifest=manifest)
    from planner.sealing import trustees

    sealed = _read_sealed(folder / seal.SEALED_NAME)
    released: list[str] = []
    if trustees.is_envelope(sealed):
        if not releases:
            info = trustees.envelope_info(sealed)
            raise SealError(f"this round's key is sealed for its trustees: give --release FILE "
                            f"from {info['threshold']} of them "
                            f"({', '.join(info['recipients'])})",
                            Where(str(folder / seal.SEALED_NAME)))
        _check_recipients(ledger, round_id, trustees.envelope_info(sealed),
                          Where(str(folder / seal.SEALED_NAME)))
        key = dict(json.loads(trustees.open_envelope(sealed, releases)))
        released = sorted({str(json.loads(r).get("id")) for r in releases})
    else:
        if releases:
            raise SealError("this round's key is sealed with a passphrase, not for trustees; "
                            "leave out --release", Where(str(folder / seal.SEALED_NAME)))
        if passphrase is None:
            raise SealError("a passphrase is needed to open this round's key")
        key = seal.open_key(folder, passphrase)
    if key.get("round") != round_id or key.get("study") != study.id:
        raise SealError(f"the sealed key belongs to study {key.get('study')!r} round "
                        f"{key.get('round')!r}, not to this round", Where(str(folder)))
    key_json = seal.canonical(key)
    planned = check_fingerprint(folder, ledger, round_id, key_json, source=seal.SEALED_NAME)
    # a link where key.json goes is refused before the opening is recorded
    files.check_paths([target], root=study_dir)
    if not completing:
        # The opening is recorded (and committed) before key.json exists: no opened key
        # without its disclosure, even if the process is stopped right after.
        with ledger.transaction():
            ledger.record_event(round_id, "unsealed", {
                "fingerprint": planned, "forced": bool(force and missing),
                "reason": reason if force and missing else None, "missing": missing,
                "sealing": "trustees" if released else "passphrase",
                "releases": released})
    files.write_bytes(target, key_json, root=study_dir, private=True)
    return target


@dataclass(frozen=True, slots=True)
class Verdict:
    """What ``verify_round`` found: one line per fingerprint the key disagrees with (the
    ledger's, the manifest's, the one given), how many units it checked, and one line per
    unit or run order that differs from the rebuild."""

    fingerprint_findings: tuple[str, ...]
    units_checked: int
    differences: tuple[str, ...]

    @property
    def fingerprint_ok(self) -> bool:
        return not self.fingerprint_findings

    @property
    def ok(self) -> bool:
        return self.fingerprint_ok and not self.differences


def verify_round(study: Study, study_dir: Path, round_id: str, ledger: Ledger, *,
                 fingerprint: str | None = None) -> Verdict:
    """Check key.json against the fingerprints and rebuild the round from its secret.

    Returns a Verdict with the findings of ``check_fingerprint`` and of ``verify_key``,
    and a finding when the key's frame is not the round as planned (the frozen
    ``study``) or when it claims to have passed over codes the ledger never issued.
    Raises SealError while the key is sealed or for a malformed ``fingerprint``,
    LedgerError for a round that is not in the ledger.
    """
    given = None if fingerprint is None else seal.validate_fingerprint(fingerprint)
    folder = plan.round_dir(study_dir, round_id)
    path = folder / seal.KEY_NAME
    key_json = seal.read_key_json(folder)
    manifest = plan.read_manifest(folder)
    findings: list[str] = []
    try:
        check_fingerprint(folder, ledger, round_id, key_json)
    except SealError as exc:
        # In an audit a disagreement is a finding to list, not a reason to stop looking.
        findings.append(str(exc))
    verdict = verify_key(key_json, manifest, fingerprint=given, path=path,
                         study=study)
    current = ledger.current_round(round_id)
    earlier = ledger.codes(before_row=current.row) if current else set()
    key = json.loads(key_json)
    unknown = sorted(set(key.get("skipped") or ()) - earlier)
    differences = list(verdict.differences)
    if unknown:
        differences.append(f"key.json: it says the draw passed over {len(unknown)} code(s) of "
                           "earlier rounds that the ledger never issued")
    differences += _host_check_differences(study, folder, ledger, round_id, key)
    return Verdict(tuple(findings) + verdict.fingerprint_findings, verdict.units_checked,
                   tuple(differences))


def _host_check_differences(study: Study, folder: Path, ledger: Ledger, round_id: str,
                            key: Mapping[str, Any]) -> list[str]:
    """Return how the host's check units and forms differ from what the key rebuilds: the
    units with their materials recorded at planning, and each form's run order."""
    from planner import homogeneity

    recorded = homogeneity.checks_of(ledger, round_id)
    if recorded is None:
        return []
    rebuilt = homogeneity.host_checks(plan.units_from_key(dict(key)))
    out: list[str] = []
    for kind in ("homogeneity", "stability"):
        if recorded.get(kind, {}) != rebuilt.get(kind, {}):
            out.append(f"the {kind} units recorded at planning are not the ones the key "
                       "rebuilds (codes or materials differ)")
            continue
        if not rebuilt.get(kind):
            continue
        secret = bytes.fromhex(str(key["secret"]))
        want = homogeneity.run_order(secret, list(rebuilt[kind]), purpose=f"{kind}/order")
        path = folder / "host" / f"{homogeneity.FORM_NAMES[kind]}.csv"
        if not path.is_file():
            # The blank form is the only published record of the host's order.
            out.append(f"host/{path.name}: missing, so the host's measuring order cannot be "
                       "compared with the one the round secret draws")
        elif homogeneity.form_order(path) != want:
            out.append(f"host/{path.name}: its run order is not the one the round secret "
                       "draws; the form was edited or is not this round's")
        # The filled forms as recorded: the bytes the ledger hashed, in the drawn order.
        for event in ledger.events(round_id, f"{kind}-form"):
            stored = event.detail.get("stored")
            if not stored:
                continue
            kept = folder / str(stored)
            if not kept.is_file() or (hashlib.sha256(kept.read_bytes()).hexdigest()
                                      != event.detail.get("sha256")):
                out.append(f"{stored}: the {kind} form recorded on {event.at} is missing or "
                           "is not the file the ledger recorded")
            elif homogeneity.form_order(kept) != want:
                out.append(f"{stored}: the {kind} form recorded on {event.at} lists its runs "
                           "in another order than the one the round secret draws")
    return out


def verify_key(key_json: bytes, manifest: Mapping[str, Any], *, fingerprint: str | None,
               path: Path, study: Study | None = None) -> Verdict:
    """Check a key against a fingerprint and its manifest and rebuild its units from the secret.

    Needs nothing but key.json, the manifest and (for a participant) the fingerprint
    from its own packing list: the key carries the round's frame (laboratory and material
    ids in order, the design, a circulating set's stops) and the codes of earlier rounds
    its draw passed over. ``study``, the round as planned, adds a check that the frame is
    that round's. Raises SealError for a key that cannot be read.
    """
    findings: list[str] = []
    actual = seal.fingerprint(key_json)
    if fingerprint is not None and actual != fingerprint:
        findings.append(str(SealError(
            f"its SHA-256 {_short(actual)} differs from the fingerprint given, "
            f"{_short(fingerprint)}; if it was copied right, this is not the key the packing "
            "list was printed for", Where(str(path)))))
    if manifest.get("fingerprint") != actual:
        findings.append(str(SealError(
            f"its SHA-256 {_short(actual)} differs from the manifest's fingerprint "
            f"{_short(str(manifest.get('fingerprint')))}", Where(str(path)))))
    try:
        key = json.loads(key_json)
        secret = bytes.fromhex(key["secret"])
        host = str(key["host"])
        frame: Any = plan.frame_from_key(key) if "frame" in key else study
    except (ValueError, KeyError, TypeError, AttributeError):
        raise SealError("key.json is not a readable ringplan key", Where(str(path))) from None
    if (manifest.get("host") != host or not isinstance(manifest.get("labs"), dict)
            or manifest.get("round") != key.get("round")):
        findings.append(str(SealError(
            "the manifest is not this key's round (its round, host or laboratories differ)",
            Where(str(path)))))
        return Verdict(tuple(findings), 0, ())
    if frame is None:
        raise SealError("this key was written before keys carried their round's frame; "
                        "verify it in the study folder", Where(str(path)))
    differences: list[str] = []
    if study is not None and "frame" in key and key["frame"] != plan.frame_of(study, host):
        differences.append("key.json: its frame (laboratories, materials, design) is not the "
                           "round as planned")
    rebuilt = plan.build_units(frame, host=host, secret=secret,
                               taken=set(key.get("skipped") or ()),
                               spares_in_parcels=plan.parcel_spares(key))
    found = plan.units_from_key(key)
    differences += plan.compare_units(rebuilt, found)
    differences += _measured_differences(manifest, found, study)
    published = plan.manifest_runs(dict(manifest))
    for slot, runs in plan.expected_runs(frame, host=host, secret=secret, units=rebuilt).items():
        if published.get(slot) != runs:
            differences.append(f"manifest.json: the run orders of {slot!r} differ from the ones "
                               "the secret gives")
    return Verdict(tuple(findings), len(found), tuple(differences))


def _measured_differences(manifest: Mapping[str, Any], units: Sequence[plan.Unit],
                          study: Study | None) -> list[str]:
    """Return what differs in a manifest's measurands and the units each is not measured on
    (the n/a cells of every form) from what the key's materials give; [] for a round in the
    single-measurand form."""
    listed = manifest.get("measurands")
    if listed is None and "not_measured" not in manifest:
        return []
    out = []
    if study is not None and (study.shorthand or listed != plan.measurands_of_manifest(study)):
        out.append("manifest.json: its measurands are not those of the round as planned")
    try:
        materials = {str(m["id"]): m.get("materials") for m in listed or ()}
    except (TypeError, KeyError, AttributeError):
        return out + ["manifest.json: its list of measurands cannot be read"]
    if manifest.get("not_measured") != plan.codes_not_measured(materials, units):
        out.append("manifest.json: the units it marks as not measured for a measurand (n/a on "
                   "the forms) are not those the key's materials give")
    return out
