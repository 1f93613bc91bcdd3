"""How the decoding key was opened, in words: what the report and every letter say of it.

The sentences come only from the ``opening`` record of statistics.json, which
evaluation copies from the ledger (``planner.status.read_key_history``), so a
document says no more and no less than the ledger shows: a key opened before
every result was in is said to be, with the coordinator's reason and who was
missing then; each decryption of the key while it was sealed (to print the
host's documents, to issue a spare) is listed with its time; results recorded
after the opening are named. The report names laboratories by id; a letter
passes a ``name_of`` that gives participant codes, so that it still names only
its own laboratory.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Mapping
from pathlib import PurePosixPath
from typing import Any

from planner import status

__all__ = ["opening_sentence", "later_sentences", "slot_name", "masked"]


def slot_name(slot: str) -> str:
    """Return a slot as the report names it: 'crx', or 'kal (end stop)' for a later stop."""
    lab, at, visit = slot.partition("@")
    return f"{lab} ({visit} stop)" if at else lab


def opening_sentence(opening: Mapping[str, Any] | None, *, name_of: Callable[[str], str],
                     reason: Callable[[str], str] = str) -> str:
    """Return the sentence that says when the key was opened and whether every result was in.

    ``name_of`` turns a slot into the name to print; ``reason`` may rewrite the
    coordinator's recorded reason before it is quoted (a letter hides other ids).
    """
    if not opening or not opening.get("at"):
        return ("This evaluation holds no record from the ledger of when or how the decoding "
                "key was opened.")
    when = status.ledger_time(str(opening["at"]))
    if not opening.get("forced"):
        return (f"The decoding key was opened on {when}, after the results of every "
                "laboratory had been recorded.")
    said = opening.get("reason")
    why = f"reason: '{reason(str(said))}'" if said else "no reason recorded"
    missing = ", ".join(name_of(s) for s in opening.get("missing") or ()) or "none recorded"
    return (f"The decoding key was opened on {when} BEFORE every result was in: forced by the "
            f"coordinator, {why}; results missing at that moment: {missing}.")


def later_sentences(opening: Mapping[str, Any] | None, *, name_of: Callable[[str], str],
                    spare_to: Callable[[str], str] | None = None) -> list[str]:
    """Return the sentences on the key's decryptions while sealed and on results after opening.

    ``spare_to`` names the laboratory a spare was sent to (default ``name_of``); a letter
    names none but its own, since the host, which sent the spare, would otherwise learn that
    laboratory's participant code.
    """
    spare_to = spare_to or name_of
    if not opening or not opening.get("at"):
        return []
    uses = []
    for use in opening.get("early_decryptions") or ():
        when = status.ledger_time(str(use.get("at")))
        detail = use.get("detail") or {}
        if use.get("kind") == "spare-swap":
            what = f"on {when} to issue a spare unit to {spare_to(str(detail.get('lab')))}"
        else:
            names = status.host_documents(detail)
            what = (f"on {when} to print the host's documents ("
                    + ", ".join(PurePosixPath(n).stem.replace("-", " ") for n in names) + ")"
                    if names else
                    f"on {when} to print documents the ledger does not name (they may "
                    "include the host's labels and prep sheet)")
        uses.append(what + (", before any result had come in" if use.get("before_results")
                            else ", AFTER results had begun to come in"))
    out = [("While it was sealed, the key was decrypted " + "; ".join(uses) + ".") if uses else
           "The ledger shows no printing of the host's documents and no spare issued while "
           "the key was sealed."]
    after = opening.get("received_after") or ()
    if after:
        out.append("Results recorded after the opening, and flagged after-unseal: "
                   + ", ".join(name_of(s) for s in after) + ".")
    return out


def masked(text: str, codes_of: Mapping[str, str], *, keep: str) -> tuple[str, bool]:
    """Return ``text`` with every laboratory id but ``keep`` replaced by its participant code,
    and whether anything was replaced."""
    others = {lab.lower(): code for lab, code in codes_of.items() if lab != keep}
    if not others:
        return text, False
    # Longest first, and whole ids only: 'lin' inside 'linear' stays as it is.
    names = "|".join(re.escape(lab) for lab in sorted(others, key=len, reverse=True))
    pattern = re.compile(rf"(?<![\w-])({names})(?![\w-])", re.IGNORECASE)
    out = pattern.sub(lambda m: others[m.group(1).lower()], text)
    return out, out != text
