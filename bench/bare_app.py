"""The baseline for single-sample ingest: a bare FastAPI endpoint that reads and parses the same
body with the same sample schema as phaseward's ingest and answers 204 without storing it.

Served by ``python -m bench.bare_app PORT`` with uvicorn configured as ``phaseward serve``
configures it (one process, default loop and HTTP parser, no access log).
"""

from __future__ import annotations

import json
import sys

import uvicorn
from fastapi import FastAPI, Request, Response

from phaseward.api.schemas.samples import SAMPLES

app = FastAPI()


@app.post("/v1/rails/{rail_id}/samples", status_code=204)
async def parse_only(rail_id: str, request: Request) -> Response:
    doc = json.loads(await request.body())
    SAMPLES.validate_python(doc if isinstance(doc, list) else [doc])
    return Response(status_code=204)


@app.get("/healthz")
def healthz() -> dict[str, str]:
    return {"status": "ok"}


if __name__ == "__main__":
    uvicorn.run(app, host="127.0.0.1", port=int(sys.argv[1]), log_level="warning",
                access_log=False, log_config=None)  # fmt: skip
