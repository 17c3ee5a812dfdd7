"""Every field of every schema in the OpenAPI document says what it is, and the rail
definition and the sample carry a valid example."""

from __future__ import annotations

from pathlib import Path

from phaseward.api.app import close, create_app
from phaseward.api.schemas.glossary import schemas
from phaseward.api.schemas.rails import RailCreate
from phaseward.api.schemas.samples import SampleIn
from phaseward.settings import Settings


def test_every_field_is_described(tmp_path: Path) -> None:
    app = create_app(Settings(data_dir=tmp_path, auth_mode="open"))
    try:
        document = app.openapi()
    finally:
        close(app)
    found = list(schemas(document))
    assert len(found) > 50
    bare = [
        f"{name}.{field}"
        for name, schema in found
        for field, prop in schema["properties"].items()
        if not prop.get("description")
    ]
    assert bare == [], f"describe these in their model or in api/schemas/glossary.py: {bare}"
    by_name = {name: schema for name, schema in found}
    for name, model in (("RailCreate", RailCreate), ("SampleIn", SampleIn)):
        (example,) = by_name[name]["examples"]
        model.model_validate(example, strict=False)  # the example is a valid request
