"""A bare endpoint for comparison in ``bench_service.py``: it reads and validates a posted
response with the service's own request model and answers 201, nothing else (no signature, no
screening, no database). Run by the benchmark as ``python bare_endpoint.py PORT``."""

from __future__ import annotations

import sys

import orjson
import uvicorn
from fastapi import FastAPI, Request, Response
from pydantic import TypeAdapter

from service.schemas import ResponseIn

app = FastAPI()
_ROW = TypeAdapter(ResponseIn)


@app.post("/v1/surveys/{survey}/responses")
async def post(survey: str, request: Request) -> Response:
    row = _ROW.validate_python(orjson.loads(await request.body()))
    return Response(
        orjson.dumps({"survey": survey, "respondent_id": row.respondent_id}),
        status_code=201, media_type="application/json",
    )


@app.get("/healthz")
async def healthz() -> dict[str, str]:
    return {"status": "ok"}


if __name__ == "__main__":
    uvicorn.run(app, host="127.0.0.1", port=int(sys.argv[1]), log_level="warning",
                access_log=False)
