"""`clampd schema`: print the JSON Schema of the MQTT payloads, or the AsyncAPI document.

An MES integrator feeds this output to their own validators and code generators; it is
generated from the same models the station uses, so it is the contract. Output is JSON on
stdout; a bad payload name or prefix is exit status 2 with one line on stderr.
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

__all__ = ["add_arguments", "run"]


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of `clampd schema`."""
    parser.add_argument(
        "name", nargs="?", help="one payload (e.g. RundownResult); default: all, as {name: schema}"
    )
    parser.add_argument(
        "--asyncapi", action="store_true", help="print the AsyncAPI 3.0 document instead"
    )
    parser.add_argument(
        "--prefix",
        help="with --asyncapi: a concrete station topic prefix instead of the {prefix} parameter",
    )
    parser.add_argument("--list", action="store_true", help="print the payload names, one a line")


def _shipped_examples() -> dict[str, list[tuple[str, Any]]]:
    """The example payloads shipped as package data, by payload name (``NAME[.variant].json``)."""
    from importlib.resources import files

    out: dict[str, list[tuple[str, Any]]] = {}
    folder = files("clampd.protocol").joinpath("examples")
    for entry in sorted(folder.iterdir(), key=lambda e: e.name):
        if entry.name.endswith(".json"):
            stem = entry.name.removesuffix(".json")
            out.setdefault(stem.split(".")[0], []).append((stem, json.loads(entry.read_text())))
    return out


def run(args: argparse.Namespace) -> int:
    """Print the requested schema(s); 2 on an unknown name or a bad prefix."""
    from clampd.protocol import TopicError, asyncapi_document, json_schemas

    if args.asyncapi:
        if args.name:
            print("clampd schema: give a payload name or --asyncapi, not both", file=sys.stderr)
            return 2
        try:
            doc = asyncapi_document(args.prefix, _shipped_examples())
        except TopicError as exc:
            print(f"clampd schema: {exc}", file=sys.stderr)
            return 2
        print(json.dumps(doc, indent=2, ensure_ascii=False))
        return 0
    if args.prefix is not None:
        print("clampd schema: --prefix applies only with --asyncapi", file=sys.stderr)
        return 2
    schemas = json_schemas()
    if args.list:
        print("\n".join(schemas))
        return 0
    if args.name is None:
        print(json.dumps(schemas, indent=2, ensure_ascii=False))
        return 0
    if args.name not in schemas:
        known = ", ".join(schemas)
        print(f"clampd schema: unknown payload {args.name!r} (known: {known})", file=sys.stderr)
        return 2
    print(json.dumps(schemas[args.name], indent=2, ensure_ascii=False))
    return 0
