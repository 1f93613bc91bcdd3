"""The ringplan command line: parse arguments, call one library function, print.

Heavy libraries are imported inside the commands so that ``ringplan --help``
answers at once. A PlannerError is printed as one line on stderr with exit
status 2; anything else is a bug and keeps its traceback (locals hidden, so a
crash never shows a secret or a passphrase).
"""

from __future__ import annotations

import functools
import json
import math
import os
import sys
from collections.abc import Callable
from datetime import date
from pathlib import Path
from typing import Annotated, Any, TypeVar

import typer

from planner.errors import PlannerError, SealError

app = typer.Typer(
    name="ringplan",
    help="Plan, blind, print and evaluate interlaboratory comparison rounds.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_show_locals=False,
    rich_markup_mode=None,
)

_F = TypeVar("_F", bound=Callable[..., Any])

StudyDir = Annotated[Path, typer.Argument(metavar="STUDY_DIR",
                                          help="The study folder (holds study.yaml).")]


def _round_id(value: str | None) -> str | None:
    """Check --round as soon as it is read: one line and exit status 2 for an id that is
    not one (a path such as '../x', '' or 'a/b'), before anything is opened."""
    from planner import spec

    if value is not None and not spec.slug_ok(value):
        _fail(f"--round {value!r} is not a usable round id; use letters, digits, '-', '_' "
              "or '.', e.g. 2027-1")
        raise typer.Exit(2)
    return value


RoundOpt = Annotated[str, typer.Option("--round", help="The round id, e.g. 2027-1.",
                                       callback=_round_id)]
PassFile = Annotated[Path | None, typer.Option(
    "--passphrase-file", help="Read the key passphrase from this file (first line). "
    "Otherwise RINGPLAN_PASSPHRASE, otherwise a hidden prompt.")]
JsonOpt = Annotated[bool, typer.Option("--json", help="Print JSON instead of tables.")]


_MAX_OFFSET_MM = 20.0  # a printer that feeds labels further off needs a new sheet geometry


def _fail(message: str) -> None:
    typer.echo(f"error: {message}", err=True)


def _command(func: _F) -> _F:
    """Turn a PlannerError into one line on stderr and exit status 2."""
    @functools.wraps(func)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return func(*args, **kwargs)
        except PlannerError as exc:
            for line in str(exc).splitlines():
                _fail(line)
            raise typer.Exit(2) from None
        except OSError as exc:
            # The last net under planner.files: what a user's disk refuses (rights, a
            # read-only or full disk, a file in the way) is one line; any other OSError
            # is our bug and keeps its traceback.
            from planner import files

            if exc.errno not in files.USER_ERRNOS:
                raise
            _fail(str(files.explain(exc)))
            raise typer.Exit(2) from None
    return wrapper  # type: ignore[return-value]


def _passphrase(path: Path | None, *, confirm: bool) -> str:
    """Return the passphrase from the file, the environment, or a hidden prompt.

    Every source is normalised the same way (``seal.normalize_passphrase``): the same
    phrase opens a key whichever way it is given.
    """
    from planner.seal import normalize_passphrase

    if path is not None:
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            why = (exc.strerror or "error").lower() if isinstance(exc, OSError) else "not UTF-8"
            raise SealError(f"cannot read the passphrase file ({why})", _where(path)) from None
        lines = [normalize_passphrase(ln) for ln in text.splitlines()]
        first = next((ln for ln in lines if ln), "")
        if not first:
            raise SealError("the passphrase file is empty; put the passphrase on its first line",
                            _where(path))
        if lines[0] != first:
            raise SealError("the passphrase file starts with a blank line; put the passphrase "
                            "on its first line", _where(path))
        if os.name == "posix" and path.stat().st_mode & 0o077:
            typer.echo(f"warning: {path}: the passphrase file can be read by other users; "
                       f"'chmod 600 {path}' keeps it yours", err=True)
        return first
    env = os.environ.get("RINGPLAN_PASSPHRASE")
    if env is not None and normalize_passphrase(env):
        return normalize_passphrase(env)
    if not sys.stdin.isatty():
        raise SealError("no passphrase given; use --passphrase-file FILE or set "
                        "RINGPLAN_PASSPHRASE (no terminal to ask at)")
    return normalize_passphrase(str(typer.prompt("Key passphrase", hide_input=True,
                                                 confirmation_prompt=confirm)))


def _where(path: Path) -> Any:
    from planner.errors import Where

    return Where(str(path))


def _console() -> Any:
    from rich.console import Console

    # Piped output has no terminal width; 100 columns keep the tables whole.
    # No markup: a name, unit or reason from a study or a form is printed as written
    # ('[/]' in a unit is text, not a closing tag).
    return Console(highlight=False, markup=False,
                   width=None if sys.stdout.isatty() else 100)


def _table(title: str, columns: list[str], rows: list[list[Any]]) -> Any:
    from rich.table import Table

    table = Table(title=title, title_justify="left", title_style="bold", header_style="bold")
    for col in columns:
        table.add_column(col, justify="right" if col.startswith(("#", "units", "amount")) else "left")
    for row in rows:
        table.add_row(*("" if v is None else str(v) for v in row))
    return table


def _print_json(data: Any) -> None:
    typer.echo(json.dumps(data, indent=2, ensure_ascii=False, default=str))


def _load(study_dir: Path) -> Any:
    from planner import spec

    return spec.load(study_dir)


def _round_study(study_dir: Path, round_id: str, ledger: Any) -> Any:
    """Return the study as the round was planned (frozen), not today's study.yaml."""
    from planner import plan

    return plan.round_study(study_dir, round_id, ledger)


def _tidy(study_dir: Path, round_id: str) -> tuple[list[Any], list[Any]]:
    """Remove the temporary files that stopped commands left in the round folder; return
    (removed, kept) as ``files.remove_stale`` does."""
    from planner import files
    from planner import plan as planning

    return files.remove_stale(planning.round_dir(study_dir, round_id))


# --- commands ------------------------------------------------------------------

@app.command()
@_command
def new(folder: Annotated[Path, typer.Argument(help="A new study folder to create.")]) -> None:
    """Write a new study folder with a fully commented study.yaml to edit."""
    from planner import files
    from planner.resources import template_path

    target = folder / "study.yaml"
    if target.exists():
        raise PlannerError(f"{target} already exists; edit it, or choose a new folder")
    bad = next((p for p in (folder, *folder.parents) if p.exists() and not p.is_dir()), None)
    if bad is not None:
        raise PlannerError(f"{bad} is a file, not a folder; choose a folder name that is free",
                           _where(bad))
    text = template_path("study.yaml").read_text(encoding="utf-8")
    files.write_text(target, text, root=folder, private=False)
    typer.echo(f"wrote {target}; edit it, then run: ringplan check {folder}")


@app.command()
@_command
def check(study_dir: StudyDir, as_json: JsonOpt = False) -> None:
    """Validate study.yaml and show the units to prepare and the proposed next host."""
    from planner import overview

    study = _load(study_dir)
    info = overview.summarize(study, study_dir)
    if as_json:
        _print_json(info)
        return
    con = _console()
    con.print(f"{info['title']}  ({info['study']})", style="bold")
    design = (f"{info['design']['trials']} trials, {info['design']['run_order']} run order, "
              f"{info['design']['mode']} samples")
    if "measurands" in info:
        con.print(f"design: {design}")
        con.print(_table("Measurands", ["id", "name", "unit", "uncertainty", "materials"],
                         [[m["id"], m["name"], m["unit"], m["uncertainty"],
                           ", ".join(m["materials"]) if m["materials"] else "all"]
                          for m in info["measurands"]]))
    else:
        con.print(f"measurand: {info['measurand']} [{info['unit']}]   design: {design}")
    con.print(_table("Laboratories", ["id", "name", "country", "can host", "decimal", "hosted"],
                     [[lab["id"], lab["name"], lab["country"], "yes" if lab["can_host"] else "no",
                       lab["decimal"], lab["hosted"]] for lab in info["laboratories"]]))
    con.print(_table(
        "Units to prepare per material",
        ["material", "test", "spare", "retained", "homog.", "units",
         "amount / unit", "amount total", "stable (days)", "hazard"],
        [[m["id"], m["test"], m["spare"], m["retained"], m["homogeneity"],
          m["units"], f"{m['amount_per_unit']:g} {m['amount_unit']}",
          f"{m['total_amount']:g} {m['amount_unit']}", m["stability_days"], m["hazard"] or ""]
         for m in info["materials"]]))
    con.print(f"units in total: {info['units_total']} ({info['units_per_material']} per material)")
    nxt = info["next_host"]
    con.print(f"proposed next host: {nxt['host']} — {nxt['reason']}")
    _print_schedule(con, info["schedule"])
    if info.get("route"):
        _print_route(con, info["route"])
    for text in info["warnings"]:
        typer.echo(f"warning: {text}", err=True)
    for text in info["notes"]:
        typer.echo(f"note: {text}", err=True)
    con.print("study spec is valid")


@app.command()
@_command
def rotate(
    study_dir: StudyDir,
    rounds: Annotated[int, typer.Option("--rounds", min=1, max=100,
                                        help="How many coming rounds to propose.")] = 4,
    as_json: JsonOpt = False,
) -> None:
    """Propose the hosts of the coming rounds from the study's history, each explained."""
    from planner import overview, rotation

    study = _load(study_dir)
    proposals = rotation.propose(study, overview.past_rounds(study, study_dir), rounds=rounds)
    if as_json:
        _print_json([{"round_index": p.round_index, "host": p.host, "date": p.date.isoformat(),
                      "reason": p.reason} for p in proposals])
        return
    _console().print(_table("Proposed hosts", ["#", "date", "host", "why"],
                            [[p.round_index, p.date.isoformat(), p.host, p.reason]
                             for p in proposals]))


@app.command("history")
@_command
def history_command(
    study_dir: StudyDir,
    as_json: JsonOpt = False,
    pdf: Annotated[bool, typer.Option("--pdf/--no-pdf",
                                      help="Also write history.pdf in the study folder.")] = True,
) -> None:
    """Show each laboratory's scores over the evaluated rounds and the host effect."""
    from planner import history
    from planner.ledger import LEDGER_NAME, Ledger

    study = _load(study_dir)
    labs = [lab.id for lab in study.laboratories]
    order = [m.id for m in study.all_measurands]
    folder = Path(study_dir)
    if (folder / LEDGER_NAME).exists() or any(folder.glob("rounds/*/manifest.json")) or any(
            folder.glob("rounds/*/report/statistics.json")):
        with Ledger.open(study_dir, create=False) as ledger:
            record = history.collect(study_dir, ledger, labs=labs, measurands=order)
    else:  # nothing planned, nothing to read
        record = history.collect(study_dir, None, labs=labs, measurands=order)
    if pdf:
        from planner import render
        from planner.render import history as history_page

        render.use_fonts(study, study_dir)
        out = history_page.render(Path(study_dir) / "history.pdf", record, study_id=study.id,
                                  title=study.study.title, paper=study.study.paper)
    if as_json:
        _print_json(record)
        return
    con = _console()
    single = list(record["measurands"]) == [history.SHORTHAND_ID]
    missing = [f"round {name} was evaluated, but its report/statistics.json is missing; it is "
               "left out here (evaluate it again to restore the file)"
               for name in record.get("missing_statistics", ())]
    for mid, block in record["measurands"].items():
        rounds = block["rounds"]
        rows = []
        for lab, data in block["labs"].items():
            cells = []
            for name in rounds:
                entry = data["rounds"].get(name)
                if entry is None or entry["mean_z"] is None:
                    cells.append("*" if entry and entry["hosted"] else "")
                else:
                    cells.append(f"{entry['mean_z']:+.2f}{' *' if entry['hosted'] else ''}")
            rows.append([lab, *cells])
        which = "" if single else f" of {mid}"
        if rounds:
            con.print(_table(f"Mean z{which} per round (* hosted)", ["laboratory", *rounds],
                             rows))
        elif not single:
            continue
        else:
            con.print("no round of this study has been evaluated yet ('ringplan evaluate' "
                      "makes one)")
        if single:
            for line in missing:
                con.print(line)
        effect = block["host_effect"]
        for lab, item in effect["labs"].items():
            con.print(("" if single else f"{mid}: ") + item["statement"])
        con.print(("" if single else f"{mid}: ") + effect["pooled"]["statement"])
    if not single:
        if not record["rounds"]:
            con.print("no round of this study has been evaluated yet ('ringplan evaluate' "
                      "makes one)")
        for line in missing:
            con.print(line)
    if pdf:
        con.print(f"wrote {out}")


def _print_schedule(con: Any, dates: dict[str, Any]) -> None:
    con.print(f"prepare on {dates['prepare_on']}; all laboratories test {dates['test_start']} "
              f"to {dates['test_end']}; results due {dates['results_due']}")
    con.print(_table("Shipping", ["laboratory", "ship", "arrive", "transit (working days)"],
                     [[lab, d["ship"], d["arrive"], d["transit_days"]]
                      for lab, d in dates["labs"].items()]))


def _print_route(con: Any, stations: list[dict[str, Any]]) -> None:
    con.print(_table("Route of the circulating set",
                     ["#", "laboratory", "visit", "from", "arrives", "tests", "passes on", "to"],
                     [[s["index"], s["lab"], s["visit"] or "", s["received_from"] or "",
                       s["arrive"], f"{s['test_start']} to {s['test_end']}", s["pass_on"] or "",
                       s["next_lab"] or ""] for s in stations]))


@app.command()
@_command
def plan(
    study_dir: StudyDir,
    round_id: RoundOpt,
    host: Annotated[str | None, typer.Option(help="The host laboratory (default: the "
                                             "rotation's proposal).")] = None,
    receive_by: Annotated[str | None, typer.Option(
        "--receive-by", help="Date (YYYY-MM-DD) by which every parcel must have arrived.")] = None,
    replace: Annotated[bool, typer.Option(
        help="Plan an existing round again (only if nothing was printed or received).")] = False,
    passphrase_file: PassFile = None,
) -> None:
    """Draw codes and run orders for a round, seal the key, write the round folder."""
    from planner import draw, overview, rotation
    from planner import plan as planning
    from planner.ledger import Ledger

    study = _load(study_dir)
    when = _date_option("--receive-by", receive_by)
    if when is not None and when < date.today():
        typer.echo(f"warning: --receive-by {when} is in the past; the round's dates are "
                   "computed from it as given", err=True)
    if host is None:
        host = rotation.propose(study, overview.past_rounds(study, study_dir), rounds=1,
                                first_date=when)[0].host
    elif host not in {lab.id for lab in study.laboratories}:
        raise PlannerError(f"--host {host!r} is not a laboratory of this study; known: "
                           + ", ".join(lab.id for lab in study.laboratories))
    elif not study.lab(host).can_host:
        raise PlannerError(f"--host {host!r} cannot host (can_host is false in study.yaml)")
    dates, route = planning.dates_for(study, host, receive_by=when)
    # With trustees the key is sealed to their public keys (and the host's): no passphrase.
    passphrase = (None if study.sealing is not None
                  else _passphrase(passphrase_file, confirm=True))
    with Ledger.open(study_dir) as ledger:
        taken = ledger.codes()
        result = planning.plan_round(study, round_id=round_id, host=host, dates=dates,
                                     secret=draw.new_secret(), taken=taken, route=route)
        folder = planning.write_round(study, study_dir, result, ledger, passphrase=passphrase,
                                      replace=replace)
    con = _console()
    con.print(f"planned round {round_id} of {study.id}: host {host}, "
              f"{len(result.units)} units, {len(study.laboratories)} laboratories")
    _print_schedule(con, dates.to_json())
    if route is not None:
        _print_route(con, route.to_json())
    con.print(f"fingerprint {result.fingerprint}")
    con.print(f"wrote {folder}")
    for text in overview.warnings(study, study_dir):
        typer.echo(f"warning: {text}", err=True)
    for text in overview.notes(study):
        typer.echo(f"note: {text}", err=True)
    if study.sealing is None:
        con.print("keep the passphrase safe: without it the key cannot be opened")
    else:
        con.print(f"the key is sealed for the trustees "
                  f"{', '.join(x.id for x in study.sealing.trustees)} (any "
                  f"{study.sealing.threshold} open it) and a copy for the host {host}, who prints "
                  "its labels and preparation sheet with --host-key; the host's key opens the "
                  "whole map, so keep it with the host alone")


def _date_option(name: str, value: str | None) -> date | None:
    if value is None:
        return None
    try:
        return date.fromisoformat(value)
    except ValueError:
        raise PlannerError(f"{name} {value!r} is not a date; write YYYY-MM-DD") from None


@app.command()
@_command
def unseal(
    study_dir: StudyDir,
    round_id: RoundOpt,
    force: Annotated[bool, typer.Option(help="Open the key although results are missing.")] = False,
    reason: Annotated[str | None, typer.Option(help="Why the key is opened early "
                                               "(recorded in the ledger).")] = None,
    passphrase_file: PassFile = None,
    release: Annotated[list[Path] | None, typer.Option(
        help="A trustee's release of this round's key (repeat for each trustee); for a "
        "round sealed for trustees, instead of the passphrase.")] = None,
) -> None:
    """Open the sealed key once every laboratory has reported; check its fingerprint."""
    from planner import audit, seal
    from planner import plan as planning
    from planner.ledger import Ledger

    with Ledger.open(study_dir, create=False) as ledger:
        study = _round_study(study_dir, round_id, ledger)
        folder = planning.round_dir(study_dir, round_id)
        completing = (ledger.round_status(round_id) in ("unsealed", "evaluated")
                      and not (folder / seal.KEY_NAME).exists())
        if not completing:  # the gate is named before the passphrase is asked
            audit.check_gate(study, ledger, round_id, force=force, reason=reason,
                             manifest=planning.read_manifest(folder))
        releases = [_read_bytes(path) for path in release or ()]
        passphrase = None if releases or study.sealing is not None else _passphrase(
            passphrase_file, confirm=False)
        path = audit.unseal_round(study, study_dir, round_id, ledger, passphrase=passphrase,
                                  releases=releases, force=force, reason=reason)
    typer.echo(f"wrote {path}; its SHA-256 equals the fingerprint recorded in the ledger at "
               "planning and printed on every packing list")


@app.command()
@_command
def verify(
    study_dir: Annotated[Path | None, typer.Argument(
        help="The study folder (leave out with --key and --manifest).")] = None,
    round_id: Annotated[str | None, typer.Option(
        "--round", help="The round id, e.g. 2027-1 (with the study folder).",
        callback=_round_id)] = None,
    fingerprint: Annotated[str | None, typer.Option(
        help="The round fingerprint as printed on your packing list (spaces and case do not "
        "matter); key.json must have this SHA-256.")] = None,
    key: Annotated[Path | None, typer.Option(
        help="A published key.json, checked on its own (needs --manifest and --fingerprint).")
    ] = None,
    manifest: Annotated[Path | None, typer.Option(
        help="The round's manifest.json, with --key.")] = None,
) -> None:
    """Check key.json against the fingerprints and rebuild the round from its secret."""
    from planner import audit, seal
    from planner.ledger import Ledger

    if fingerprint is not None:
        # a mistyped fingerprint is named before anything is opened
        fingerprint = seal.validate_fingerprint(fingerprint, field="--fingerprint")
    if key is not None or manifest is not None:
        if key is None or manifest is None or fingerprint is None or study_dir is not None:
            raise PlannerError("checking a published key needs --key FILE, --manifest FILE "
                               "and --fingerprint HEX (from your packing list), and no study "
                               "folder")
        verdict = audit.verify_key(_read_bytes(key), _read_json(manifest),
                                   fingerprint=fingerprint, path=key)
        label = str(key)
    else:
        if study_dir is None or round_id is None:
            raise PlannerError("name the study folder and --round, or check a published key "
                               "with --key, --manifest and --fingerprint")
        with Ledger.open(study_dir, create=False) as ledger:
            study = _round_study(study_dir, round_id, ledger)
            verdict = audit.verify_round(study, study_dir, round_id, ledger,
                                         fingerprint=fingerprint)
        label = f"round {round_id}: key.json"
    for line in verdict.fingerprint_findings:
        _fail(line)
    for line in verdict.differences:
        _fail(line)
    if not verdict.ok:
        raise typer.Exit(1)
    if key is not None:
        typer.echo(f"{label} has the fingerprint given, matches the manifest, and all "
                   f"{verdict.units_checked} units and every run order rebuild from its secret "
                   "exactly")
        return
    given = " and the one given" if fingerprint is not None else ""
    typer.echo(f"{label} matches the fingerprint recorded in the ledger at "
               f"planning, the manifest's{given}, and all {verdict.units_checked} units "
               "rebuild from the secret exactly")


def _sealed_for_trustees(folder: Path) -> bool:
    from planner.sealing import trustees

    try:
        return trustees.is_envelope((folder / "key.sealed").read_bytes())
    except OSError:
        return False


def _read_bytes(path: Path) -> bytes:
    try:
        return path.read_bytes()
    except OSError as exc:
        raise PlannerError(f"cannot read the file ({(exc.strerror or 'error').lower()})",
                           _where(path)) from None


def _read_json(path: Path) -> dict[str, Any]:
    try:
        data = json.loads(_read_bytes(path))
    except ValueError:
        raise PlannerError("the file is not valid JSON", _where(path)) from None
    if not isinstance(data, dict):
        raise PlannerError("expected a JSON object", _where(path))
    return data


def _test_pause() -> Callable[[str], None] | None:
    """Return the test-only pause hook of ``receive`` (RINGPLAN_TEST_PAUSE_RECEIVE), or None.

    Hidden and for tests only: set the variable to 'before-commit' or 'after-commit'
    and receive announces 'paused STAGE' on stderr and sleeps there, so a test can
    kill the process at that point.
    """
    stage = os.environ.get("RINGPLAN_TEST_PAUSE_RECEIVE")
    if not stage:
        return None

    def pause(at: str) -> None:
        if at == stage:
            import time

            sys.stderr.write(f"paused {at}\n")
            sys.stderr.flush()
            time.sleep(120)
    return pause


@app.command()
@_command
def receive(
    study_dir: StudyDir,
    round_id: RoundOpt,
    files: Annotated[list[Path], typer.Argument(help="Returned result forms (CSV or XLSX).")],
    lab: Annotated[str | None, typer.Option(
        help="The laboratory that sent the forms; the form must say the same.")] = None,
    check_only: Annotated[bool, typer.Option("--check", help="Only check; record nothing.")] = False,
    after_unseal: Annotated[bool, typer.Option(
        "--after-unseal", help="Accept results that arrive after the key was opened "
        "(flagged in every output; needs --reason).")] = False,
    reason: Annotated[str | None, typer.Option(help="Why results after unsealing are "
                                               "accepted (recorded in the ledger).")] = None,
) -> None:
    """Check returned result forms and record them in the ledger and results/."""
    from planner import codes, returns
    from planner.ledger import Ledger

    with Ledger.open(study_dir, create=False) as ledger:
        study = _round_study(study_dir, round_id, ledger)
        _tidy(study_dir, round_id)
        try:
            receipts = returns.receive(study, study_dir, round_id, files, ledger, lab=lab,
                                       check_only=check_only, after_unseal=after_unseal,
                                       reason=reason, _pause=_test_pause())
        except PlannerError as exc:
            if len(files) < 2 or check_only:
                raise
            # A batch is recorded whole or not at all: say so after the problems.
            for line in str(exc).splitlines():
                _fail(line)
            _fail(f"nothing was recorded: the {len(files)} forms are recorded together or not "
                  "at all; fix the forms named above and receive them again (or receive the "
                  "good ones on their own)")
            raise typer.Exit(2) from None
    for r in receipts:
        counts = f"{r.values} values, {r.failed} without value"
        if r.repeat_of is not None:
            typer.echo(f"{r.lab}: {r.file} is identical to version {r.repeat_of} already "
                       "recorded; nothing changed")
        elif r.version is None:
            typer.echo(f"{r.lab}: {r.file} passes every check ({counts}); nothing recorded "
                       "(--check)")
        else:
            newer = f" (supersedes version {r.supersedes})" if r.supersedes else ""
            typer.echo(f"{r.lab}: recorded version {r.version}{newer} from {r.file}: {counts}; "
                       f"stored as {r.stored}; receipt {r.receipt} (ledger head "
                       f"{r.chain_head})")
        if r.after_unseal:
            typer.echo(f"  AFTER UNSEAL: received after the key was opened ({reason})")
        if r.received_late:
            typer.echo("  late: received after the results were due")
        if r.late_rows:
            typer.echo("  late: tested after the test window: "
                       + ", ".join(codes.format(c) for c in r.late_rows))
        if r.merged:
            typer.echo(f"  merged with the earlier versions: {r.in_force} "
                       f"{'results' if study.shorthand else 'units'} in force")
        if r.version is not None and r.unfilled:
            for measurand, gaps in _by_measurand(r.unfilled).items():
                typer.echo(f"  outstanding: {measurand} on {len(gaps)} codes has neither a value "
                           "nor a remark yet: " + ", ".join(codes.format(c.partition("@")[0])
                                                            for c in gaps[:20])
                           + (" ..." if len(gaps) > 20 else ""))
        elif r.version is not None and r.outstanding:
            typer.echo(f"  outstanding: {len(r.outstanding)} codes have neither a value nor a "
                       "remark yet: " + ", ".join(codes.format(c.partition("@")[0])
                                                 for c in r.outstanding[:20])
                       + (" ..." if len(r.outstanding) > 20 else ""))
        elif r.missing:
            typer.echo(f"  missing: {len(r.missing)} codes have no row: "
                       + ", ".join(codes.format(c) for c in r.missing))


def _by_measurand(unfilled: Any) -> dict[str, list[str]]:
    """Return measurand -> the codes still without its value or a remark."""
    out: dict[str, list[str]] = {}
    for code, measurand in unfilled:
        out.setdefault(measurand, []).append(code)
    return out


@app.command()
@_command
def status(study_dir: StudyDir, round_id: RoundOpt, as_json: JsonOpt = False) -> None:
    """Show per laboratory whether results are in, and whether the key may be opened."""
    from dataclasses import asdict

    from planner import homogeneity
    from planner import plan as planning
    from planner import status as standing
    from planner.ledger import Ledger

    with Ledger.open(study_dir, create=False) as ledger:
        study = _round_study(study_dir, round_id, ledger)
        info = standing.round_status_table(study, study_dir, round_id, ledger,
                                           today=date.today())
        checks = homogeneity.checks_of(ledger, round_id)
        items = homogeneity.state_lines(
            study, ledger, round_id, checks,
            previous=homogeneity.previous_sigma(study_dir, ledger, round_id)) if checks else []
    left = standing.leftovers(planning.round_dir(study_dir, round_id),
                              *_tidy(study_dir, round_id))
    if as_json:
        _print_json({**asdict(info), "leftovers": left, "host_checks": items})
        return
    con = _console()
    con.print(_table(
        f"Round {round_id}: results due {info.results_due}",
        ["lab", "received", "version", "values", "empty", "missing", "late", "days left",
         "flags"],
        [[r["lab"], ("complete" if r["complete"] else "incomplete") if r["received"] else "no",
          f"{r['version']} (merged)" if r["merged"] else r["version"], r["values"], r["failed"],
          r["missing"], "late" if r["late"] else "", r["days_left"],
          " ".join(f for f, on in (("AFTER-UNSEAL", r["after_unseal"]),
                                   (f"spares:{r['spares_issued']}", r["spares_issued"])) if on)]
         for r in info.rows]))
    if any("measurands" in r for r in info.rows):
        con.print("values and empty count results, one per measurand measured on a unit; empty: "
                  "no value (remark given); missing: codes without a value or remark for some "
                  "measurand")
        for r in info.rows:
            gaps = [f"{m} on {n['missing']}" for m, n in r.get("measurands", {}).items()
                    if n["missing"] and r["received"]]
            if gaps:
                con.print(f"{r['lab']}: still without a value or remark: " + ", ".join(gaps)
                          + " codes", markup=False)
    else:
        con.print("empty: rows without a value (remark given); missing: codes with no row yet")
    for line in items:
        con.print(line, soft_wrap=True)
    for line in standing.describe_key(info.key):
        con.print(line, markup=False)
    if info.unsealed:
        con.print("the key has been opened")
    elif info.may_open:
        con.print("the key may be opened: every laboratory has reported; run 'ringplan unseal'")
    else:
        con.print("the key stays sealed: waiting for " + ", ".join(info.waiting_for))
    for line in standing.describe_leftovers(left):
        con.print(line, markup=False)


@app.command()
@_command
def spare(
    study_dir: StudyDir,
    round_id: RoundOpt,
    lab: Annotated[str, typer.Option(help="The laboratory with the damaged or failed unit.")],
    damaged: Annotated[str, typer.Option(help="The code on the damaged or failed unit.")],
    passphrase_file: PassFile = None,
    host_key: Annotated[Path | None, typer.Option(
        "--host-key", help="The host's private key, for a round sealed for trustees.")] = None,
) -> None:
    """Pick the unit the host sends to replace a laboratory's damaged or failed unit."""
    from planner import audit, codes, spares
    from planner import plan as planning
    from planner.ledger import Ledger

    with Ledger.open(study_dir, create=False) as ledger:
        study = _round_study(study_dir, round_id, ledger)
        folder = planning.round_dir(study_dir, round_id)
        asked = host_key is not None or not _sealed_for_trustees(folder)
        passphrase = _passphrase(passphrase_file, confirm=False) if asked else ""
        # checked against the fingerprint the ledger recorded at planning
        key = audit.open_key(folder, ledger, round_id,
                             passphrase=passphrase,
                             host_key=_read_bytes(host_key) if host_key else None)
        swap = spares.issue_spare(study, study_dir, round_id, ledger, lab=lab, damaged=damaged,
                                  key=key)
    sent = codes.format(swap.spare)
    # The first lines are for the coordinator and the host only: the unit and where it
    # comes from would tell the laboratory more than that a replacement is coming.
    typer.echo("for the coordinator and the host only:")
    typer.echo(f"  host {swap.host}: send unit {sent} to laboratory {swap.lab}"
               + (" (a retained unit: the host's spares of this material are all issued)"
                  if swap.source == "retained" else " (a spare)"))
    typer.echo(f"  its label says 'spare' and no laboratory; to print it: ringplan print "
               f"{study_dir} --round {round_id} --codes {sent}")
    typer.echo(f"tell laboratory {swap.lab}: a replacement for unit "
               f"{codes.format(swap.damaged)} is on its way from the host; test it in that "
               f"unit's place (trial {swap.trial}, run {swap.position}) and report its result "
               "under the code on its label")


@app.command()
@_command
def evaluate(study_dir: StudyDir, round_id: RoundOpt, as_json: JsonOpt = False) -> None:
    """Unblind the accepted results and write the round's report, letters and statistics."""
    from planner import evaluate as evaluation
    from planner import stats
    from planner.ledger import Ledger

    with Ledger.open(study_dir, create=False) as ledger:
        study = _round_study(study_dir, round_id, ledger)
        _tidy(study_dir, round_id)
        folder = evaluation.evaluate_round(study, study_dir, round_id, ledger,
                                           workers=min(2, os.cpu_count() or 1))
    result = json.loads((folder / evaluation.STATISTICS_NAME).read_text(encoding="utf-8"))
    if as_json:
        _print_json(result)
        return
    typer.echo(stats.summary_text(result), nl=False)
    blocks = result["measurands"]
    for mid, block in blocks.items():
        which = "" if list(blocks) == [stats.SHORTHAND_ID] else f" ({mid})"
        for material, check in ((block.get("drift") or {}).get("materials") or {}).items():
            typer.echo(f"drift of artefact {material}{which} between the host's stops: "
                       f"{check['verdict']}")
    typer.echo(f"\nwrote {folder}: {evaluation.REPORT_NAME}, {evaluation.STATISTICS_NAME}, "
               f"{evaluation.RESULTS_NAME} and {len(study.laboratories)} letters")


trustee_app = typer.Typer(help="Trustees of a round's key: key pairs and releases.",
                           no_args_is_help=True)
app.add_typer(trustee_app, name="trustee")


@trustee_app.command("new")
@_command
def trustee_new(
    trustee_id: Annotated[str, typer.Argument(metavar="ID", help="The trustee's id (or the "
                                              "host laboratory's), as study.yaml names it.")],
    out: Annotated[Path, typer.Option(help="Where to write the private key (a new file).")],
    passphrase_file: PassFile = None,
) -> None:
    """Make a key pair: the private key to FILE (with a passphrase), the public key printed."""
    from planner import spec
    from planner.sealing import trustees

    if not spec.slug_ok(trustee_id):
        raise PlannerError(f"{trustee_id!r} is not a usable id; use 1-32 letters, digits, '-', "
                           "'_' or '.'")
    if out.exists() or out.is_symlink():
        raise PlannerError(f"{out} exists already; a private key is never overwritten, choose "
                           "another file")
    private, public = trustees.new_key_pair(_passphrase(passphrase_file, confirm=True))
    _write_private_file(out, private)
    typer.echo(f"wrote {out}: the private key of {trustee_id}; keep it, and its passphrase, "
               "where only you can reach them: without both, your part of the key is lost")
    typer.echo(f"public key of {trustee_id} for study.yaml:")
    typer.echo(public)


@trustee_app.command("release")
@_command
def trustee_release(
    sealed: Annotated[Path, typer.Argument(metavar="KEY_SEALED",
                                           help="The round's key.sealed.")],
    key: Annotated[Path, typer.Option(help="Your private key file.")],
    out: Annotated[Path, typer.Option(help="Where to write your release (a new file).")],
    passphrase_file: PassFile = None,
) -> None:
    """Release your part of one round's key, to give to the coordinator for unseal."""
    from planner.sealing import trustees

    if out.exists() or out.is_symlink():
        raise PlannerError(f"{out} exists already; choose another file")
    data = trustees.release(_read_bytes(sealed), _read_bytes(key),
                            _passphrase(passphrase_file, confirm=False))
    _write_private_file(out, data)
    info = json.loads(data)
    context = info.get("context", {})
    typer.echo(f"wrote {out}: the release of trustee {info.get('id')} for study "
               f"{context.get('study')} round {context.get('round')} only")


def _write_private_file(path: Path, data: bytes) -> None:
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(fd, "wb") as f:
            f.write(data)
    except OSError as exc:
        raise PlannerError(f"cannot write the file ({(exc.strerror or 'error').lower()})",
                           _where(path)) from None


@app.command()
@_command
def chain(
    study_dir: StudyDir,
    link: Annotated[int | None, typer.Option(
        help="Show this link of the chain (the number on a receipt or letter).")] = None,
) -> None:
    """Check the ledger's chain and show its head, to compare with a receipt or a letter."""
    from planner.ledger import Ledger

    with Ledger.open(study_dir, create=False) as ledger:
        heads = ledger.heads()
    if link is not None:
        if not 1 <= link <= len(heads):
            raise PlannerError(f"--link {link} does not exist; the chain has links 1 to "
                               f"{len(heads)}")
        h = heads[link - 1]
        typer.echo(f"link {h.seq}, recorded {h.at}: {h.head}")
        return
    if not heads:
        typer.echo("the ledger's chain is empty: nothing has been recorded yet")
        return
    h = heads[-1]
    typer.echo(f"ledger intact: schema, guards and all {len(heads)} links of the chain check")
    typer.echo(f"head: link {h.seq}, recorded {h.at}: {h.head}")


@app.command()
@_command
def analyze(
    file: Annotated[Path, typer.Argument(help="A CSV with the columns material, lab, trial, "
                                         "value (optional: uncertainty, k = 2; measurand, "
                                         "for several measurands).")],
    tolerance: Annotated[float | None, typer.Option(
        help="Tolerance width, for gauge R&R as % of tolerance.")] = None,
    sigma_pt: Annotated[float | None, typer.Option(
        "--sigma-pt", help="Standard deviation for proficiency assessment, fixed (default: "
        "the robust SD of the results, with bands from 8 laboratories on).")] = None,
    sigma_pt_percent: Annotated[float | None, typer.Option(
        "--sigma-pt-percent", help="sigma_pt as this percentage of the assigned value.")] = None,
    reference_lab: Annotated[str | None, typer.Option(
        "--reference-lab", help="The laboratory whose mean is the assigned value (default: "
        "the consensus of all, with bands from 5 laboratories on).")] = None,
    measurand: Annotated[str | None, typer.Option(
        help="Analyze only this measurand of a file with a measurand column.")] = None,
    as_json: JsonOpt = False,
) -> None:
    """Run the round statistics on any long-format CSV, without a study.

    With a measurand column, each measurand is analyzed on its own, one section each.
    """
    import math

    from planner import stats
    from planner.errors import DataError, Where
    from planner.stats import iso13528

    for name, v in (("--tolerance", tolerance), ("--sigma-pt", sigma_pt),
                    ("--sigma-pt-percent", sigma_pt_percent)):
        if v is not None and not (math.isfinite(v) and v > 0):
            raise PlannerError(f"{name} {v!r} must be a number above 0")
    if sigma_pt is not None and sigma_pt_percent is not None:
        raise PlannerError("give --sigma-pt or --sigma-pt-percent, not both")
    if sigma_pt_percent is not None and sigma_pt_percent > 100:
        raise PlannerError(f"--sigma-pt-percent {sigma_pt_percent!r} must be at most 100")
    policy = (iso13528.SigmaPt("percent", percent=sigma_pt_percent)
              if sigma_pt_percent is not None else sigma_pt)
    rows = stats.read_long_csv(file)
    if reference_lab is not None:
        stats.check_reference(rows, reference_lab)
    options: dict[str, Any] = {
        "tolerance": tolerance, "sigma_pt": policy, "reference_lab": reference_lab,
        "assigned": "reference" if reference_lab is not None else "consensus"}
    if rows[0].measurand is None:
        if measurand is not None:
            raise DataError(f"--measurand {measurand!r} needs a measurand column; the file "
                            "has none", Where(str(file)))
        result = stats.evaluate_table(rows, **options)
    else:
        groups = stats.by_measurand(rows)
        if measurand is not None:
            if measurand not in groups:
                raise DataError(f"no result of measurand {measurand!r}; the file has "
                                f"{', '.join(groups)}", Where(str(file), field="measurand"))
            groups = {measurand: groups[measurand]}
        for name, value in (("--sigma-pt", sigma_pt), ("--tolerance", tolerance)):
            if value is not None and len(groups) > 1:
                raise DataError(f"{name} is one value in one unit, but the file has "
                                f"{len(groups)} measurands ({', '.join(groups)}); give "
                                "--measurand to analyze one of them"
                                + (", or use --sigma-pt-percent" if name == "--sigma-pt"
                                   else ""), Where(str(file)))
        result = {"measurands": {mid: stats.evaluate_table(group, **options)
                                 for mid, group in groups.items()}}
    if as_json:
        _print_json(result)
    else:
        typer.echo(stats.summary_text(result), nl=False)


@app.command()
@_command
def demo(out: Annotated[Path | None, typer.Argument(
        help="A new or empty folder (default: ./ringplan-demo).")] = None) -> None:
    """Build the example study end to end with simulated results, and say what to open."""
    from planner import demo as demonstration

    target = out if out is not None else Path("ringplan-demo")
    demonstration.check_target(target)
    typer.echo(f"building the example study in {target} (a minute at most) ...")
    made = demonstration.build_demo(target, passphrase=demonstration.PASSPHRASE,
                                    workers=min(2, os.cpu_count() or 1))
    typer.echo(f"round {made['round']} of the invented Norrvik Polymers study: host "
               f"{made['host']}, {len(made['letters'])} laboratories, results simulated with "
               f"{made['biased_lab']} reading about {demonstration.BIAS:.0%} high; one spare "
               "used, one form returned as a spreadsheet")
    if made.get("held"):
        typer.echo(f"the host's homogeneity check failed for {demonstration.INHOMOGENEOUS[0]} "
                   "and held the packing lists; the coordinator waived it with a reason (see "
                   "the report's homogeneity section, or 'ringplan homogeneity "
                   f"{target} --round {made['round']}')")
    typer.echo(f"key passphrase (for this demo only): {made['passphrase']}")
    typer.echo("open first:")
    for label, path in (("the round report", made["report"]),
                        (f"the letter to {made['biased_lab']}", made["letter"]),
                        ("a laboratory's run sheet", made["run_sheet"]),
                        ("every statistic", made["statistics"])):
        typer.echo(f"  {label:26} {path}")


@app.command("homogeneity")
@_command
def homogeneity_command(
    study_dir: StudyDir,
    round_id: RoundOpt,
    form: Annotated[Path | None, typer.Argument(
        metavar="FILE", help="The host's filled homogeneity form (CSV or XLSX).")] = None,
    stability: Annotated[Path | None, typer.Option(
        "--stability", help="The host's filled stability form (its retained units, tested "
        "after the round).")] = None,
    waive: Annotated[str | None, typer.Option(
        "--waive", help="Let the packing lists be printed without a passing homogeneity "
        "check; the reason, a sentence, is printed in the report.")] = None,
    as_json: JsonOpt = False,
) -> None:
    """Record the host's homogeneity or stability check and show the verdicts."""
    from planner import files, homogeneity
    from planner import plan as planning
    from planner.ledger import Ledger

    folder = planning.round_dir(study_dir, round_id)
    with Ledger.open(study_dir, create=False) as ledger:
        study = _round_study(study_dir, round_id, ledger)
        checks = homogeneity.checks_of(ledger, round_id)
        if checks is None:
            raise PlannerError(f"round {round_id!r} has no homogeneity or retained units "
                               "(design.homogeneity_units and retained_by_host were 0 when it "
                               "was planned); there is nothing to check")
        read = []
        for kind, path in (("homogeneity", form), ("stability", stability)):
            if path is None:
                continue
            if not checks.get(kind):
                raise PlannerError(f"round {round_id!r} has no {kind} units; there is no "
                                   f"{kind} form to record", _where(path))
            read.append((kind, path, homogeneity.read_values(study, round_id, kind,
                                                             checks[kind], path)))
        # Every copy on disk before anything is recorded: a disk that refuses one leaves the
        # ledger as it was (a copy is named by its SHA-256, so one written twice is the same).
        stored = []
        for kind, path, data in read:
            copy = folder / "host" / "checks" / f"{kind}-{data['sha256'][:12]}{path.suffix}"
            files.write_bytes(copy, _read_bytes(path), root=study_dir, private=True)
            stored.append(str(copy.relative_to(folder)))
        if waive is not None:
            homogeneity.waive(ledger, round_id, waive)
        for (kind, _, data), copy_name in zip(read, stored, strict=True):
            homogeneity.record(ledger, round_id, kind, {**data, "stored": copy_name})
        previous = homogeneity.previous_sigma(study_dir, ledger, round_id)
        found = homogeneity.assess(study, checks, ledger, round_id, previous=previous)
        gate = homogeneity.shipping_gate(study, ledger, round_id, checks, previous=previous,
                                         found=found)
    found["packing_lists"] = "held: " + gate if gate else "may be printed"
    if as_json:
        typer.echo(homogeneity.to_json(found), nl=False)
        return
    for kind, path, _ in read:
        typer.echo(f"recorded the {kind} form {path.name}")
    if waive is not None:
        typer.echo("recorded the waiver of the homogeneity check; every report states it")
    _print_checks(found)


_SHORT_VERDICT = {"sufficiently homogeneous": "passes",
                  "sufficiently homogeneous by the extended criterion": "passes (extended)",
                  "not sufficiently homogeneous": "FAILS", "waits": "waits",
                  "cannot be computed": "cannot be computed"}


def _print_checks(found: dict[str, Any]) -> None:
    """Print a homogeneity assessment: a table per measurand, one row per material, and
    notes below it (where sigma_pt came from, F1 and F2, stability)."""
    con = _console()
    if not found["recorded"]:
        con.print("homogeneity check: not recorded yet")
    for mid, per in found["measurands"].items():
        rows, notes = [], []
        factors: dict[int, tuple[float, float]] = {}
        sources: dict[str, list[str]] = {}
        for material, e in per.items():
            if "g" not in e:
                rows.append([material, "", "", "", "", "", "", "", "", e["verdict"]])
                notes.append(f"{material}: {e['why']}")
                continue
            if e["F1"] is not None:
                factors[e["g"]] = (e["F1"], e["F2"])
            rows.append([
                material, e["g"], f"{e['mean']:.5g}", f"{e['s_x']:.3g}", f"{e['s_w']:.3g}",
                f"{e['s_s']:.3g}" + ("*" if e["s_s_forced_zero"] else ""),
                "" if e["sigma_pt"] is None else f"{e['sigma_pt']:.3g}",
                "" if e["criterion"] is None else f"{e['criterion']:.3g}",
                "" if e["c"] is None else f"{e['c'] ** 0.5:.3g}",
                _SHORT_VERDICT.get(e["verdict"], e["verdict"])])
            sources.setdefault(e["sigma_pt_source"], []).append(material)
            if e.get("why"):
                notes.append(f"{material}: {e['why']}")
            if e["left_out"]:
                notes.append(f"{material}: {e['left_out']} unit(s) without both values left out")
            st = e.get("stability")
            if st:
                notes.append(
                    f"{material}: stability: mean after {st['mean_after']:.5g} against "
                    f"{st['mean_before']:.5g} (difference {st['difference']:+.3g}"
                    + (f"; limit {st['criterion']:.3g}" if st["criterion"] is not None else "")
                    + (f", widened {st['criterion_widened']:.3g}"
                       if st["criterion_widened"] is not None else "")
                    + f"): {st['verdict']}")
        con.print(_table(f"homogeneity of {mid}", [
            "material", "g", "mean", "s_x", "s_w", "s_s", "sigma_pt", "limit", "ext. limit",
            "verdict"], rows))
        con.print("  limit: s_s <= 0.3 sigma_pt; ext. limit: s_s <= sqrt(F1 (0.3 sigma_pt)² "
                  "+ F2 s_w²), ISO 13528 B.2; "
                  + "; ".join(f"g = {g}: F1 = {f1:.3f}, F2 = {f2:.3f}"
                              for g, (f1, f2) in sorted(factors.items())), soft_wrap=True)
        if any(e.get("s_s_forced_zero") for e in per.values()):
            con.print("  * s_x² < s_w²/2, so s_s is set to 0: common by chance in a small "
                      "check, and no proof of a perfect batch", soft_wrap=True)
        for source, materials in sources.items():
            con.print(f"  sigma_pt from {source}: {', '.join(materials)}", soft_wrap=True)
        for note in notes:
            con.print(f"  {note}", soft_wrap=True)
    for old in found.get("replaced") or ():
        con.print(f"replaced: the form {old['file']} recorded on {old['at']}"
                  + (f" (did not pass: {'; '.join(old['not_passing'])})"
                     if old["not_passing"] else ""), soft_wrap=True)
    if found["waiver"]:
        con.print(f"waived by the coordinator on {found['waiver']['at']}: "
                  f"{found['waiver']['reason']}", soft_wrap=True)
    con.print(f"packing lists: {found['packing_lists']}", soft_wrap=True)


@app.command("print")
@_command
def print_documents(
    study_dir: StudyDir,
    round_id: Annotated[str | None, typer.Option(
        "--round", help="The round id, e.g. 2027-1 (not needed with --calibration).",
        callback=_round_id)] = None,
    only: Annotated[str | None, typer.Option(
        help="Print one kind: labels, prep, packing, runsheets or forms.")] = None,
    lab: Annotated[str | None, typer.Option(help="Print for one laboratory only.")] = None,
    codes_: Annotated[str | None, typer.Option(
        "--codes", help="Reprint the labels of these codes, comma-separated.")] = None,
    start_at: Annotated[int, typer.Option(
        "--start-at", help="Begin at label N of a partly used sheet (1 = top left).")] = 1,
    sheet: Annotated[str | None, typer.Option(
        help="Label sheet geometry (default: the study's label_sheet).")] = None,
    offset_x: Annotated[float, typer.Option(
        "--offset-x", help="Shift the labels right by this many mm (negative: left).")] = 0.0,
    offset_y: Annotated[float, typer.Option(
        "--offset-y", help="Shift the labels down by this many mm (negative: up).")] = 0.0,
    calibration: Annotated[bool, typer.Option(
        help="Print an alignment page with the cell outlines of the sheet instead.")] = False,
    passphrase_file: PassFile = None,
    host_key: Annotated[Path | None, typer.Option(
        "--host-key", help="The host's private key, for a round sealed for trustees (the "
        "host's own copy of the key; --passphrase-file then gives its passphrase).")] = None,
) -> None:
    """Print the labels, prep sheet, packing lists, run sheets and result forms of a round."""
    from planner import audit, files, intake, render, seal
    from planner import plan as planning
    from planner.ledger import Ledger

    for name, value in (("--offset-x", offset_x), ("--offset-y", offset_y)):
        if not (math.isfinite(value) and abs(value) <= _MAX_OFFSET_MM):
            raise PlannerError(f"{name} {value!r} is not a usable shift; give millimetres "
                               f"between -{_MAX_OFFSET_MM:g} and {_MAX_OFFSET_MM:g}")
    offset = (offset_x, offset_y)
    if calibration:
        name = sheet or _load(study_dir).study.label_sheet
        from planner.render import _sheets

        geometry = _sheets.load(name, [study_dir / "sheets"], field="--sheet")
        path = render.print_calibration(study_dir / f"calibration-{name}.pdf", geometry, offset)
        typer.echo(f"wrote {path}; print it at 100 % on plain paper and lay it on a sheet")
        return
    if round_id is None:
        raise PlannerError("--round is required (or use --calibration)")
    folder = planning.round_dir(study_dir, round_id)
    with Ledger.open(study_dir, create=False) as ledger:
        study = _round_study(study_dir, round_id, ledger)
    chosen = [c for c in (codes_ or "").split(",") if c.strip()] or None
    # mistakes in the options are named before the passphrase is asked
    manifest = planning.read_manifest(folder)
    wanted, geometry = render.check_options(study, study_dir, manifest, only=only, lab=lab,
                                            codes=chosen, sheet=sheet)
    held = _shipping_gate(study, study_dir, round_id) if "packing" in wanted else None
    if held and only == "packing":
        raise PlannerError(f"the packing lists are held: {held}")
    if held:
        wanted.discard("packing")
    _tidy(study_dir, round_id)
    # a link, or a file where a folder belongs, is named before the key is asked for or its
    # use recorded (planner.files)
    files.check_paths([folder / name for name in render.planned_documents(
        study, manifest, wanted=wanted, labels=geometry is not None, lab=lab, codes=chosen)],
        root=study_dir)
    # the key must match the fingerprint recorded in the ledger, so that no document is
    # printed with a fingerprint someone wrote into the manifest afterwards
    with Ledger.open(study_dir, create=False) as ledger:
        key: dict[str, Any] | None = None
        if not render.needs_key(wanted, labels=geometry is not None, lab=lab):
            # the participants' documents come from the manifest and the forms alone; the
            # fingerprint they print must be the one the ledger recorded
            audit.check_published_fingerprint(folder, ledger, round_id)
        elif (folder / seal.KEY_NAME).is_file():
            key = audit.read_key(folder, ledger, round_id)
        else:
            # a round sealed for trustees says so before any passphrase is asked
            asked = host_key is not None or not _sealed_for_trustees(folder)
            key = audit.open_key(folder, ledger, round_id,
                                 passphrase=_passphrase(passphrase_file, confirm=False)
                                 if asked else "",
                                 host_key=_read_bytes(host_key) if host_key else None)
        # On record before any document is written: a print stopped half-way has still
        # used the key, and status must say so.
        with ledger.transaction():
            ledger.record_event(round_id, "printed", {
                "documents": render.planned_documents(study, manifest, wanted=wanted,
                                                      labels=geometry is not None, lab=lab,
                                                      codes=chosen),
                "only": only, "lab": lab, "codes": chosen, "start_at": start_at,
                "sheet": sheet or study.study.label_sheet, "offset_mm": list(offset),
                "key_used": key is not None})
        issued = intake.issued_spares(ledger, round_id)  # a retained unit sent: a spare label
    paths = render.print_round(study, study_dir, round_id, key=key, only=only, lab=lab,
                               codes=chosen, start_at=start_at, sheet=sheet, offset_mm=offset,
                               workers=min(2, os.cpu_count() or 1), issued=set(issued),
                               hold={"packing"} if held else ())
    for path in paths:
        typer.echo(f"wrote {path}")
    if held:
        typer.echo(f"held back: the packing lists: {held}; print them with --only packing "
                   "once the check passes or is waived")


def _shipping_gate(study: Any, study_dir: Path, round_id: str) -> str | None:
    """Return why the participants' packing lists may not be printed yet, or None."""
    from planner import homogeneity
    from planner.ledger import Ledger

    with Ledger.open(study_dir, create=False) as ledger:
        checks = homogeneity.checks_of(ledger, round_id)
        if not checks:
            return None
        return homogeneity.shipping_gate(
            study, ledger, round_id, checks,
            previous=homogeneity.previous_sigma(study_dir, ledger, round_id))


def _is(exc: BaseException, name: str) -> bool:
    """Return whether ``exc`` is a click exception of class ``name`` (click may come with
    typer or on its own, so the class is matched by name)."""
    return any(k.__name__ == name for k in type(exc).__mro__)


def main() -> None:
    """Entry point of the ``ringplan`` console script: a usage error is one line, exit 2."""
    try:
        code = app(standalone_mode=False, prog_name="ringplan")
    except Exception as exc:
        if _is(exc, "Abort"):
            typer.echo("error: stopped", err=True)
            sys.exit(1)
        if not _is(exc, "ClickException"):
            raise
        if _is(exc, "NoArgsIsHelpError"):  # plain 'ringplan': the help, as --help shows it
            typer.echo(exc.format_message())  # type: ignore[attr-defined]
            sys.exit(0)
        message = " ".join(str(exc.format_message()).split()).rstrip(".")  # type: ignore[attr-defined]
        ctx = getattr(exc, "ctx", None)
        hint = (f"; see '{ctx.command_path} --help'" if _is(exc, "UsageError") and ctx
                else "")
        typer.echo(f"error: {message}{hint}", err=True)
        sys.exit(getattr(exc, "exit_code", 2))
    sys.exit(code if isinstance(code, int) else 0)
