"""Checks answers against the API description with jsonschema (PyPI), the validator
schemathesis itself uses:

    check_answers.py DESCRIPTION.json stream FILE
        a streamed /generate answer: its events (`token`, then `done` or `error`), each event's
        data against the schema the description names for it;
    check_answers.py DESCRIPTION.json answer METHOD PATH STATUS FILE
        a JSON answer against the application/json schema the operation METHOD PATH (as the
        description spells the path, `{name}` and all) documents for STATUS.

Prints one line per check; exits 1 naming the first part that does not fit.
"""

import json
import sys

from jsonschema import Draft202012Validator

EVENT_SCHEMAS = {"token": "TokenEvent", "done": "DoneEvent", "error": "ErrorEvent"}


def validator(doc, ref):
    # The reference resolves inside the document itself, so its components stay reachable.
    return Draft202012Validator({"$ref": ref, "components": doc["components"]})


def events(text):
    """The (event, data) pairs of a server-sent event stream (comments skipped)."""
    out, name, data = [], None, []
    for line in text.split("\n"):
        if line == "":
            if name is not None or data:
                out.append((name or "message", "\n".join(data)))
            name, data = None, []
        elif line.startswith(":"):
            continue
        elif line.startswith("event:"):
            name = line[len("event:"):].strip()
        elif line.startswith("data:"):
            data.append(line[len("data:"):].lstrip())
    if name is not None or data:
        out.append((name or "message", "\n".join(data)))
    return out


def fail(message):
    print(message)
    sys.exit(1)


def check_answer(doc, method, path, status, answer):
    operation = doc["paths"][path][method.lower()]
    response = operation["responses"].get(status)
    if response is None:
        fail(f"{method} {path}: status {status} is not documented")
    ref = response["content"]["application/json"]["schema"]["$ref"]
    errors = list(validator(doc, ref).iter_errors(json.loads(answer)))
    if errors:
        fail(f"{method} {path} {status}: {errors[0].message} at {list(errors[0].path)}")
    print(f"{method} {path} {status} fits {ref}")


def check_stream(doc, answer):
    seen = events(answer)
    if not seen:
        fail("no events in the stream")
    names = [name for name, _ in seen]
    if names[-1] not in ("done", "error") or any(n != "token" for n in names[:-1]):
        fail(f"events out of order: {names}")
    for i, (name, data) in enumerate(seen):
        schema = EVENT_SCHEMAS.get(name)
        if schema is None:
            fail(f"event {i}: {name!r} is not an event the description names")
        errors = list(validator(doc, f"#/components/schemas/{schema}").iter_errors(json.loads(data)))
        if errors:
            fail(f"event {i} ({name}): {errors[0].message} at {list(errors[0].path)}")
    print(f"{len(seen)} events ({names.count('token')} token, then {names[-1]}) fit their schemas")


def main():
    doc = json.load(open(sys.argv[1]))
    if sys.argv[2] == "stream":
        check_stream(doc, open(sys.argv[3]).read())
    else:
        method, path, status, file = sys.argv[3:7]
        check_answer(doc, method, path, status, open(file).read())


main()
