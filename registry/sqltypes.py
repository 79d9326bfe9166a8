"""Column types of the registry beyond SQLAlchemy's own (the migrations use them too, so they stay put)."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

from sqlalchemy import types
from sqlalchemy.engine.interfaces import Dialect
from sqlalchemy.sql.operators import OperatorType


class UTCDateTime(types.TypeDecorator[datetime]):
    """A timezone-aware timestamp: refuses naive datetimes, stores UTC and reads back aware UTC datetimes.

    TIMESTAMP WITH TIME ZONE on PostgreSQL; on SQLite (no time zones) UTC text without an offset. The same type
    the registry's first schema was written with (SQLModel's ``UTCDateTime``), so schemas and stored values match.
    """

    impl = types.DateTime
    cache_ok = True

    def __init__(self) -> None:
        super().__init__(timezone=True)

    def __repr__(self) -> str:
        return "UTCDateTime()"

    def coerce_compared_value(self, op: OperatorType | None, value: Any) -> types.TypeEngine[Any]:
        if isinstance(value, timedelta):
            return types.Interval()
        return self

    def process_bind_param(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        if value.utcoffset() is None:
            raise ValueError(
                "a registry timestamp must carry a time zone; use ivdossier.registry.models.utcnow() "
                "or datetime.now(UTC)."
            )
        return value.astimezone(UTC)

    def process_result_value(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        if value.utcoffset() is None:
            return value.replace(tzinfo=UTC)  # SQLite keeps UTC without an offset
        return value.astimezone(UTC)
