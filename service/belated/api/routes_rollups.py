"""PUT /v1/models/{model}/rollups: rollup rows of whole hours for a lake-fed model."""

from __future__ import annotations

from fastapi import APIRouter, Request
from starlette.concurrency import run_in_threadpool

from belated.api.deps import Ingest, ModelDep, SessionDep, SettingsDep
from belated.errors import Problem
from belated.store import uploads

router = APIRouter(prefix="/v1/models/{model}", tags=["ingest"])


@router.put("/rollups")
async def put_rollups(
    _caller: Ingest, model: ModelDep, session: SessionDep, settings: SettingsDep, request: Request
) -> dict[str, int]:
    """Replace the rollup rows of the hours sent (a lake-fed model only): the body is an
    Arrow IPC stream (`application/vnd.apache.arrow.stream`) or a Parquet file
    (`application/vnd.apache.parquet`) of rows in the format of `belated.lake.schema`,
    validated whole; a bad row is a 422 naming it, and nothing is stored."""
    if model.source != "lake":
        raise Problem(
            409,
            f"model {model.name!r} is HTTP-fed: its rollups are aggregated from the predictions"
            ' and labels posted to it; create a model with "source": "lake" to upload'
            " rollup rows",
            title="Not a lake-fed model",
        )
    body = await request.body()
    table = uploads.read_table(body, request.headers.get("content-type", ""))
    # the validation and the writes off the event loop; committed before the answer
    return await run_in_threadpool(
        lambda: uploads.store(
            session=session, model=model, table=table, max_values=settings.max_segment_values
        )
    )
