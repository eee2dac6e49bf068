"""The operator's commands: ``ack``, ``reset``, ``shelve``, ``unshelve``, ``comment``, ``out-of-service`` and
``return-to-service``, against the history a running daemon writes (see :mod:`spanwatch.monitor.operate`).

Each writes a request and waits (``--wait``, 5 s by default) for the daemon's answer. Exit 0: carried out;
1: refused (the message says why, e.g. the alarm is already acknowledged); 3: no answer in time (the daemon
is not running, or far behind): the request stays queued and is carried out when the daemon reads it;
2: a usage, configuration or database problem.
"""


from pathlib import Path
from typing import Annotated

import typer
from spanwatch.monitor.cli import (
    DB_PASSWORD_HELP,
    DB_TIMEOUT,
    _history_url,
    app,
    console,
    err_console,
    fail,
    history_errors,
    open_line,
)

TARGET = "The alarm: its id (as spanwatch alarms lists it), or kind:object[:level] such as traction:R3:alarm."
USER = "Who does it (default: your login name)."


def _send(action: str, target: str, *, user: str | None, comment: str, until: float | None, one_shot: bool,
          config: Path | None, db: str | None, db_password: str | None, line: str | None, wait: float,
          db_timeout: float) -> None:
    import time

    from spanwatch.connectors.history.database import make_engine
    from spanwatch.connectors.history.requests import submit, wait_answer
    from spanwatch.connectors.history.schema import upgrade
    from spanwatch.monitor.operate import NoLine, line_for, login_name, parse_target

    try:
        episode_id, key = parse_target(target)
    except ValueError as exc:
        fail(f"TARGET: {exc}")
    who = (user if user is not None else login_name()).strip()
    if not who:
        fail("--user: expected the name of who does it, got nothing")
    ln = open_line(config) if config is not None else None
    url, shown = _history_url(db, db_password, ln, reading=True)
    with history_errors(url, db_timeout):
        engine = make_engine(url, timeout=db_timeout)
        try:
            upgrade(engine)
            try:
                line_name = line_for(engine, line_name=line or (ln.name if ln else None), episode_id=episode_id)
            except NoLine as exc:
                fail(str(exc))
            rid = submit(engine, line_name=line_name, action=action, user=who, comment=comment,
                         episode_id=episode_id, alarm_key=key, until=until, one_shot=one_shot, at=time.time())
            answer = wait_answer(engine, rid, timeout=wait)
        finally:
            engine.dispose()
    if answer.status == "applied":
        console.print(f"request {rid}: done: {answer.answer}", highlight=False, markup=False, soft_wrap=True)
        return
    if answer.status == "refused":
        err_console.print(f"request {rid}: refused: {answer.answer}", highlight=False, markup=False, soft_wrap=True)
        raise typer.Exit(1)
    err_console.print(f"request {rid}: no answer within {wait:g} s from the daemon of line {line_name!r} "
                      f"({shown}). Is it running? The request stays queued and is carried out when the "
                      f"daemon reads it.", highlight=False, markup=False, soft_wrap=True)
    raise typer.Exit(3)


ConfigOpt = Annotated[Path | None, typer.Option("--config", "-c",
                                                help="The line's configuration: its history and line name.")]
DbOpt = Annotated[str | None, typer.Option(help="History (SQLite path or SQLAlchemy URL); default: the config's.")]
DbPwOpt = Annotated[str | None, typer.Option(help=DB_PASSWORD_HELP)]
LineOpt = Annotated[str | None, typer.Option("--line", help="The line (default: the config's, or the alarm's).")]
WaitOpt = Annotated[float, typer.Option(help="Seconds to wait for the daemon's answer.", min=0.0)]
TimeoutOpt = Annotated[float, typer.Option(help=DB_TIMEOUT, min=0.0)]
UserOpt = Annotated[str | None, typer.Option("--user", "-u", help=USER)]


def _simple(name: str, action: str, doc: str, comment_help: str, *, needs_comment: bool = False) -> None:
    def command(
        target: Annotated[str, typer.Argument(help=TARGET)],
        user: UserOpt = None,
        comment: Annotated[str, typer.Option("--comment", "-m", help=comment_help)] = "",
        config: ConfigOpt = None, db: DbOpt = None, db_password: DbPwOpt = None, line: LineOpt = None,
        wait: WaitOpt = 5.0, db_timeout: TimeoutOpt = 10.0,
    ) -> None:
        if needs_comment and not comment.strip():
            fail(f"--comment: {name} needs a reason, e.g. -m \"load cell replaced\"")
        _send(action, target, user=user, comment=comment, until=None, one_shot=False, config=config, db=db,
              db_password=db_password, line=line, wait=wait, db_timeout=db_timeout)

    command.__doc__ = doc
    command.__name__ = f"{action}_cmd"
    app.command(name)(command)


_simple("ack", "ack", "Acknowledge an alarm (ISA-18.2): the operator has seen it.", "An optional comment.")
_simple("reset", "reset", "Reset a latched alarm whose condition has returned to normal (acknowledge it first).",
        "An optional comment.")
_simple("unshelve", "unshelve", "End a shelve before its time: the alarm shows again.", "An optional comment.")
_simple("comment", "comment", "Add a comment to an alarm's record (changes nothing else).", "The comment.",
        needs_comment=True)
_simple("out-of-service", "out_of_service", "Take an alarm out of service (maintenance, a faulty instrument): "
        "recorded, not shown, until it is returned to service.", "Why (required).", needs_comment=True)
_simple("return-to-service", "return_to_service", "Return an alarm to service.", "An optional comment.")


@app.command("shelve")
def shelve_cmd(
    target: Annotated[str, typer.Argument(help=TARGET)],
    for_: Annotated[str | None, typer.Option("--for", help="How long, e.g. '2 h' or '30 min' (at most "
                                                            "alarms.shelve_max in the config).")] = None,
    until_clear: Annotated[bool, typer.Option("--until-clear", help="Shelve until the alarm next returns to "
                                                                   "normal (one-shot).")] = False,
    comment: Annotated[str, typer.Option("--comment", "-m", help="Why (required).")] = "",
    user: UserOpt = None, config: ConfigOpt = None, db: DbOpt = None, db_password: DbPwOpt = None,
    line: LineOpt = None, wait: WaitOpt = 5.0, db_timeout: TimeoutOpt = 10.0,
) -> None:
    """Shelve an alarm (ISA-18.2): hide it for a while, with a reason; it shows again when the time runs out."""
    import time

    from spanwatch.monitor import units as U

    if not comment.strip():
        fail("--comment: shelving needs a reason, e.g. -m \"known nip fault, fitter on the way\"")
    if (for_ is None) == (not until_clear):
        fail("shelve: give either --for DURATION or --until-clear")
    until = None
    if for_ is not None:
        try:
            seconds = U.to_si(for_, U.TIME)
        except U.UnitError as exc:
            fail(f"--for: {exc}")
        if not seconds > 0:
            fail(f"--for: expected a positive duration, got {for_!r}")
        until = time.time() + seconds
    _send("shelve", target, user=user, comment=comment, until=until, one_shot=until_clear, config=config, db=db,
          db_password=db_password, line=line, wait=wait, db_timeout=db_timeout)
