"""SQLAlchemy 2 declarative models of the run store: spools, runs, points, traces, lines, events,
fits.

One run holds its points; a point holds its traces (compact y, see ``labrun.store.tracecodec``;
x as a linear grid or float64 bytes) and the lines reduced from them. Events log faults,
acknowledgements and exits. A fit holds one row per fitted parameter. Times are stored as UTC;
``(run_id, key)`` is unique so a resumed run can never duplicate a point. Every schema change is
an Alembic revision in ``labrun/store/migrations/versions`` (see ``labrun.store.schema``).
"""

from __future__ import annotations

import enum
from datetime import UTC, datetime
from typing import TYPE_CHECKING, Any

from sqlalchemy import (
    JSON,
    Boolean,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    String,
    Text,
    TypeDecorator,
    UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship

from labrun.store.kinds import FINISHED_STATUSES as FINISHED_STATUSES  # re-exported
from labrun.store.kinds import RUN_STATUSES as RUN_STATUSES  # re-exported
from labrun.store.kinds import EventKind, RunStatus, utcnow

if TYPE_CHECKING:  # numpy is imported where a trace is decoded: `labrun status` needs none
    import numpy as np


class UtcDateTime(TypeDecorator):
    """A DateTime that always comes back timezone-aware UTC, also from SQLite (which drops tz)."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Any) -> datetime | None:
        """Normalise to UTC before storing; naive values are taken to be UTC already."""
        if value is None:
            return None
        if value.tzinfo is None:
            return value.replace(tzinfo=UTC)
        return value.astimezone(UTC)

    def process_result_value(self, value: datetime | None, dialect: Any) -> datetime | None:
        """Attach UTC to the naive datetimes SQLite returns."""
        if value is None:
            return None
        return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)


class StrEnumText(TypeDecorator):
    """A VARCHAR holding a StrEnum's value; read back as the member. A value this labrun does not
    know (written by a newer one) comes back as the plain string rather than failing the read."""

    impl = String
    cache_ok = True

    def __init__(self, enum_type: type[enum.StrEnum], length: int):
        super().__init__(length)
        self.enum_type = enum_type

    def process_bind_param(self, value: str | None, dialect: Any) -> str | None:
        """Store the value itself (a member's string), never the member's name."""
        return None if value is None else str(value)

    def process_result_value(self, value: str | None, dialect: Any) -> str | None:
        """The member for a known value, else the string as stored."""
        if value is None:
            return None
        try:
            return self.enum_type(value)
        except ValueError:
            return value


class Base(DeclarativeBase):
    """Declarative base of every labrun table."""


class Spool(Base):
    """A fibre under test: label, length, nominal loss, fibre type, notes; runs and fits link."""

    __tablename__ = "spools"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    label: Mapped[str] = mapped_column(String(200), unique=True)
    length_km: Mapped[float | None] = mapped_column(Float)
    loss_db_per_km: Mapped[float | None] = mapped_column(Float)
    fibre_type: Mapped[str | None] = mapped_column(String(100))
    note: Mapped[str | None] = mapped_column(Text)
    params: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    created_at: Mapped[datetime] = mapped_column(UtcDateTime, default=utcnow)
    updated_at: Mapped[datetime | None] = mapped_column(UtcDateTime)

    runs: Mapped[list[Run]] = relationship(back_populates="spool")
    fits: Mapped[list[Fit]] = relationship(back_populates="spool")


class Run(Base):
    """One execution of a plan on a bench, with everything needed to trust or resume it."""

    __tablename__ = "runs"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    status: Mapped[RunStatus] = mapped_column(StrEnumText(RunStatus, 20),
                                              default=RunStatus.CREATED, index=True)
    reason: Mapped[str | None] = mapped_column(Text)
    plan_name: Mapped[str | None] = mapped_column(String(200))
    plan_path: Mapped[str | None] = mapped_column(Text)
    plan_text: Mapped[str] = mapped_column(Text)
    plan_sha256: Mapped[str] = mapped_column(String(64))
    bench_name: Mapped[str | None] = mapped_column(String(200))
    bench_path: Mapped[str | None] = mapped_column(Text)
    bench_text: Mapped[str] = mapped_column(Text)
    operator: Mapped[str | None] = mapped_column(String(200))
    unattended: Mapped[bool] = mapped_column(Boolean, default=False)
    software_version: Mapped[str] = mapped_column(String(50))
    identities: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    settings: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    points_total: Mapped[int] = mapped_column(Integer, default=0)
    host: Mapped[str | None] = mapped_column(String(200))
    pid: Mapped[int | None] = mapped_column(Integer)
    created_at: Mapped[datetime] = mapped_column(UtcDateTime, default=utcnow)
    started_at: Mapped[datetime | None] = mapped_column(UtcDateTime)
    finished_at: Mapped[datetime | None] = mapped_column(UtcDateTime)
    heartbeat_at: Mapped[datetime | None] = mapped_column(UtcDateTime)
    spool_id: Mapped[int | None] = mapped_column(ForeignKey("spools.id"))
    # the run this one replays (labrun replay: virtual, no light), None for a measured run
    replay_of: Mapped[int | None] = mapped_column(
        ForeignKey("runs.id", name="fk_runs_replay_of_runs"), index=True)

    spool: Mapped[Spool | None] = relationship(back_populates="runs")
    points: Mapped[list[Point]] = relationship(
        back_populates="run", cascade="all, delete-orphan", passive_deletes=True
    )
    events: Mapped[list[Event]] = relationship(
        back_populates="run", cascade="all, delete-orphan", passive_deletes=True
    )


class Point(Base):
    """One set of axis values within a run, committed together with its traces and lines."""

    __tablename__ = "points"
    __table_args__ = (UniqueConstraint("run_id", "key", name="uq_points_run_key"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"), index=True)
    key: Mapped[str] = mapped_column(String(400))
    index: Mapped[int] = mapped_column(Integer)
    repeat: Mapped[int] = mapped_column(Integer, default=0)
    is_reference: Mapped[bool] = mapped_column(Boolean, default=False)
    setpoint: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    applied: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    spacing_ghz: Mapped[float | None] = mapped_column(Float)
    floor_dbm: Mapped[float | None] = mapped_column(Float)
    flags: Mapped[list[str]] = mapped_column(JSON, default=list)
    attempts: Mapped[int] = mapped_column(Integer, default=1)
    started_at: Mapped[datetime | None] = mapped_column(UtcDateTime)
    finished_at: Mapped[datetime] = mapped_column(UtcDateTime, default=utcnow)

    run: Mapped[Run] = relationship(back_populates="points")
    traces: Mapped[list[Trace]] = relationship(
        back_populates="point", cascade="all, delete-orphan", passive_deletes=True
    )
    lines: Mapped[list[Line]] = relationship(
        back_populates="point", cascade="all, delete-orphan", passive_deletes=True
    )


class Trace(Base):
    """One captured spectrum: y (dBm per RBW) encoded as ``encoding`` says, x as a linear grid or
    float64 bytes."""

    __tablename__ = "traces"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    point_id: Mapped[int] = mapped_column(ForeignKey("points.id", ondelete="CASCADE"), index=True)
    kind: Mapped[str] = mapped_column(String(20), default="output")  # output | input
    x_unit: Mapped[str] = mapped_column(String(8), default="nm")
    n: Mapped[int] = mapped_column(Integer)
    x_start: Mapped[float] = mapped_column(Float)
    x_stop: Mapped[float] = mapped_column(Float)
    x_data: Mapped[bytes | None] = mapped_column(LargeBinary)  # float64 LE; None = linear grid
    y_data: Mapped[bytes] = mapped_column(LargeBinary)  # see labrun.store.tracecodec
    encoding: Mapped[str] = mapped_column(String(16), default="f32", server_default="f32")
    rbw_nm: Mapped[float | None] = mapped_column(Float)
    settings: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)

    point: Mapped[Point] = relationship(back_populates="traces")

    def x(self) -> np.ndarray:
        """The x axis (float64), rebuilt from the linear grid when no array was stored."""
        import numpy as np

        if self.x_data is not None:
            return np.frombuffer(self.x_data, dtype="<f8").copy()
        return np.linspace(self.x_start, self.x_stop, self.n)

    def y(self) -> np.ndarray:
        """The y values (dBm per RBW) as float64, decoded by the row's own encoding."""
        from labrun.store.tracecodec import decode_y

        return decode_y(self.y_data, self.encoding, self.n)


class Line(Base):
    """A tone or sideband found in a trace (docs/design.md §2.1 indexing)."""

    __tablename__ = "lines"
    __table_args__ = (Index("ix_lines_point_kind", "point_id", "kind", "side", "order"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    point_id: Mapped[int] = mapped_column(ForeignKey("points.id", ondelete="CASCADE"))
    trace_id: Mapped[int | None] = mapped_column(ForeignKey("traces.id", ondelete="CASCADE"))
    kind: Mapped[str] = mapped_column(String(10))
    side: Mapped[str] = mapped_column(String(5))
    order: Mapped[int] = mapped_column(Integer)
    freq_thz: Mapped[float | None] = mapped_column(Float)
    wavelength_nm: Mapped[float | None] = mapped_column(Float)
    power_dbm: Mapped[float | None] = mapped_column(Float)
    floor_dbm: Mapped[float | None] = mapped_column(Float)
    snr_db: Mapped[float | None] = mapped_column(Float)
    detected: Mapped[bool] = mapped_column(Boolean, default=True)
    upper_limit_dbm: Mapped[float | None] = mapped_column(Float)

    point: Mapped[Point] = relationship(back_populates="lines")


class Event(Base):
    """Something that happened during a run: safety acknowledgement, fault, retry, exit, ..."""

    __tablename__ = "events"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"), index=True)
    at: Mapped[datetime] = mapped_column(UtcDateTime, default=utcnow)
    kind: Mapped[EventKind] = mapped_column(StrEnumText(EventKind, 40), index=True)
    role: Mapped[str | None] = mapped_column(String(40))
    point_key: Mapped[str | None] = mapped_column(String(400))
    message: Mapped[str] = mapped_column(Text, default="")
    data: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)

    run: Mapped[Run] = relationship(back_populates="events")


class Fit(Base):
    """One fit of one spool's stored runs: which runs, by what method, with which software."""

    __tablename__ = "fits"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    spool_id: Mapped[int | None] = mapped_column(ForeignKey("spools.id"), index=True)
    run_ids: Mapped[list[int]] = mapped_column(JSON, default=list)
    method: Mapped[str] = mapped_column(String(200))
    software_version: Mapped[str] = mapped_column(String(50))
    created_at: Mapped[datetime] = mapped_column(UtcDateTime, default=utcnow)
    spool_snapshot: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)

    spool: Mapped[Spool | None] = relationship(back_populates="fits")
    parameters: Mapped[list[FitParameter]] = relationship(
        back_populates="fit", cascade="all, delete-orphan", passive_deletes=True
    )


class FitParameter(Base):
    """One fitted parameter: value, standard uncertainty, 95 % expanded uncertainty, unit."""

    __tablename__ = "fit_parameters"
    __table_args__ = (UniqueConstraint("fit_id", "name", name="uq_fit_parameters_fit_name"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    fit_id: Mapped[int] = mapped_column(ForeignKey("fits.id", ondelete="CASCADE"), index=True)
    name: Mapped[str] = mapped_column(String(60))
    value: Mapped[float | None] = mapped_column(Float)
    stderr: Mapped[float | None] = mapped_column(Float)
    u95: Mapped[float | None] = mapped_column(Float)
    unit: Mapped[str] = mapped_column(String(40))
    model: Mapped[str] = mapped_column(Text)
    n_points: Mapped[int] = mapped_column(Integer)
    residual_rms: Mapped[float | None] = mapped_column(Float)
    extra: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)

    fit: Mapped[Fit] = relationship(back_populates="parameters")
