"""A bare endpoint for comparison in ``bench_service.py``: a FastAPI route that takes a posted
response as the service's own request model (validated by the framework, as FastAPI's
documentation declares a body) and answers 201, nothing else (no signature, no screening, no
database). Run by the benchmark as ``python bare_endpoint.py PORT``."""

from __future__ import annotations

import sys

import uvicorn
from fastapi import FastAPI

from service.schemas import ResponseIn

app = FastAPI()


@app.post("/v1/surveys/{survey}/responses", status_code=201)
async def post(survey: str, row: ResponseIn) -> dict[str, str]:
    # FastAPI's own idiom: the body declared as the request model, validated by the framework
    return {"survey": survey, "respondent_id": row.respondent_id}


@app.get("/healthz")
async def healthz() -> dict[str, str]:
    return {"status": "ok"}


if __name__ == "__main__":
    uvicorn.run(app, host="127.0.0.1", port=int(sys.argv[1]), log_level="warning",
                access_log=False)
