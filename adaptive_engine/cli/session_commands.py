"""``adaptive-engine session ...``: run live adaptive test sessions against a session store.

Every command prints its result for a person on stdout, or as JSON with ``--json`` (``try``
is interactive), and exits with code 2 and a ``LOCATION: problem`` message on any error,
writing nothing.
"""

from __future__ import annotations

import sys

import click

from ..errors import AdaptiveEngineError, Problem
from ._common import EXIT_INPUT_ERROR, emit, json_option, main, report_errors
from ._table import number, pairs, plural, table

_DB = click.option("--db", "db_path", required=True, metavar="STORE",
                   help="Session store: a SQLite file (created owner-only, mode 0600) or a postgresql:// URL.")

#: The library names a bad value by its parameter; the command line by its flag or argument.
SESSION_FLAGS = {"examinee": "--examinee", "seed": "--seed", "prior_mean": "--prior-mean",
                 "prior_sd": "--prior-sd", "prior_covariance": "--prior-covariance",
                 "session_id": "SESSION_ID", "item_id": "ITEM_ID",
                 "status": "--status", "release": "--release"}

#: A negative RESPONSE (-1) is a value to refuse for its range, not an unknown option.
_NEGATIVE_VALUES_ARE_ARGUMENTS = {"ignore_unknown_options": True}


class AsciiFloat(click.ParamType):
    """A number written with ASCII characters (float() alone also reads '١' or '１')."""

    name = "float"

    def convert(self, value, param, ctx):
        if isinstance(value, float):
            return value
        text = str(value).strip()
        shown = text[:40].encode("ascii", "backslashreplace").decode("ascii")
        if not text.isascii():
            self.fail(f"'{shown}' is not a number written in ASCII digits", param, ctx)
        try:
            return float(text)
        except ValueError:
            self.fail(f"'{shown}' is not a number", param, ctx)


ASCII_FLOAT = AsciiFloat()


class AsciiNumbers(click.ParamType):
    """One number, or numbers separated by ',' (a vector), or rows of them separated by ';'
    (a matrix), in ASCII: a float, a list, or a list of lists."""

    name = "NUMBERS"

    def convert(self, value, param, ctx):
        if isinstance(value, (float, list)):
            return value
        text = str(value).strip()
        rows = [[ASCII_FLOAT.convert(x, param, ctx) for x in row.split(",")] for row in text.split(";")]
        if ";" in text:
            return rows
        return rows[0][0] if len(rows[0]) == 1 else rows[0]


ASCII_NUMBERS = AsciiNumbers()


@main.group()
def session():
    """Run live adaptive test sessions stored in a session store (SQLite or PostgreSQL)."""


@session.command("start")
@_DB
@click.option("--release", default=None, metavar="NAME[@VERSION]",
              help="A release published in the store (its latest active version, or a pinned one); "
                   "instead of --design and --bank.")
@click.option("--design", "design_file", default=None, type=click.Path(dir_okay=False),
              help="Test design file (TOML).")
@click.option("--bank", "bank_file", default=None, type=click.Path(dir_okay=False),
              help="Item bank file (.csv, .json or .db).")
@click.option("--examinee", default=None, help="The examinee's id in your app (stored, not interpreted).")
@click.option("--seed", type=click.IntRange(0, (1 << 63) - 1), default=None,
              help="Seed of the test's random decisions (default: a fresh one, stored).")
@click.option("--prior-mean", type=ASCII_NUMBERS, default=None,
              help="Examinee-specific prior mean of theta (on the design's ability grid); for an ability "
                   "vector one number per dimension, separated by ',' (\"0.5,-0.2\").")
@click.option("--prior-sd", type=ASCII_FLOAT, default=None,
              help="Examinee-specific prior SD of theta (one grid step .. the grid's width).")
@click.option("--prior-covariance", type=ASCII_NUMBERS, default=None, metavar="MATRIX",
              help="For an ability vector: the examinee-specific prior covariance, rows separated by ';' and "
                   "entries by ',' (\"1,0.6;0.6,1\"); default the design's.")
@click.option("--ids", "ids_only", is_flag=True, default=False,
              help="Print only the session id and the first item's id, separated by a space "
                   "(for shell scripts: read SID ITEM <<< \"$(adaptive-engine session start ... --ids)\").")
@json_option
@report_errors(flags=SESSION_FLAGS)
def start(db_path, release, design_file, bank_file, examinee, seed, prior_mean, prior_sd, prior_covariance, ids_only,
          as_json):
    """Start a session of a release, or of a design on a bank; print its id and first item.

    With --design and --bank the store is created if missing; with --release it must exist.
    --json output: {"session_id": ..., "item_id": ..., "item": {...}, "done": false, ...}.
    """
    from ..bank.item_bank import load_bank
    from ..design.bank_fit import design_warnings
    from ..design.toml_file import read_design
    from ..live.session import commit_start, prepare_start
    from ..live.store import existing_table_folder, open_store

    if release is not None:
        if design_file is not None or bank_file is not None:
            raise AdaptiveEngineError("give either --release or --design and --bank, not both", location="--release")
        from ..live.releases import start_release_session

        with open_store(db_path, create=False) as store:
            reply = start_release_session(store, release, examinee=examinee, seed=seed,
                                          prior_mean=prior_mean, prior_sd=prior_sd,
                                          prior_covariance=prior_covariance)
        _print_start(reply, as_json, ids_only)
        return
    missing = [flag for flag, value in (("--design", design_file), ("--bank", bank_file)) if value is None]
    if missing:
        raise AdaptiveEngineError([Problem(flag, "required unless --release is given") for flag in missing])

    design = read_design(design_file)
    bank = load_bank(bank_file)
    for w in design_warnings(design, bank):
        click.echo(f"warning: {w.location}: {w.message}", err=True)
    # every check of the request runs before the store is opened, so a refused start
    # creates no file -- and never deletes one: another process may be using a store
    # that did not exist a moment ago
    # the store's prepared tables are used (and left) only when the store exists already
    prepared = prepare_start(design, bank, examinee=examinee, seed=seed, prior_mean=prior_mean,
                             prior_sd=prior_sd, prior_covariance=prior_covariance,
                             table_folder=existing_table_folder(db_path))
    with open_store(db_path) as store:
        reply = commit_start(store, prepared)
    _print_start(reply, as_json, ids_only)


def _print_start(reply: dict, as_json: bool, ids_only: bool) -> None:
    if ids_only and not as_json:
        click.echo(f"{reply['session_id']} {reply['item_id'] or ''}".rstrip())
        return
    emit(reply, as_json, lambda r: f"session {r['session_id']} started\n" + reply_text(r))


def item_line(item: dict) -> str:
    """``ITEM [area] label (answer 0..K-1)``: the item a session waits for."""
    text = f"{item['item_id']}  [{item['area']}]"
    if item.get("label"):
        text += f"  {item['label']}"
    return text + f"  (answer 0..{item['n_categories'] - 1})"


def _fixed(value, decimals: int = 2) -> str:
    """A number to ``decimals`` places; an ability vector as ``(x, y)``."""
    if isinstance(value, (list, tuple)):
        return "(" + ", ".join(_fixed(v, decimals) for v in value) + ")"
    return "-" if value is None else f"{value:.{decimals}f}"


def result_lines(result: dict) -> list[str]:
    """A final report in a few lines, like the demo's summary."""
    scaled = ""
    if result.get("scaled_score") is not None:
        scaled = f", scaled score {result['scaled_score']}"
    interval = result.get("interval") or [None, None]
    lines = [f"stopped: {str(result.get('stop_reason')).replace('_', ' ')}; theta {_fixed(result['theta'])} "
             f"(SE {_fixed(result['se'])}){scaled}",
             f"{round(100 * (result.get('confidence') or 0))}% interval {_fixed(interval[0])} .. "
             f"{_fixed(interval[1])}; {result['items']['scored']} items scored"
             + (f", {result['items']['pretest']} pretest" if result["items"].get("pretest") else "")
             + f"; estimate by {str(result.get('method', '')).upper()} ({result.get('estimate_status')})"]
    for c in result.get("classifications") or []:
        lines.append(f"{c['cut']}: {c['label']} (cut at theta {_fixed(c['cut_theta'])}, "
                     f"decided by {str(c['basis']).replace('_', ' ')})")
    fit = result.get("person_fit") or {}
    # lz* for one ability, lz at the final ability vector
    name, value = ("lz*", fit.get("lz_star")) if "lz_star" in fit else ("lz", fit.get("lz"))
    if value is not None:
        lines.append(f"person fit {name} {_fixed(value)}"
                     + (" -- flagged: the answers fit the model poorly" if fit.get("flagged") else " (not flagged)"))
    return lines


def reply_text(reply: dict) -> str:
    """A start or answer reply for a person: the next item and the estimate, or the result."""
    if reply.get("done"):
        return "\n".join(["finished after " + f"{reply['items_given']} items", *result_lines(reply["result"])])
    lines = [f"next item: {item_line(reply['item'])}" if reply.get("item") else f"next item: {reply['item_id']}",
             f"theta {_fixed(reply['theta'])} (SE {_fixed(reply['se'])}) "
             f"after {plural(reply['items_given'], 'item')}"]
    return "\n".join(lines)


@session.command("answer", context_settings=_NEGATIVE_VALUES_ARE_ARGUMENTS)
@click.argument("session_id")
@click.argument("item_id")
@click.argument("response")
@_DB
@click.option("--elapsed", type=ASCII_FLOAT, default=None, help="Seconds the examinee has spent so far.")
@json_option
@report_errors(flags=SESSION_FLAGS)
def answer(session_id, item_id, response, db_path, elapsed, as_json):
    """Record RESPONSE (a category 0..K-1, ASCII digits) to ITEM_ID, the pending item of SESSION_ID.

    Prints the next item and the estimate, or the result once done.  --json output:
    {"item_id": next item or null, "theta": ..., "se": ..., "done": ..., "result": {...}
    once done}.  Sending the same answer again prints the same reply.
    """
    from ..live.session import submit_answer
    from ..live.store import open_store

    with open_store(db_path, create=False) as store:
        reply = submit_answer(store, session_id, item_id, response, elapsed=elapsed)
    emit(reply, as_json, reply_text)


@session.command("show", context_settings=_NEGATIVE_VALUES_ARE_ARGUMENTS)
@click.argument("session_id")
@_DB
@click.option("--with-seed", is_flag=True, default=False,
              help="Also print the session's seed (seed and bank predict the test's random choices).")
@json_option
@report_errors(flags=SESSION_FLAGS)
def show(session_id, db_path, with_seed, as_json):
    """Print SESSION_ID: status, the answers with the estimate after each, the result."""
    from ..live.session import show_session
    from ..live.store import open_store

    with open_store(db_path, create=False) as store:
        shown = show_session(store, session_id, include_seed=with_seed)
    emit(shown, as_json, _show_text)


def _show_text(s: dict) -> str:
    head = [(k.replace("_", " "), s.get(k)) for k in ("session_id", "examinee", "status", "release", "created_at",
                                                       "updated_at", "decision_rules_version", "seed")
            if k in s and (k != "release" or s.get(k))]
    lines = [pairs(head)]
    prior = s.get("prior")
    if prior is not None:  # the prior the session started from
        def vector(values):
            return "[" + ", ".join(number(x, 3) for x in values) + "]"

        if "sd" in prior:
            lines.append(f"prior: mean {number(prior['mean'], 3)}, SD {number(prior['sd'], 3)}")
        else:
            lines.append(f"prior: mean {vector(prior['mean'])}, covariance "
                         f"[{', '.join(vector(r) for r in prior['covariance'])}]")
    given = s.get("administered") or []
    if given:
        lines.append(f"answers ({len(given)}):")
        rows = [{"#": i, **{k: v for k, v in row.items() if k != "elapsed" or any(r.get("elapsed") is not None
                                                                                  for r in given)}}
                for i, row in enumerate(given, start=1)]
        lines.append(table(rows, indent="  "))
    else:
        lines.append("answers: none yet")
    if s.get("pending_item"):
        lines.append(f"waiting for {s['pending_item']}; theta {number(s.get('theta'), 2)} "
                     f"(SE {number(s.get('se'), 2)})")
    if s.get("result"):
        lines.extend(result_lines(s["result"]))
    return "\n".join(lines)


@session.command("list")
@_DB
@click.option("--status", type=click.Choice(["active", "finished"]), default=None,
              help="Only sessions with this status.")
@click.option("--release", default=None, metavar="NAME[@VERSION]", help="Only the sessions of this release.")
@json_option
@report_errors(flags=SESSION_FLAGS)
def list_(db_path, status, release, as_json):
    """List the sessions of the store (oldest first) as a table (--json: a JSON array)."""
    from ..live.session import list_sessions
    from ..live.store import open_store

    with open_store(db_path, create=False) as store:
        sessions = list_sessions(store, status=status, release=release)
    emit(sessions, as_json, _list_text)


def _list_text(sessions: list) -> str:
    if not sessions:
        return "no sessions"
    columns = ["session_id", "examinee", "status", "release", "items_given", "pending_item", "theta", "se",
               "updated_at"]
    if not any(row.get("release") for row in sessions):
        columns.remove("release")
    return f"{plural(len(sessions), 'session')}:\n" + table(sessions, columns)


@session.command("try")
@click.option("--design", "design_file", required=True, type=click.Path(dir_okay=False),
              help="Test design file (TOML).")
@click.option("--bank", "bank_file", required=True, type=click.Path(dir_okay=False),
              help="Item bank file (.csv, .json or .db).")
@click.option("--seed", type=click.IntRange(0, (1 << 63) - 1), default=None,
              help="Seed of the test's random decisions.")
@click.option("--show-estimate", is_flag=True, default=False,
              help="Show the running ability estimate and its SE before each item.")
@click.option("--json", "as_json", is_flag=True, default=False,
              help="End with the full result as JSON instead of the summary.")
@report_errors(flags=SESSION_FLAGS)
def try_(design_file, bank_file, seed, show_estimate, as_json):
    """Take the test yourself in the terminal (nothing is stored); ends with a summary of the result.

    Each item shows its id, content area and label; type the category (0..K-1).  A bank
    whose items carry category labels shows what each category means.  Pretest items are
    marked only when the design says examinees may know ([reporting]
    announce_pretest_items = true).
    """
    from ..bank.item_bank import load_bank
    from ..design.toml_file import read_design
    from ..live.session import try_session

    design = read_design(design_file)
    bank = load_bank(bank_file)
    announce = bool(design.reporting.announce_pretest_items)

    def ask(item, position):
        row = bank.index_of[item["item_id"]]
        mark = "  (pretest item: not scored)" if announce and bank.status[row] == "pretest" else ""
        click.echo(f"\n#{position}  {item['item_id']}  [{item['area']}]{mark}")
        if item["label"]:
            click.echo(f"    {item['label']}")
        top = item["n_categories"] - 1
        labels = bank.category_labels_of(row)
        if labels:
            click.echo("    " + "   ".join(f"{k} = {label}" for k, label in enumerate(labels)))
            return click.prompt(f"    answer (0 = {labels[0]} .. {top} = {labels[top]})", type=str)
        return click.prompt(f"    answer (0..{top})", type=str)

    def tell(message):
        click.echo(f"    refused: {message}")

    def progress(reply):
        if show_estimate and reply["items_given"]:
            click.echo(f"    (estimate so far: theta {_fixed(reply['theta'])}, SE {_fixed(reply['se'])} "
                       f"after {plural(reply['items_given'], 'item')})")

    try:
        result = try_session(design, bank, ask=ask, tell=tell, seed=seed, progress=progress)
    except click.Abort:  # end of input (or Ctrl-C) before the test finished
        click.echo("\ninput ended before the test finished; nothing was stored", err=True)
        sys.exit(EXIT_INPUT_ERROR)
    if as_json:
        emit(result, True)
        return
    click.echo("")
    for line in result_lines(result):
        click.echo(line)
