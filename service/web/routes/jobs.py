"""Long tasks as jobs: their state, progress and per-detector results."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from fastapi import APIRouter, Path
from pydantic import BaseModel, Field

from service.errors import NotFound
from service.store import jobs as job_store
from service.timefmt import format_utc
from service.web.deps import EngineDep, ReadDep

router = APIRouter(prefix="/v1", tags=["jobs"])
JOB_ID_PATTERN = r"^[0-9a-f]{32}$"


class JobProgress(BaseModel):
    done: int = Field(description="Detectors finished (fitted, insufficient history or failed).")
    total: int = Field(description="Detectors in the job.")


class JobItemResult(BaseModel):
    detector_id: str
    status: Literal["pending", "fitted", "insufficient_history", "failed"] = Field(
        description="'pending' until a worker has fitted the detector.")
    reason: str | None = Field(description="Why the fit did not happen, when it did not.")
    baseline_id: int | None = Field(description="The stored baseline, when fitted.")
    seconds: float | None = Field(description="Wall time the detector's fit took.")


class JobPublic(BaseModel):
    id: str
    kind: Literal["fit"]
    state: Literal["queued", "running", "done"] = Field(
        description="'queued' (no worker has started it), 'running', 'done' (every detector "
        "has a result; see each one's status).")
    progress: JobProgress
    as_of: str | None = Field(None, description="End of the history window the fits use.")
    created: str
    started: str | None
    finished: str | None
    created_by: str | None
    results: list[JobItemResult] = Field(description="Per detector, in the order asked.")


def job_public(job: dict[str, Any]) -> dict[str, Any]:
    as_of = job["params"].get("as_of_s")
    return {
        "id": job["job_id"], "kind": job["kind"], "state": job["state"],
        "progress": {"done": job["done"], "total": job["total"]},
        "as_of": format_utc(as_of) if as_of is not None else None,
        "created": format_utc(job["created_s"]),
        "started": format_utc(job["started_s"]) if job["started_s"] else None,
        "finished": format_utc(job["finished_s"]) if job["finished_s"] else None,
        "created_by": job["created_by"], "results": job["items"],
    }


@router.get("/jobs/{job_id}", response_model=JobPublic)
def get_job(job_id: Annotated[str, Path(description="Job id (32 hex digits).")],
            engine: EngineDep, _: ReadDep) -> dict[str, Any]:
    """A job's state, progress (done/total) and per-detector results."""
    import re

    if not re.fullmatch(JOB_ID_PATTERN, job_id):
        raise NotFound(f"no job {job_id[:40]!r}: job ids are the 32 hex digits that "
                       "POST /v1/baselines/fit answered with")
    job = job_store.get_job(engine, job_id)
    if job is None:
        raise NotFound(f"no job {job_id!r}; job ids are those POST /v1/baselines/fit answered "
                       "with, in this database")
    return job_public(job)
