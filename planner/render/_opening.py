"""How the decoding key was opened, in words: what the report and every letter say of it.

The sentences come only from the ``opening`` record of statistics.json, which
evaluation copies from the ledger (``planner.status.read_key_history``), so a
document says no more and no less than the ledger shows: a key opened before
every result was in is said to be, with the coordinator's reason and who was
missing then; each decryption of the key while it was sealed (to print the
host's documents, to issue a spare) is listed with its time; results recorded
after the opening are named. The report names laboratories by id; a letter
passes a ``name_of`` that gives participant codes, so that it still names only
its own laboratory, and the laboratory's ``texts`` (``planner.language``); the
report keeps the study's language. A letter may also pass ``names``, which says a
long list of slots in fewer words (how many, and whether its own is among them):
the report keeps every name.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Mapping, Sequence
from functools import lru_cache
from pathlib import PurePosixPath
from typing import TYPE_CHECKING, Any

from planner import language, status

if TYPE_CHECKING:
    from planner.language import Texts

__all__ = ["opening_sentence", "later_sentences", "sealing_sentence", "slot_name", "masked"]


def slot_name(slot: str) -> str:
    """Return a slot as the report names it: 'crx', or 'kal (end stop)' for a later stop."""
    lab, at, visit = slot.partition("@")
    return f"{lab} ({visit} stop)" if at else lab


def _when(at: Any, t: Texts) -> str:
    """Return a ledger time as '2027-02-03 at 10:15 UTC' in the words of ``t`` (the text
    itself if unreadable), as ``status.ledger_time`` does in English."""
    from datetime import UTC, datetime

    try:
        moment = datetime.fromisoformat(str(at))
    except (TypeError, ValueError):
        return str(at)
    if moment.tzinfo is None:  # no zone recorded: do not invent one
        return t("opening.time", date=moment.strftime("%Y-%m-%d"), time=moment.strftime("%H:%M"))
    moment = moment.astimezone(UTC)
    return t("opening.time_utc", date=moment.strftime("%Y-%m-%d"),
             time=moment.strftime("%H:%M"))


def opening_sentence(opening: Mapping[str, Any] | None, *, name_of: Callable[[str], str],
                     reason: Callable[[str], str] = str, texts: Texts | None = None,
                     names: Callable[[Sequence[str]], str] | None = None) -> str:
    """Return the sentence that says when the key was opened and whether every result was in.

    ``name_of`` turns a slot into the name to print; ``names`` turns the list of slots
    missing into words (default: each by ``name_of``, comma-separated); ``reason`` may
    rewrite the coordinator's recorded reason before it is quoted (a letter hides other
    ids); ``texts`` are the reader's words (the study's language without).
    """
    t = texts or language.texts()
    if not opening or not opening.get("at"):
        return t("opening.no_record")
    when = _when(opening["at"], t)
    if not opening.get("forced"):
        return t("opening.opened", when=when)
    said = opening.get("reason")
    why = t("opening.reason", reason=reason(str(said))) if said else t("opening.no_reason")
    slots = list(opening.get("missing") or ())
    missing = ((names or _listing(name_of))(slots) if slots else "") or t("opening.none_recorded")
    return t("opening.forced", when=when, why=why, missing=missing)


def _listing(name_of: Callable[[str], str]) -> Callable[[Sequence[str]], str]:
    return lambda slots: ", ".join(name_of(s) for s in slots)


def later_sentences(opening: Mapping[str, Any] | None, *, name_of: Callable[[str], str],
                    spare_to: Callable[[str], str] | None = None,
                    texts: Texts | None = None,
                    names: Callable[[Sequence[str]], str] | None = None) -> list[str]:
    """Return the sentences on the key's decryptions while sealed and on results after opening.

    ``spare_to`` names the laboratory a spare was sent to (default ``name_of``); a letter
    names none but its own, since the host, which sent the spare, would otherwise learn that
    laboratory's participant code. ``names`` turns the list of slots recorded after the
    opening into words (default: each by ``name_of``, comma-separated).
    """
    t = texts or language.texts()
    spare_to = spare_to or name_of
    listing = names or _listing(name_of)
    if not opening or not opening.get("at"):
        return []
    uses = []
    for use in opening.get("early_decryptions") or ():
        when = _when(use.get("at"), t)
        detail = use.get("detail") or {}
        if use.get("kind") == "spare-swap":
            what = t("opening.spare", when=when, lab=spare_to(str(detail.get("lab"))))
        else:
            names = status.host_documents(detail)
            what = (t("opening.host_documents", when=when,
                      documents=", ".join(_document(n, t) for n in names))
                    if names else t("opening.unnamed_documents", when=when))
        uses.append(what + t("opening.before_results" if use.get("before_results")
                             else "opening.after_results"))
    out = [t("opening.decrypted", uses=t("common.semicolon").join(uses)) if uses else
           t("opening.not_decrypted")]
    after = opening.get("received_after") or ()
    if after:
        out.append(t("opening.received_after", names=listing(list(after))))
    return out


def _document(name: str, t: Texts) -> str:
    """Return a host document's path as words: 'host/prep-sheet.pdf' -> 'prep sheet'."""
    stem = PurePosixPath(name).stem
    key = f"opening.document.{stem}"
    return t(key) if key in t.entries else stem.replace("-", " ")


def sealing_sentence(key: Mapping[str, Any], *, texts: Texts | None = None) -> str:
    """Return one sentence on how the key was sealed and, once opened, by whom ("" if the
    record says nothing), as ``status.sealing_sentence`` does in English."""
    t = texts or language.texts()
    sealing = key.get("sealing") or {}
    if sealing.get("kind") == "trustees":
        trustees = sealing.get("trustees") or ()
        text = t("opening.sealed_trustees", count=len(trustees), trustees=", ".join(trustees),
                 threshold=sealing.get("threshold"))
        if key.get("releases"):
            text += t("opening.opened_with", trustees=", ".join(key["releases"]))
        return text + "."
    if sealing.get("kind") == "passphrase":
        return t("opening.sealed_passphrase")
    return ""


def masked(text: str, codes_of: Mapping[str, str], *, keep: str) -> tuple[str, bool]:
    """Return ``text`` with every laboratory id but ``keep`` replaced by its participant code,
    and whether anything was replaced."""
    if all(lab == keep for lab in codes_of):
        return text, False
    pattern, code_of = _ids(tuple(codes_of.items()))
    own = keep.lower()

    def replace(found: re.Match[str]) -> str:
        lab = found.group(1)
        return lab if lab.lower() == own else code_of[lab.lower()]

    out = pattern.sub(replace, text)
    return out, out != text


@lru_cache(maxsize=8)
def _ids(pairs: tuple[tuple[str, str], ...]) -> tuple[re.Pattern[str], dict[str, str]]:
    """Return a pattern of every laboratory id of ``pairs`` (id, participant code) and the
    codes by id in lower case. Made once for all the letters of a round: some 12 ms at 500
    laboratories. The own laboratory's id is in it as well, and stays as it is."""
    code_of = {lab.lower(): code for lab, code in pairs}
    # Longest first, and whole ids only: 'lin' inside 'linear' stays as it is.
    names = "|".join(re.escape(lab) for lab in sorted(code_of, key=len, reverse=True))
    return re.compile(rf"(?<![\w-])({names})(?![\w-])", re.IGNORECASE), code_of
