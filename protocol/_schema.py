"""JSON Schema of every MQTT payload, and an AsyncAPI 3.0 document of the whole interface.

Both are generated from the pydantic models and ``TOPIC_TABLE``, never written by hand, so they
cannot drift from what the station actually sends and accepts. Published payloads are described
as serialised (every field present); commands as validated (optional fields may be left out).

``json_schemas()`` gives standalone Draft 2020-12 schemas, one per payload, each with its own
``$defs``. ``asyncapi_document()`` gathers the same schemas under ``components.schemas``; they
use only keywords that JSON Schema draft-07 also has (AsyncAPI 3.0's default schema format is a
draft-07 superset), which a test checks.
"""

from __future__ import annotations

import copy
import re
from collections.abc import Mapping, Sequence
from typing import Any, Literal

from pydantic import BaseModel
from pydantic.json_schema import JsonSchemaMode, models_json_schema

from clampd.protocol._fields import IDENT_PATTERN
from clampd.protocol._topics import TOPIC_TABLE, Topics, TopicSpec

__all__ = ["ASYNCAPI_VERSION", "JSON_SCHEMA_DIALECT", "asyncapi_document", "json_schemas"]

JSON_SCHEMA_DIALECT = "https://json-schema.org/draft/2020-12/schema"
ASYNCAPI_VERSION = "3.0.0"
# Version of the AsyncAPI MQTT bindings these objects follow (bindings repository, mqtt 0.2.0;
# from memory).
_MQTT_BINDING_VERSION = "0.2.0"
# Example prefix of the demo scenario (an invented plant making garden machinery).
_EXAMPLE_PREFIX = "brackenfield/deck-assembly/line-3/st-120"
_CAUTION = (
    "Results support, and never replace, the joint designer's specification, local codes and "
    "licensed practice: OK means the rundown met the program's windows as measured by the "
    "wrench, not that the joint is sound."
)


def _mode(spec: TopicSpec) -> JsonSchemaMode:
    return "serialization" if spec.direction == "publish" else "validation"


def json_schemas() -> dict[str, dict[str, Any]]:
    """Standalone JSON Schema (Draft 2020-12) of every payload, keyed by payload name."""
    out: dict[str, dict[str, Any]] = {}
    for model, spec in TOPIC_TABLE.items():
        schema = model.model_json_schema(mode=_mode(spec))
        out[spec.name] = {"$schema": JSON_SCHEMA_DIALECT, **schema}
    return out


def _channel_id(pattern: str) -> str:
    return "_".join(p for p in pattern.split("/") if not p.startswith("{"))


_PARAMETER_DOCS: dict[str, tuple[str, list[str]]] = {
    "prefix": (
        (
            "The station's configured topic prefix (one or more levels, ISA-95 style "
            "site/area/line/station)."
        ),
        [_EXAMPLE_PREFIX],
    ),
    "wrench_id": (f"Wrench id as configured at the station ({IDENT_PATTERN}).", ["wr-07"]),
    "program_id": (f"Tightening program id ({IDENT_PATTERN}).", ["spindle-m10-8.8"]),
}


def _operation_id(action: Literal["send", "receive"], channel_id: str) -> str:
    return f"{action}_{channel_id}"


def asyncapi_document(
    prefix: str | None = None,
    examples: Mapping[str, Sequence[tuple[str, Any]]] | None = None,
) -> dict[str, Any]:
    """An AsyncAPI 3.0 document of the station's MQTT interface.

    With ``prefix`` the channel addresses are concrete for one station (validated, TopicError
    on a bad one); without it the prefix is the address parameter ``{prefix}``. ``examples``
    maps a payload name to ``(example name, payload)`` pairs shown with its message (the CLI
    passes the shipped ``examples/*.json``; this module reads no files).
    """
    root = Topics(prefix).prefix if prefix is not None else "{prefix}"
    models: list[tuple[type[BaseModel], JsonSchemaMode]] = [
        (model, _mode(spec)) for model, spec in TOPIC_TABLE.items()
    ]
    _, top = models_json_schema(models, ref_template="#/components/schemas/{model}")
    schemas: dict[str, Any] = top["$defs"]

    channels: dict[str, Any] = {}
    operations: dict[str, Any] = {}
    messages: dict[str, Any] = {}
    for spec in TOPIC_TABLE.values():
        cid = _channel_id(spec.pattern)
        address = f"{root}/{spec.pattern}"
        channel = channels.setdefault(
            cid,
            {
                "address": address,
                "title": cid.replace("_", " "),
                "description": spec.summary,
                "messages": {},
            },
        )
        params = re.findall(r"\{([a-z_]+)\}", address)
        if params:
            channel["parameters"] = {
                p: {"description": _PARAMETER_DOCS[p][0], "examples": _PARAMETER_DOCS[p][1]}
                for p in params
            }
        channel["messages"][spec.name] = {"$ref": f"#/components/messages/{spec.name}"}
        message: dict[str, Any] = {
            "name": spec.name,
            "title": spec.name,
            "summary": spec.summary,
            "contentType": "application/json",
            "payload": {"$ref": f"#/components/schemas/{spec.name}"},
            "bindings": {
                "mqtt": {"payloadFormatIndicator": 1, "bindingVersion": _MQTT_BINDING_VERSION}
            },
        }
        if examples and examples.get(spec.name):
            message["examples"] = [
                {"name": ex_name, "payload": payload} for ex_name, payload in examples[spec.name]
            ]
        if spec.direction == "subscribe" or spec.name == "Reply":
            message["correlationId"] = {
                "description": "MQTT 5 Correlation Data is echoed as a property; the payload's "
                "correlation_id is echoed in the reply payload.",
                "location": "$message.payload#/correlation_id",
            }
        messages[spec.name] = message

        action: Literal["send", "receive"] = "send" if spec.direction == "publish" else "receive"
        op_id = _operation_id(action, cid)
        operation = operations.setdefault(
            op_id,
            {
                "action": action,
                "channel": {"$ref": f"#/channels/{cid}"},
                "summary": spec.summary,
                "messages": [],
                "bindings": {
                    "mqtt": {
                        "qos": spec.qos,
                        "retain": spec.retain,
                        "bindingVersion": _MQTT_BINDING_VERSION,
                    }
                },
            },
        )
        operation["messages"].append({"$ref": f"#/channels/{cid}/messages/{spec.name}"})
        if action == "receive":
            operation["reply"] = {
                "address": {
                    "description": "The MQTT 5 Response Topic property when set, else the "
                    f"payload's reply_to, else {root}/reply.",
                    "location": "$message.payload#/reply_to",
                },
                "channel": {"$ref": "#/channels/reply_requested"},
                "messages": [{"$ref": "#/channels/reply_requested/messages/Reply"}],
            }

    # Replies to an address chosen by the requester: the address is known only at run time.
    channels["reply_requested"] = {
        "address": None,
        "title": "reply to requested topic",
        "description": "Replies sent to the requester's Response Topic or reply_to.",
        "messages": {"Reply": {"$ref": "#/components/messages/Reply"}},
    }

    status_topic = f"{root}/status"
    return {
        "asyncapi": ASYNCAPI_VERSION,
        "info": {
            "title": "clampd station MQTT interface",
            "version": "1",
            "description": (
                "Results of threaded-fastener rundowns with torque-angle curves, station and "
                "wrench status, live events, statistics, alarms and commands of one clampd "
                "station. Payloads carry schema_version '1'; results are delivered at least "
                "once, de-duplicate by id. " + _CAUTION
            ),
            "license": {"name": "Apache-2.0"},
        },
        "defaultContentType": "application/json",
        "servers": {
            "plant": {
                "host": "mqtt.brackenfield.example:8883",
                # AsyncAPI's protocol name for MQTT over TLS (from memory).
                "protocol": "secure-mqtt",
                "protocolVersion": "5",
                "description": "The plant broker (MQTT 5; the station falls back to 3.1.1).",
                "bindings": {
                    "mqtt": {
                        "cleanSession": False,
                        "keepAlive": 30,
                        "lastWill": {
                            "topic": status_topic,
                            "qos": 1,
                            "retain": True,
                            "message": "A StationStatus payload with state 'offline'.",
                        },
                        "bindingVersion": _MQTT_BINDING_VERSION,
                    }
                },
            }
        },
        "channels": channels,
        "operations": operations,
        "components": {"schemas": copy.deepcopy(schemas), "messages": messages},
    }
