"""The history's tables as SQLAlchemy 2.0 typed models, with their relationships and closed sets of values.

Nullability comes from the ``Mapped[...]`` hints (``float | None`` is nullable, ``float`` is not).
Free text — tags, alarm keys, object ids, file names, hashes — is :class:`~sqlalchemy.Text`, unbounded
on SQLite and PostgreSQL alike (a ``VARCHAR(200)`` limit once refused a long tag on PostgreSQL only).

Closed sets are Python enums stored as their values (``"raise"``, ``"warning"``, ``"high"``,
``"daemon"``) in an unbounded string column with a named CHECK constraint: the same schema and the same
refusal of an unknown value on both databases (the ORM refuses it before the statement, the CHECK
refuses it from any other writer), and one migration code path when a set grows (drop and re-create the
CHECK constraint, in batch mode on SQLite), where a PostgreSQL ``ENUM`` type would need ``ALTER TYPE``.

The schema itself is created and changed by the Alembic revisions in ``migrations/``, never by
``create_all``; a test checks that the migrated schema equals this metadata.
"""

from __future__ import annotations

import enum

from spanwatch.rules.lifecycle import Action, AlarmState
from sqlalchemy import Enum, Float, ForeignKey, Index, MetaData, Text, UniqueConstraint
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship

# Constraint names the migrations can refer to; index names as SQLAlchemy's default (the original tables').
NAMING = {"ix": "ix_%(column_0_label)s", "ck": "ck_%(table_name)s_%(constraint_name)s"}


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)
    type_annotation_map = {str: Text(), float: Float()}  # noqa: RUF012 - SQLAlchemy reads it from the class


class EventKind(enum.StrEnum):
    """What happened to an alarm (the ``event`` column of ``alarm_events``)."""

    RAISE = "raise"
    CLEAR = "clear"


class Level(enum.StrEnum):
    """The level of an alarm point (:data:`spanwatch.rules.alarms.LEVELS`)."""

    WARNING = "warning"
    ALARM = "alarm"


class Priority(enum.StrEnum):
    """ISA-18.2 alarm priority as the configuration offers it, least urgent first.

    ``advisory`` is journal only, never annunciated; ``low`` to ``urgent`` are annunciated (ANSI/ISA-18.2-2016
    recommends three or four annunciated priorities; from memory).
    """

    ADVISORY = "advisory"
    LOW = "low"
    MEDIUM = "medium"
    HIGH = "high"
    URGENT = "urgent"


class RunMode(enum.StrEnum):
    """How a run was started: ``spanwatch replay``, ``spanwatch demo`` or ``spanwatch run``."""

    REPLAY = "replay"
    DEMO = "demo"
    DAEMON = "daemon"


class RunEnd(enum.StrEnum):
    """How a run ended (``runs.end_state``; empty while it runs, or when it was killed and not yet found so).

    ``finished``: it reached its end (a recording's last row, a daemon's clean stop); ``failed``: it stopped
    on an error (the recording or the database); ``interrupted``: stopped by the user (Ctrl-C), or a daemon
    or demo run found dead (killed, power lost) when the next run of its line starts.
    """

    FINISHED = "finished"
    FAILED = "failed"
    INTERRUPTED = "interrupted"


class Origin(enum.StrEnum):
    """Who changed an alarm's lifecycle (``alarm_actions.origin``): an operator, or the process and the design."""

    OPERATOR = "operator"
    SYSTEM = "system"


class RequestStatus(enum.StrEnum):
    """Where an operator's request stands (``action_requests.status``): waiting for the daemon, or answered."""

    PENDING = "pending"
    APPLIED = "applied"
    REFUSED = "refused"


def closed_set(cls: type[enum.StrEnum], name: str) -> Enum:
    """A string column holding the values of ``cls``, with a CHECK constraint ``ck_<table>_<name>``.

    No length: a VARCHAR(n) sized to today's longest value would refuse a longer one on PostgreSQL
    only, and would need widening when a set grows.
    """
    return Enum(cls, name=name, native_enum=False, create_constraint=True, validate_strings=True, length=None,
                values_callable=lambda e: [m.value for m in e])


class Run(Base):
    """One replay, demo or daemon start: the config it ran with and the span of data it saw."""

    __tablename__ = "runs"
    id: Mapped[int] = mapped_column(primary_key=True)
    started_at: Mapped[float]
    finished_at: Mapped[float | None]
    mode: Mapped[RunMode] = mapped_column(closed_set(RunMode, "mode"))
    line_name: Mapped[str]
    config_file: Mapped[str]
    config_hash: Mapped[str]
    source: Mapped[str] = mapped_column(default="")
    data_start: Mapped[float | None]
    data_end: Mapped[float | None]
    end_state: Mapped[RunEnd | None] = mapped_column(closed_set(RunEnd, "end_state"))
    written_seq: Mapped[int] = mapped_column(default=0, server_default="0")  # last write applied (writer.py)

    episodes: Mapped[list[AlarmEpisode]] = relationship(back_populates="run", order_by="AlarmEpisode.id")
    events: Mapped[list[AlarmEvent]] = relationship(back_populates="run", order_by="AlarmEvent.id")
    input_issues: Mapped[list[InputIssue]] = relationship(back_populates="run", order_by="InputIssue.id")


class AlarmEvent(Base):
    """The journal: one row per transition, append-only. ``episode_id`` is the episode it raised or cleared."""

    __tablename__ = "alarm_events"
    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id"), index=True)
    episode_id: Mapped[int | None] = mapped_column(ForeignKey("alarm_episodes.id", name="fk_alarm_events_episode_id"),
                                                   index=True)
    t: Mapped[float] = mapped_column(index=True)
    alarm_key: Mapped[str] = mapped_column(index=True)
    kind: Mapped[str]
    object_id: Mapped[str]
    level: Mapped[Level] = mapped_column(closed_set(Level, "level"))
    event: Mapped[EventKind] = mapped_column(closed_set(EventKind, "event"))
    value: Mapped[float | None]
    limit: Mapped[float]
    priority: Mapped[Priority] = mapped_column(closed_set(Priority, "priority"))
    line_state: Mapped[str]  # a line state's name, or its code when it is not one: not a closed set
    config_hash: Mapped[str]

    run: Mapped[Run] = relationship(back_populates="events")
    episode: Mapped[AlarmEpisode | None] = relationship(back_populates="events")


class AlarmEpisode(Base):
    """One row per raise, completed by its clear (possibly in a later run that carried the alarm on)."""

    __tablename__ = "alarm_episodes"
    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id"), index=True)
    alarm_key: Mapped[str]
    kind: Mapped[str] = mapped_column(index=True)
    object_id: Mapped[str] = mapped_column(index=True)
    level: Mapped[Level] = mapped_column(closed_set(Level, "level"))
    priority: Mapped[Priority] = mapped_column(closed_set(Priority, "priority"))
    unit: Mapped[str]
    raised_t: Mapped[float] = mapped_column(index=True)
    cleared_t: Mapped[float | None]
    raise_value: Mapped[float | None]
    peak_value: Mapped[float | None]
    limit: Mapped[float]
    line_state: Mapped[str]
    config_hash: Mapped[str]
    # the alarm's rationalization as configured at the raise (ISA-18.2 alarm response: cause, consequence,
    # corrective action, time to respond in s), and the flags of its raise; NULL on episodes from before revision 0003
    cause: Mapped[str | None]
    consequence: Mapped[str | None]
    corrective_action: Mapped[str | None]
    response_time: Mapped[float | None]
    first_out: Mapped[bool | None]
    chattering: Mapped[bool | None]
    # what the raise names (comma-separated) and carries (JSON: a drift's change time and size); NULL before 0004
    blames: Mapped[str | None]
    detail: Mapped[str | None]
    __table_args__ = (Index("ix_episode_open", "alarm_key", "cleared_t"),)

    run: Mapped[Run] = relationship(back_populates="episodes")
    events: Mapped[list[AlarmEvent]] = relationship(back_populates="episode", order_by="AlarmEvent.t")
    context: Mapped[list[AlarmContext]] = relationship(back_populates="episode", order_by="AlarmContext.id")
    actions: Mapped[list[AlarmAction]] = relationship(back_populates="episode", order_by="AlarmAction.id")


class AlarmContext(Base):
    """The samples of one signal around a raise: ``values[i]`` at ``t0 + i * dt`` (JSON, null where unusable)."""

    __tablename__ = "alarm_context"
    id: Mapped[int] = mapped_column(primary_key=True)
    episode_id: Mapped[int] = mapped_column(ForeignKey("alarm_episodes.id"), index=True)
    signal: Mapped[str]
    t0: Mapped[float]
    dt: Mapped[float]
    values: Mapped[str]

    episode: Mapped[AlarmEpisode] = relationship(back_populates="context")


class InputIssue(Base):
    """Per run, tag and reason: how many samples were refused or flagged, with the first line numbers (JSON)."""

    __tablename__ = "input_issues"
    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id"), index=True)
    tag: Mapped[str]
    reason: Mapped[str]
    count: Mapped[int]
    refs: Mapped[str]

    run: Mapped[Run] = relationship(back_populates="input_issues")


class WriterLock(Base):
    """Who writes a line into this history: one row per line, kept fresh by its writer's heartbeat.

    A second daemon of the same line finds the row with a recent heartbeat and refuses to start; a row
    whose heartbeat is older than the lock timeout belongs to a writer that died or hangs, and is taken
    over, and so is one whose process is gone from this machine.
    """

    __tablename__ = "writer_locks"
    line_name: Mapped[str] = mapped_column(primary_key=True)
    token: Mapped[str]  # the holder's random id
    owner: Mapped[str]  # host and process id, for the message a second writer prints
    process: Mapped[str]  # boot id, process id namespace and process id: a writer on the same machine sees it gone
    acquired_at: Mapped[float]
    heartbeat_at: Mapped[float]


# --- the alarm lifecycle (revision 0003) ---------------------------------------------------------------------------
#
# A shelve's end is a time (epoch s) or "until the alarm next clears" (one-shot, ``inf`` in
# :class:`~spanwatch.rules.lifecycle.Record`): stored as NULL with a ``one_shot`` flag, so neither database nor a
# JSON export ever sees an infinite float.


class ActionRequest(Base):
    """The inbox of a running daemon: an operator's action asked by another process, and the daemon's answer.

    The target is an episode (``episode_id``, the alarm id a listing shows) or an alarm key (``alarm_key``, as
    given: "kind:object" without a level means every level of that check on that object). ``until``: the end of a
    shelve (epoch s), NULL with ``one_shot`` for a shelve until the alarm clears.
    """

    __tablename__ = "action_requests"
    id: Mapped[int] = mapped_column(primary_key=True)
    line_name: Mapped[str]
    requested_at: Mapped[float]
    user: Mapped[str]
    action: Mapped[Action] = mapped_column(closed_set(Action, "action"))
    episode_id: Mapped[int | None]
    alarm_key: Mapped[str | None]
    comment: Mapped[str] = mapped_column(default="")
    until: Mapped[float | None]
    one_shot: Mapped[bool] = mapped_column(default=False)
    status: Mapped[RequestStatus] = mapped_column(closed_set(RequestStatus, "status"), default=RequestStatus.PENDING)
    answer: Mapped[str] = mapped_column(default="")
    answered_at: Mapped[float | None]
    __table_args__ = (Index("ix_action_requests_line_status", "line_name", "status"),)


class AlarmAction(Base):
    """The lifecycle journal: one row per change of an alarm's lifecycle or operator's action, append-only.

    ``episode_id``: the episode of the alarm key open at that moment (or its latest); ``request_id``: the
    operator's request it answers, when it came through the inbox.
    """

    __tablename__ = "alarm_actions"
    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int | None] = mapped_column(ForeignKey("runs.id"), index=True)
    line_name: Mapped[str]
    episode_id: Mapped[int | None] = mapped_column(ForeignKey("alarm_episodes.id"), index=True)
    alarm_key: Mapped[str]
    t: Mapped[float] = mapped_column(index=True)
    action: Mapped[Action] = mapped_column(closed_set(Action, "action"))
    origin: Mapped[Origin] = mapped_column(closed_set(Origin, "origin"))
    user: Mapped[str]
    comment: Mapped[str]
    state_before: Mapped[AlarmState] = mapped_column(closed_set(AlarmState, "state_before"))
    state_after: Mapped[AlarmState] = mapped_column(closed_set(AlarmState, "state_after"))
    until: Mapped[float | None]
    one_shot: Mapped[bool] = mapped_column(default=False)
    request_id: Mapped[int | None] = mapped_column(ForeignKey("action_requests.id"))
    __table_args__ = (Index("ix_alarm_actions_line_key", "line_name", "alarm_key"),)

    episode: Mapped[AlarmEpisode | None] = relationship(back_populates="actions")


class AlarmStateRow(Base):
    """The current lifecycle record of each alarm of a line (what :class:`~spanwatch.rules.lifecycle.Record`
    holds), upserted with every change: a daemon restores its lifecycle from it at start."""

    __tablename__ = "alarm_states"
    line_name: Mapped[str] = mapped_column(primary_key=True)
    alarm_key: Mapped[str] = mapped_column(primary_key=True)
    state: Mapped[AlarmState] = mapped_column(closed_set(AlarmState, "state"))
    active: Mapped[bool]
    acked: Mapped[bool]
    held: Mapped[bool]
    shelved_until: Mapped[float | None]
    shelved_one_shot: Mapped[bool]  # shelved until the alarm clears (Record.shelved_until == inf)
    shelved_by: Mapped[str]
    shelve_reason: Mapped[str]
    out_of_service: Mapped[bool]
    oos_by: Mapped[str]
    oos_reason: Mapped[str]
    suppressed_by: Mapped[str]
    updated_at: Mapped[float]


class ConfigVersion(Base):
    """The text of each configuration a line ran with (secrets removed by the caller), once per hash."""

    __tablename__ = "config_versions"
    id: Mapped[int] = mapped_column(primary_key=True)
    line_name: Mapped[str]
    config_hash: Mapped[str]
    config_file: Mapped[str]
    content: Mapped[str]
    saved_at: Mapped[float]
    saved_by: Mapped[str]
    __table_args__ = (UniqueConstraint("line_name", "config_hash", name="uq_config_versions_line_hash"),)


# --- each check's value over time (revision 0005) ---------------------------------------------------------------------


class CheckMinuteRow(Base):
    """One check on one object over one minute of a run: how many frames it computed (``n``), how many had a valid
    value (``valid``) and the least, mean and greatest of those values (NULL when none was valid).

    ``t``: the minute's start (epoch s, a multiple of 60); ``unit``: the unit of the check's value as its alarm points
    state it, the values stored as the check gives them (as ``alarm_episodes`` stores them: a ``%`` unit is over a
    fraction, 0.008 for 0.8 %).
    """

    __tablename__ = "check_minutes"
    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id"))
    check: Mapped[str]
    object: Mapped[str]
    t: Mapped[float]
    n: Mapped[int]
    valid: Mapped[int]
    min: Mapped[float | None]
    mean: Mapped[float | None]
    max: Mapped[float | None]
    unit: Mapped[str]
    __table_args__ = (Index("ix_check_minutes_run_t", "run_id", "t"),
                      Index("ix_check_minutes_check_object_t", "check", "object", "t"))
