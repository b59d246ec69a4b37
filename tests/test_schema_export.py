"""`clampd schema`: JSON Schema and AsyncAPI export of the MQTT interface (issue 2, part 5).

External checks:
- JSON Schema Draft 2020-12 and draft-07 meta-schemas and validators from the ``jsonschema``
  package (a general-purpose reference implementation, not ours).
- AsyncAPI 3.0.0 specification, required fields: ``asyncapi``, ``info.title``, ``info.version``
  (Info Object); ``address`` string or null, ``messages`` (Channel Object); ``action`` of send or
  receive and ``channel`` as a reference (Operation Object); Reply Object ``address`` only with a
  reply channel whose address is null. No package on PyPI reachable here ships the published
  AsyncAPI 3.0 JSON Schema (looked for, none found), so these fields are checked one by one and
  every ``$ref`` is resolved as a JSON Pointer (RFC 6901).
- AsyncAPI MQTT bindings 0.2.0 (from memory): ``qos`` and ``retain`` on the operation binding.
"""

from __future__ import annotations

import datetime as dt
import json
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from jsonschema import Draft7Validator, Draft202012Validator

from clampd.daemon.cli import main
from clampd.protocol import (
    TOPIC_TABLE,
    Curve,
    Reason,
    RundownResult,
    StopTrigger,
    Strategy,
    new_uuid7,
)

ROOT = Path(__file__).resolve().parents[1]
# The installed console script, as an integrator would run it.
CLAMPD = [str(Path(sys.executable).with_name("clampd"))]
EXAMPLES = ROOT / "protocol" / "examples"
NAMES = [spec.name for spec in TOPIC_TABLE.values()]


def _cli(capsys: pytest.CaptureFixture[str], *args: str) -> Any:
    assert main(["schema", *args]) == 0
    return json.loads(capsys.readouterr().out)


def _examples() -> Iterator[tuple[str, Path]]:
    for path in sorted(EXAMPLES.glob("*.json")):
        yield path.name.split(".")[0], path


@pytest.fixture(scope="module")
def printed_schemas() -> dict[str, Any]:
    """What the installed `clampd schema` command prints, run as a separate process."""
    out = subprocess.run(
        [*CLAMPD, "schema"],
        check=True,
        capture_output=True,
        text=True,
    ).stdout
    data: dict[str, Any] = json.loads(out)
    return data


def test_every_payload_has_a_schema_and_an_example(printed_schemas: dict[str, Any]) -> None:
    assert sorted(printed_schemas) == sorted(NAMES)
    assert {name for name, _ in _examples()} == set(NAMES)


@pytest.mark.parametrize(("name", "path"), list(_examples()), ids=str)
def test_examples_validate_against_the_printed_schema(
    printed_schemas: dict[str, Any], name: str, path: Path
) -> None:
    schema = printed_schemas[name]
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    Draft202012Validator.check_schema(schema)
    errors = list(Draft202012Validator(schema).iter_errors(json.loads(path.read_text())))
    assert errors == []


@pytest.mark.parametrize(
    ("name", "mutate"),
    [
        ("RundownResult", lambda d: d.update(status="MAYBE")),
        ("RundownResult", lambda d: d.update(id="not-a-uuid")),
        ("RundownResult", lambda d: d["curve"].pop("torque_nm")),
        ("RundownResult", lambda d: d.update(reasons=["torque_wobbly"])),
        ("RundownResult", lambda d: d.update(reasons=["torque_low"])),  # OK with a reason
        ("RundownResult", lambda d: d.update(status="NOK")),  # NOK without one
        ("RundownResult", lambda d: d.update(status="NOK", reasons=["aborted", "aborted"])),
        ("Reply", lambda d: d.update(status="error")),  # error without a code
        ("RundownResult", lambda d: d["wrench"]["calibration"].update(state="fine")),
        ("WrenchStatus", lambda d: d.update(battery_pct=101)),
        ("LiveProgress", lambda d: d.update(kind="cue")),
        ("SelectProgram", lambda d: d.update(unknown=1)),
        ("SelectProgram", lambda d: d.update(joint_positions=[])),
        ("SelectProgram", lambda d: d.update(joint_positions=["spindle-bolt-1"] * 2)),
        ("Lock", lambda d: d.pop("schema_version")),
        ("Reply", lambda d: d.update(code="no_such_code")),
        ("Reply.error", lambda d: d.update(status="ok")),  # ok with a code
    ],
)
def test_the_printed_schema_rejects_broken_payloads(
    printed_schemas: dict[str, Any], name: str, mutate: Any
) -> None:
    data = json.loads((EXAMPLES / f"{name}.json").read_text())
    assert Draft202012Validator(printed_schemas[name.split(".", maxsplit=1)[0]]).is_valid(data)
    mutate(data)
    assert not Draft202012Validator(printed_schemas[name.split(".", maxsplit=1)[0]]).is_valid(data)


def test_cli_prints_one_schema_by_name(
    capsys: pytest.CaptureFixture[str], printed_schemas: dict[str, Any]
) -> None:
    assert _cli(capsys, "RundownResult") == printed_schemas["RundownResult"]


def test_cli_unknown_name_is_exit_2_with_one_line(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["schema", "Rundown"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert "unknown payload 'Rundown'" in err


@pytest.mark.parametrize(
    "args",
    [["--asyncapi", "--prefix", "a/+/b"], ["--prefix", "plant/st-1"], ["Lock", "--asyncapi"]],
)
def test_cli_bad_combinations_are_exit_2(
    capsys: pytest.CaptureFixture[str], args: list[str]
) -> None:
    assert main(["schema", *args]) == 2
    assert capsys.readouterr().err.startswith("clampd schema: ")


# ---------------------------------------------------------------- AsyncAPI


@pytest.fixture(scope="module")
def asyncapi() -> dict[str, Any]:
    out = subprocess.run(
        [*CLAMPD, "schema", "--asyncapi"],
        check=True,
        capture_output=True,
        text=True,
    ).stdout
    doc: dict[str, Any] = json.loads(out)
    return doc


def _resolve(doc: dict[str, Any], ref: str) -> Any:
    """RFC 6901 JSON Pointer inside the same document."""
    assert ref.startswith("#/"), ref
    node: Any = doc
    for raw in ref[2:].split("/"):
        key = raw.replace("~1", "/").replace("~0", "~")
        assert isinstance(node, dict), ref
        assert key in node, f"{ref}: no {key!r}"
        node = node[key]
    return node


def _refs(node: Any) -> Iterator[str]:
    if isinstance(node, dict):
        for key, value in node.items():
            if key == "$ref":
                assert isinstance(value, str)
                yield value
            else:
                yield from _refs(value)
    elif isinstance(node, list):
        for item in node:
            yield from _refs(item)


def test_asyncapi_required_fields(asyncapi: dict[str, Any]) -> None:
    assert asyncapi["asyncapi"] == "3.0.0"
    assert isinstance(asyncapi["info"]["title"], str)
    assert asyncapi["info"]["title"]
    assert isinstance(asyncapi["info"]["version"], str)
    assert "joint designer" in asyncapi["info"]["description"]  # the usual caution travels along
    assert asyncapi["channels"]
    assert asyncapi["operations"]
    for channel in asyncapi["channels"].values():
        assert channel["address"] is None or isinstance(channel["address"], str)
        assert channel["messages"]
    for op in asyncapi["operations"].values():
        assert op["action"] in {"send", "receive"}
        assert set(op["channel"]) == {"$ref"}
        assert op["channel"]["$ref"].startswith("#/channels/")


def test_every_ref_resolves(asyncapi: dict[str, Any]) -> None:
    refs = list(_refs(asyncapi))
    assert len(refs) > 50
    for ref in refs:
        _resolve(asyncapi, ref)


def test_operation_messages_belong_to_their_channel(asyncapi: dict[str, Any]) -> None:
    """AsyncAPI 3.0 Operation Object: messages MUST be a subset of the channel's messages."""
    for op_id, op in asyncapi["operations"].items():
        channel_ref = op["channel"]["$ref"]
        for msg in op["messages"]:
            assert msg["$ref"].startswith(channel_ref + "/messages/"), op_id
        reply = op.get("reply")
        if reply is not None:
            reply_channel = _resolve(asyncapi, reply["channel"]["$ref"])
            # Reply Object: with an address given, the reply channel's address must be null.
            assert "address" in reply
            assert reply_channel["address"] is None
            for msg in reply["messages"]:
                assert msg["$ref"].startswith(reply["channel"]["$ref"] + "/messages/")


def test_every_topic_of_the_table_is_a_channel_with_its_qos_and_retain(
    asyncapi: dict[str, Any],
) -> None:
    by_address = {c["address"]: cid for cid, c in asyncapi["channels"].items() if c["address"]}
    for spec in TOPIC_TABLE.values():
        address = "{prefix}/" + spec.pattern
        assert address in by_address, address
        cid = by_address[address]
        channel = asyncapi["channels"][cid]
        assert spec.name in channel["messages"]
        for param in ("prefix", *spec.parameters):
            assert param in channel["parameters"]
        ops = [
            op
            for op in asyncapi["operations"].values()
            if op["channel"]["$ref"] == f"#/channels/{cid}"
        ]
        assert len(ops) == 1
        (op,) = ops
        assert op["action"] == ("send" if spec.direction == "publish" else "receive")
        assert op["bindings"]["mqtt"]["qos"] == spec.qos
        assert op["bindings"]["mqtt"]["retain"] == spec.retain
        assert {"$ref": f"#/channels/{cid}/messages/{spec.name}"} in op["messages"]


def test_last_will_is_declared_on_the_status_topic(asyncapi: dict[str, Any]) -> None:
    (server,) = asyncapi["servers"].values()
    will = server["bindings"]["mqtt"]["lastWill"]
    assert will["topic"] == "{prefix}/status"
    assert will["retain"] is True


@pytest.mark.parametrize(("name", "path"), list(_examples()), ids=str)
def test_examples_validate_against_the_asyncapi_components(
    asyncapi: dict[str, Any], name: str, path: Path
) -> None:
    """The components are used as AsyncAPI's draft-07-based schema format: check with draft-07."""
    schema = {"components": asyncapi["components"], "$ref": f"#/components/schemas/{name}"}
    message = asyncapi["components"]["messages"][name]
    assert message["payload"] == {"$ref": f"#/components/schemas/{name}"}
    payload = json.loads(path.read_text())
    assert list(Draft7Validator(schema).iter_errors(payload)) == []
    # the CLI shows the shipped example with its message
    assert {"name": path.name.removesuffix(".json"), "payload": payload} in message["examples"]


def test_components_use_only_draft_07_keywords(asyncapi: dict[str, Any]) -> None:
    newer = {"prefixItems", "$defs", "unevaluatedProperties", "unevaluatedItems", "$dynamicRef"}
    newer |= {"dependentRequired", "dependentSchemas"}

    def walk(node: Any) -> Iterator[str]:
        if isinstance(node, dict):
            for key, value in node.items():
                yield key
                if key != "properties":
                    yield from walk(value)
                else:
                    for sub in value.values():
                        yield from walk(sub)
        elif isinstance(node, list):
            for item in node:
                yield from walk(item)

    for name, schema in asyncapi["components"]["schemas"].items():
        Draft7Validator.check_schema(schema)
        assert not newer & set(walk(schema)), name


def test_concrete_prefix_gives_concrete_addresses(capsys: pytest.CaptureFixture[str]) -> None:
    prefix = "brackenfield/deck-assembly/line-3/st-120"
    doc = _cli(capsys, "--asyncapi", "--prefix", prefix)
    addresses = [c["address"] for c in doc["channels"].values() if c["address"]]
    assert f"{prefix}/result" in addresses
    assert all(a.startswith(prefix + "/") for a in addresses)
    assert not any("{prefix}" in a for a in addresses)
    assert "parameters" not in doc["channels"]["result"]
    assert doc["channels"]["wrench_status"]["parameters"].keys() == {"wrench_id"}


# ---------------------------------------------------------------- any result the models build


_finite = st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False)


@st.composite
def _results(draw: st.DrawFn) -> bytes:
    """Results that the model accepts, varied in every optional part, serialised for the wire."""
    data = json.loads((EXAMPLES / "RundownResult.json").read_text())
    reasons = draw(st.lists(st.sampled_from(list(Reason)), unique=True, max_size=4))
    data["status"] = "NOK" if reasons else "OK"
    data["reasons"] = [r.value for r in reasons]
    data["id"] = new_uuid7()
    start = draw(
        st.datetimes(
            min_value=dt.datetime(2000, 1, 1),
            max_value=dt.datetime(2100, 1, 1),
            timezones=st.just(dt.UTC),
        )
    )
    data["started_at"] = start.isoformat()
    data["finished_at"] = (start + dt.timedelta(seconds=draw(st.floats(0, 600)))).isoformat()
    for key in (
        "snug_torque_nm",
        "final_angle_deg",
        "joint_rate_nm_per_deg",
        "yield_point",
        "windows",
    ):
        if draw(st.booleans()):
            data[key] = None
    data["joint_rate_r2"] = draw(st.none() | st.floats(0.0, 1.0))
    final = draw(_finite)
    data["final_torque_nm"] = final
    data["peak_torque_nm"] = final + draw(st.floats(0.0, 100.0))
    data["strategy"] = draw(st.sampled_from(list(Strategy))).value
    data["stop_trigger"] = draw(st.sampled_from(list(StopTrigger))).value
    n = draw(st.integers(0, 40))
    t = sorted(draw(st.lists(st.floats(0.0, 1e4), min_size=n, max_size=n)))
    extra = draw(st.integers(0, 10_000))
    curve = Curve(
        method="lttb" if extra else "none",
        raw_sample_count=n + extra,
        t_s=t,
        angle_deg=draw(st.lists(_finite, min_size=n, max_size=n)),
        torque_nm=draw(st.lists(_finite, min_size=n, max_size=n)),
    )
    data["curve"] = json.loads(curve.model_dump_json())
    return RundownResult.model_validate_json(json.dumps(data)).to_json_bytes()


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(wire=_results())
def test_any_result_the_station_can_build_validates_against_the_printed_schema(
    printed_schemas: dict[str, Any], wire: bytes
) -> None:
    """The design contract: results published over MQTT validate against `clampd schema`."""
    errors = list(
        Draft202012Validator(printed_schemas["RundownResult"]).iter_errors(json.loads(wire))
    )
    assert errors == []
