"""The OpenAPI document names every stable key with its type; the CLI and REST give one analysis.

The stable keys are those DEVELOPERS.md lists as the interface outside code relies on.
"""

from __future__ import annotations

import json

import pytest

from service.cli import main

#: (path of keys, JSON types the schema must allow); "[]" steps into an array's items,
#: "{}" into a mapping's values.
STABLE_KEYS = [
    (("ramiform_version",), {"string"}),
    (("source", "sha256"), {"string"}),
    (("image", "width_px"), {"integer"}),
    (("image", "height_px"), {"integer"}),
    (("image", "format"), {"string"}),
    (("calibration", "pixel_size_mm"), {"number", "null"}),
    (("calibration", "source"), {"string"}),
    (("calibration", "calibrated"), {"boolean"}),
    (("segmentation", "confidence"), {"number", "null"}),
    (("segmentation", "alternatives", "[]", "overrides"), {"object"}),
    (("segmentation", "reading"), {"object"}),
    (("features", "box_dimension", "value"), {"number", "null"}),
    (("features", "box_dimension", "ci95"), {"array"}),
    (("features", "box_dimension", "ci95", "[]"), {"number", "null"}),
    (("features", "box_dimension", "fit_range_px", "[]"), {"number"}),
    (("features", "box_dimension", "status"), {"string"}),
    (("features", "mass_radius_dimension", "value"), {"number", "null"}),
    (("features", "mass_radius_dimension", "status"), {"string"}),
    (("features", "lacunarity", "scales_px", "[]"), {"number"}),
    (("features", "lacunarity", "values", "[]"), {"number", "null"}),
    (("features", "skeleton", "tips"), {"integer"}),
    (("features", "skeleton", "junctions"), {"integer"}),
    (("features", "skeleton", "branches"), {"integer"}),
    (("matches", "[]", "regime"), {"string"}),
    (("matches", "[]", "parameters"), {"object"}),
    (("matches", "[]", "probability"), {"number"}),
    (("matches", "[]", "distance"), {"number"}),
    (("in_library",), {"boolean", "null"}),
    (("parameter_estimates", "{}", "{}", "value"), {"number", "null"}),
    (("parameter_estimates", "{}", "{}", "ci95", "[]"), {"number", "null"}),
    (("parameter_estimates", "{}", "{}", "std"), {"number", "null"}),
    (("parameter_estimates", "{}", "{}", "spans_library_range"), {"boolean"}),
    (("parameter_estimates", "{}", "{}", "note"), {"string", "null"}),
    (("parameter_estimates", "{}", "{}", "status"), {"string"}),
    (("explanation", "verdict", "name"), {"string"}),
    (("warnings", "[]", "code"), {"string"}),
    (("warnings", "[]", "text"), {"string"}),
]


class Schema:
    """Walks an OpenAPI 3.1 document's schemas through ``$ref``, ``anyOf`` and ``allOf``."""

    def __init__(self, document: dict) -> None:
        self.components = document["components"]["schemas"]

    def variants(self, schema: dict) -> list[dict]:
        if "$ref" in schema:
            return self.variants(self.components[schema["$ref"].rsplit("/", 1)[-1]])
        out = []
        for key in ("anyOf", "oneOf", "allOf"):
            for inner in schema.get(key, []):
                out += self.variants(inner)
        return out or [schema]

    def step(self, schema: dict, key: str) -> dict:
        for variant in self.variants(schema):
            if key == "[]" and variant.get("type") == "array":
                return variant.get("items") or {}
            if key == "{}" and variant.get("type") == "object" and isinstance(variant.get("additionalProperties"), dict):
                return variant["additionalProperties"]
            if key in variant.get("properties", {}):
                return variant["properties"][key]
        raise AssertionError(f"the schema names no {key!r}")

    def types(self, schema: dict) -> set[str]:
        return {v["type"] for v in self.variants(schema) if "type" in v}


def _specimen_schema(document: dict, path: str, method: str, status: str) -> dict:
    return document["paths"][path][method]["responses"][status]["content"]["application/json"]["schema"]


@pytest.mark.parametrize(("path", "method", "status"), [
    ("/api/specimens/{specimen_id}", "get", "200"),
    ("/api/specimens", "post", "201"),
    ("/api/specimens/{specimen_id}/reanalyze", "post", "200"),
])
def test_openapi_names_every_stable_key_with_its_type(client, path, method, status):
    document = client.get("/openapi.json").json()
    walker = Schema(document)
    root = _specimen_schema(document, path, method, status)
    for keys, expected in STABLE_KEYS:
        schema = root
        for key in keys:
            schema = walker.step(schema, key)
        assert walker.types(schema) == expected, (keys, walker.types(schema))


def test_list_and_history_answers_are_typed(client):
    document = client.get("/openapi.json").json()
    walker = Schema(document)
    listing = _specimen_schema(document, "/api/specimens", "get", "200")
    item = walker.step(walker.step(listing, "items"), "[]")
    assert walker.types(walker.step(item, "box_dimension")) == {"number", "null"}
    assert walker.types(walker.step(item, "box_dimension_status")) == {"string", "null"}
    history = _specimen_schema(document, "/api/specimens/{specimen_id}/history", "get", "200")
    assert walker.types(walker.step(walker.step(history, "[]"), "number")) == {"integer"}
    references = _specimen_schema(document, "/api/references", "get", "200")
    assert walker.types(walker.step(walker.step(references, "ensembles"), "[]")) == {"object"}


#: Keys that name the stored specimen or the file rather than the analysis.
_IDENTITY = {"id", "report_url", "label", "kind", "created_at", "files", "history", "conditions", "path"}


def test_the_cli_and_rest_give_one_analysis_of_one_image(client, dla_png, tiny_library, tmp_path, capsys):
    image = tmp_path / "dish.png"
    image.write_bytes(dla_png)
    assert main(["analyze", str(image), "--json", "--library", str(tiny_library), "--workers", "1"]) == 0
    from_cli = json.loads(capsys.readouterr().out)
    answer = client.post("/api/specimens", files={"image": ("dish.png", dla_png, "image/png")})
    assert answer.status_code == 201, answer.text
    from_rest = answer.json()
    stored = client.get(f"/api/specimens/{from_rest['id']}").json()
    strip = lambda body: {k: v for k, v in body.items() if k not in _IDENTITY}  # noqa: E731
    assert strip(from_cli) == strip(from_rest) == strip(stored)
    assert from_cli["matches"], "ranked against the references"

    # The CSV row reads the same analysis: settings used, the dimension and its judgement, warning codes.
    import csv
    import io

    row = next(csv.DictReader(io.StringIO(client.get(f"/api/specimens/{stored['id']}/export.csv").text)))
    segmentation = stored["segmentation"]
    assert row["segmentation.mode"] == segmentation["mode"]
    assert float(row["segmentation.threshold"]) == segmentation["threshold"]
    assert json.loads(row["segmentation.reading"]) == segmentation["reading"]
    box = stored["features"]["box_dimension"]
    assert float(row["features.box_dimension.value"]) == box["value"]
    assert row["features.box_dimension.status"] == box["status"]
    assert row["warning_codes"].split() == [w["code"] for w in stored["warnings"]]
