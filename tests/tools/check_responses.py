# Validates recorded HTTP replies against the OpenAPI document with the independent Python
# `jsonschema` package (Draft 2020-12, the dialect of OpenAPI 3.1).
#
# usage: check_responses.py OPENAPI.json RECORDED.json
# RECORDED.json: [{"method", "route" (path template), "status", "content_type", "body"}]
# Prints one line per problem and "N passed, N failed"; exits 1 on any problem.
import json
import sys

import jsonschema
from referencing import Registry, Resource
from referencing.jsonschema import DRAFT202012


def main():
    doc = json.load(open(sys.argv[1]))
    recorded = json.load(open(sys.argv[2]))
    registry = Registry()
    passed = failed = 0
    for r in recorded:
        where = f'{r["method"]} {r["route"]} -> {r["status"]}'
        op = doc["paths"].get(r["route"], {}).get(r["method"].lower())
        if op is None:
            print(f"{where}: route not described")
            failed += 1
            continue
        responses = op["responses"]
        resp = responses.get(str(r["status"])) or responses.get("default")
        if resp is None:
            print(f"{where}: status not described")
            failed += 1
            continue
        if "$ref" in resp:
            resp = doc["components"]["responses"][resp["$ref"].rsplit("/", 1)[1]]
        ctype = (r["content_type"] or "").split(";")[0].strip()
        content = resp.get("content", {})
        if ctype not in content:
            print(f"{where}: content type {ctype!r} not described ({sorted(content)})")
            failed += 1
            continue
        schema = content[ctype]["schema"]
        body = r["body"]
        if ctype == "application/json":
            body = json.loads(body)
        # Local $refs (#/components/...) resolve against the OpenAPI document.
        validator = jsonschema.Draft202012Validator(
            {"$schema": "https://json-schema.org/draft/2020-12/schema",
             "$ref": "urn:openapi#/x-check"},
            registry=registry.with_resource(
                "urn:openapi",
                Resource.from_contents({**doc, "x-check": schema}, default_specification=DRAFT202012),
            ),
        )
        errors = list(validator.iter_errors(body))
        if errors:
            e = errors[0]
            print(f"{where}: {e.message[:200]} at {list(e.absolute_path)}")
            failed += 1
        else:
            passed += 1
    print(f"{passed} passed, {failed} failed")
    sys.exit(1 if failed or not passed else 0)


main()
