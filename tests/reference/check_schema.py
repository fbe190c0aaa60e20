"""Checks `phasewise schema` with an independent JSON Schema validator.

Reference: the `jsonschema` package (Draft 2020-12 validator) and `ruamel.yaml` (a YAML 1.2 reader,
the YAML version phasewise's reader and editors' YAML language servers follow), both pinned in
requirements.txt. Neither was written by this project.

Usage: check_schema.py SCHEMA.json PIPELINE.yaml...

Every pipeline given must validate; then, starting from the first one, a misspelt top-level key,
a misspelt stage key, a misspelt param, an unknown op and a param of the wrong type must each be
rejected. Exits 1 naming what went wrong.
"""

import copy
import json
import sys

import jsonschema
from ruamel.yaml import YAML


def load_yaml(path):
    with open(path, encoding="utf-8") as f:
        return YAML(typ="safe", pure=True).load(f)


def main(argv):
    schema_path, pipelines = argv[1], argv[2:]
    with open(schema_path, encoding="utf-8") as f:
        schema = json.load(f)
    jsonschema.Draft202012Validator.check_schema(schema)
    validator = jsonschema.Draft202012Validator(schema)
    failures = []

    docs = {}
    for path in pipelines:
        doc = load_yaml(path)
        docs[path] = doc
        errors = sorted(validator.iter_errors(doc), key=lambda e: list(e.path))
        for e in errors:
            failures.append(f"{path}: {'.'.join(map(str, e.path)) or '(top)'}: {e.message}")
        print(f"{path}: {'valid' if not errors else f'{len(errors)} error(s)'}")

    base = docs[pipelines[0]]
    stages = base["stages"]
    # The first stage whose op takes a mapping of params with at least one key.
    name = next(n for n, s in stages.items() if isinstance(s.get("params"), dict) and s["params"])
    param = next(iter(stages[name]["params"]))

    def mutated(change):
        doc = copy.deepcopy(base)
        change(doc)
        return doc

    def rename(mapping, old, new):
        mapping[new] = mapping.pop(old)

    bad = {
        "misspelt top-level key `stage`": mutated(lambda d: rename(d, "stages", "stage")),
        f"misspelt stage key `{name}.exprt`": mutated(
            lambda d: d["stages"][name].__setitem__("exprt", True)
        ),
        f"misspelt param `{name}.params.{param}x`": mutated(
            lambda d: rename(d["stages"][name]["params"], param, param + "x")
        ),
        f"unknown op in `{name}`": mutated(
            lambda d: d["stages"][name].__setitem__("op", "wavelett")
        ),
        f"wrong type: `{name}.cache` a string": mutated(
            lambda d: d["stages"][name].__setitem__("cache", "yes please")
        ),
        f"wrong type: `{name}.params.{param}` an object of nonsense": mutated(
            lambda d: d["stages"][name]["params"].__setitem__(param, {"nonsense": [1, 2]})
        ),
        f"unknown export format `{name}.format: zar`": mutated(
            lambda d: d["stages"][name].__setitem__("format", "zar")
        ),
    }
    for what, doc in bad.items():
        if validator.is_valid(doc):
            failures.append(f"the schema accepts a {what}")
        else:
            print(f"rejected as expected: {what}")

    if failures:
        print("\n".join(["schema check failed:"] + failures), file=sys.stderr)
        return 1
    print(f"schema check: {len(pipelines)} pipelines valid, {len(bad)} bad variants rejected")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
