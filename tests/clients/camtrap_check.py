"""Validates a Camtrap DP data package offline, independently of outrider's
Rust code, with two general-purpose libraries from PyPI:

  camtrap_check.py --schemas tests/reference/camtrap-dp PACKAGE_DIR

1. datapackage.json against the Camtrap DP 1.0.2 profile
   (camtrap-dp-profile.json, JSON Schema draft-04) with `jsonschema`. The
   profile's two external "$ref"s are served from local files only: the
   Frictionless Data Package v1 profile (data-package.json, copied beside
   it) and the GeoJSON schema the `frictionless` package ships. Any other
   reference is an error: nothing is fetched.
2. Every table with `frictionless`: the package descriptor with the three
   Camtrap DP resources pointed at the local copies of their table schemas
   (types, datetime formats, enums, patterns, required, unique, primary and
   foreign keys between the tables); other resources (heartbeats) keep their
   inline schema.

Prints one JSON object: {"valid": bool, "profile_errors": [...],
"table_errors": [...], "rows": {resource: n}}; exits 0 when valid, 1 if not.
"""

import argparse
import copy
import json
import os
import sys

import frictionless
import jsonschema
from referencing import Registry, Resource
from referencing.jsonschema import DRAFT4

DATA_PACKAGE_URL = "https://specs.frictionlessdata.io/schemas/data-package.json"
GEOJSON_URL = "http://json.schemastore.org/geojson.json"
CAMTRAP = {"deployments", "media", "observations"}


def load(path):
    with open(path, encoding="utf-8") as f:
        return json.load(f)


def profile_errors(descriptor, schemas):
    profile = load(os.path.join(schemas, "camtrap-dp-profile.json"))
    geojson = os.path.join(
        os.path.dirname(frictionless.__file__), "assets", "profiles", "geojson.json"
    )
    local = {
        DATA_PACKAGE_URL: load(os.path.join(schemas, "data-package.json")),
        GEOJSON_URL: load(geojson),
    }

    def retrieve(uri):
        raise LookupError(f"refusing to fetch {uri}: only local schemas are used")

    registry = Registry(retrieve=retrieve).with_resources(
        (uri, Resource.from_contents(doc, default_specification=DRAFT4))
        for uri, doc in local.items()
    )
    validator = jsonschema.Draft4Validator(
        profile,
        registry=registry,
        format_checker=jsonschema.Draft4Validator.FORMAT_CHECKER,
    )
    return [
        f"{'/'.join(map(str, e.absolute_path)) or '(root)'}: {e.message}"
        for e in validator.iter_errors(descriptor)
    ]


def table_errors(descriptor, schemas, package_dir):
    d = copy.deepcopy(descriptor)
    # The profile was checked above; frictionless would fetch it by URL.
    d.pop("profile", None)
    for r in d["resources"]:
        if r.get("name") in CAMTRAP:
            r["schema"] = load(os.path.join(schemas, f"{r['name']}-table-schema.json"))
    package = frictionless.Package(d, basepath=package_dir)
    report = package.validate()
    errors = [
        f"{t.name}: " + " ".join(str(x) for x in row)
        for t in report.tasks
        for row in t.flatten(["rowNumber", "fieldName", "type", "note"])
    ]
    # Errors of the package as a whole (not of one table).
    errors += [f"package: {e.type} {e.note}" for e in report.errors]
    rows = {t.name: t.stats.get("rows") for t in report.tasks}
    return errors, rows


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--schemas", required=True)
    ap.add_argument("package")
    a = ap.parse_args()
    descriptor = load(os.path.join(a.package, "datapackage.json"))
    perr = profile_errors(descriptor, a.schemas)
    terr, rows = table_errors(descriptor, a.schemas, a.package)
    valid = not perr and not terr
    print(json.dumps({"valid": valid, "profile_errors": perr, "table_errors": terr, "rows": rows}))
    sys.exit(0 if valid else 1)


if __name__ == "__main__":
    main()
