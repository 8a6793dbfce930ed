"""Validates detection log records against config/record.schema.json with an
independent validator: the `jsonschema` package (Draft 2020-12), with format checking
so that "date-time" fields must be RFC 3339 (checked by `rfc3339-validator`).

Usage: validate_records.py SCHEMA LOG
Every line but a partial last one must be a JSON object valid against the schema.
Prints JSON: {"records": N, "kinds": {...}, "problems": [...], "partial_last_line": bool}.
"""
import json
import sys

import jsonschema

schema_path, log_path = sys.argv[1], sys.argv[2]
with open(schema_path) as f:
    schema = json.load(f)
validator = jsonschema.Draft202012Validator(schema, format_checker=jsonschema.Draft202012Validator.FORMAT_CHECKER)
with open(log_path, "rb") as f:
    data = f.read().decode("utf-8")
lines = data.split("\n")
partial = lines[-1] != ""
complete = lines[:-1]
kinds, problems = {}, []
for n, line in enumerate(complete, 1):
    try:
        rec = json.loads(line)
    except ValueError as e:
        problems.append(f"line {n}: not JSON: {e}")
        continue
    for err in validator.iter_errors(rec):
        problems.append(f"line {n}: {err.json_path}: {err.message}")
    kinds[rec.get("record")] = kinds.get(rec.get("record"), 0) + 1
json.dump({"records": len(complete), "kinds": kinds, "problems": problems[:20], "partial_last_line": partial}, sys.stdout)
