#!/usr/bin/env python3
"""Validate a PROV-JSON document with the `prov` package (PyPI) and check its counts.

usage: prov_check.py FILE --entities N --activities M [--agents K]

Reads FILE with prov's PROV-JSON deserializer, turning every warning the library emits
about the document (unknown prefixes, malformed literals, future rejections) into an error,
counts the entities, activities and agents, checks that every relation names records the
document declares, serializes the document again and reads it back to check that nothing
is lost. Exit status 0 when everything holds, 1 with a message otherwise, 2 on bad usage.
"""

import argparse
import io
import sys
import warnings


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("file")
    ap.add_argument("--entities", type=int, required=True)
    ap.add_argument("--activities", type=int, required=True)
    ap.add_argument("--agents", type=int)
    args = ap.parse_args()
    try:
        from prov.model import (
            ProvActivity,
            ProvAgent,
            ProvDocument,
            ProvEntity,
            ProvRelation,
        )
    except ImportError as e:
        print(f"prov_check: the `prov` package is not installed ({e}); "
              "pip install -r tests/requirements-prov.txt", file=sys.stderr)
        return 1

    with warnings.catch_warnings():
        warnings.simplefilter("error")
        try:
            doc = ProvDocument.deserialize(source=args.file, format="json")
        except Exception as e:  # noqa: BLE001 - report whatever the library rejects
            print(f"prov_check: {args.file}: not valid PROV-JSON: {type(e).__name__}: {e}",
                  file=sys.stderr)
            return 1

    def count(doc, cls):
        return len(list(doc.get_records(cls)))

    got = {
        "entities": count(doc, ProvEntity),
        "activities": count(doc, ProvActivity),
        "agents": count(doc, ProvAgent),
    }
    want = {"entities": args.entities, "activities": args.activities}
    if args.agents is not None:
        want["agents"] = args.agents
    bad = [f"{k}: expected {v}, found {got[k]}" for k, v in want.items() if got[k] != v]

    declared = {str(r.identifier) for r in doc.get_records()
                if r.identifier is not None and not isinstance(r, ProvRelation)}
    relations = list(doc.get_records(ProvRelation))
    for r in relations:
        for _attr, value in r.formal_attributes:
            if value is None or not hasattr(value, "namespace"):
                continue
            if str(value) not in declared:
                bad.append(f"{r.get_type()} refers to undeclared {value}")
                break

    # round trip through the library's own serializer
    buf = io.StringIO()
    doc.serialize(buf, format="json")
    again = ProvDocument.deserialize(content=buf.getvalue(), format="json")
    if again != doc:
        bad.append("the document changes when serialized and read back")

    print(f"prov_check: {args.file}: {got['entities']} entities, {got['activities']} activities, "
          f"{got['agents']} agents, {len(relations)} relations")
    if bad:
        for b in bad:
            print(f"prov_check: {b}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
