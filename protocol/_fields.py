"""Field types shared by every MQTT payload: identifiers, ids, times and finite numbers.

Identifiers that become topic levels (station, wrench, program, joint position) are limited to
a conservative alphabet so that no value can smuggle a ``/``, ``+``, ``#`` or NUL into a topic
(MQTT 5.0 §4.7 gives those characters meaning). Part ids come from barcodes and traceability
systems and are allowed any printable ASCII, but never become topic levels.

Times are timezone-aware and must be UTC: a plant MES sorts results from many stations, and a
local offset hidden in one station's clock is a classic source of misordered records.
"""

from __future__ import annotations

import datetime as dt
import re
from typing import Annotated

import uuid6
from pydantic import AfterValidator, AwareDatetime, BaseModel, ConfigDict, Field, StringConstraints

__all__ = [
    "IDENT_PATTERN",
    "SERIAL_PATTERN",
    "UUID7_PATTERN",
    "FiniteFloat",
    "Ident",
    "InboundModel",
    "OutboundModel",
    "PartId",
    "Serial",
    "Text",
    "UtcDatetime",
    "Uuid7",
    "new_uuid7",
]

# Letters, digits, dot, underscore and hyphen; starts with a letter or digit; at most 64
# characters (long enough for "spindle-m10x1.25-8.8-v12", short enough for a display column).
IDENT_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$"
# RFC 9562 §5.7: version nibble 7, variant bits 10xx; lowercase hex as uuid6 prints it.
UUID7_PATTERN = r"^[0-9a-f]{8}-[0-9a-f]{4}-7[0-9a-f]{3}-[89ab][0-9a-f]{3}-[0-9a-f]{12}$"
_UUID7_RE = re.compile(UUID7_PATTERN)

Ident = Annotated[str, StringConstraints(pattern=IDENT_PATTERN)]
# Printable ASCII without space, 1–128 characters: covers serial numbers, VINs and DataMatrix
# contents seen in assembly traceability (common practice, no source).
PartId = Annotated[str, StringConstraints(pattern=r"^[!-~]{1,128}$")]
# Human-readable text for a log or a screen; bounded so a payload stays small.
Text = Annotated[str, StringConstraints(min_length=1, max_length=500)]
# A wrench's serial as its firmware reports it (the sensor profile's info record gives 16 ASCII
# bytes; 32 leaves room for other sensors): printable ASCII, inner spaces allowed.
SERIAL_PATTERN = r"^[!-~]([ -~]{0,30}[!-~])?$"
Serial = Annotated[str, StringConstraints(pattern=SERIAL_PATTERN)]
Uuid7 = Annotated[str, StringConstraints(pattern=UUID7_PATTERN)]
FiniteFloat = Annotated[float, Field(allow_inf_nan=False)]


def _require_utc(value: dt.datetime) -> dt.datetime:
    if value.utcoffset() != dt.timedelta(0):
        raise ValueError("time must be in UTC (offset +00:00 or 'Z')")
    return value


UtcDatetime = Annotated[AwareDatetime, AfterValidator(_require_utc)]


def new_uuid7() -> str:
    """A fresh time-ordered id (RFC 9562 UUIDv7): sortable by creation, unique across stations."""
    value = str(uuid6.uuid7())
    assert _UUID7_RE.fullmatch(value), value  # uuid6 guarantees this; a change there must be loud
    return value


class OutboundModel(BaseModel):
    """Base of payloads the station publishes: strict, immutable, every field always present.

    ``extra="forbid"`` catches our own mistakes when building a payload; the exported schema
    therefore says ``additionalProperties: false``, and adding a field bumps ``schema_version``.
    """

    model_config = ConfigDict(
        strict=True,
        frozen=True,
        extra="forbid",
        json_schema_serialization_defaults_required=True,
    )

    def to_json_bytes(self) -> bytes:
        """UTF-8 JSON as it goes on the wire (no NaN: every float field is finite)."""
        return self.model_dump_json().encode()


class InboundModel(BaseModel):
    """Base of commands the station receives: untrusted, so strict types and no unknown fields."""

    model_config = ConfigDict(strict=True, frozen=True, extra="forbid")

    def to_json_bytes(self) -> bytes:
        """UTF-8 JSON, as an MES (or a test) sends it; ``None`` fields are left out."""
        return self.model_dump_json(exclude_none=True).encode()
