"""Routes of study planning: power and sample size, from figures given or from an archived study."""

from __future__ import annotations

import math
from typing import Annotated, Any, Literal

from fastapi import APIRouter, Depends
from pydantic import BaseModel, ConfigDict, Field
from starlette.concurrency import run_in_threadpool
from starlette.responses import JSONResponse, Response

from service.api.access import Caller, require
from service.api.analyses import AnalysisId, ArchiveDep, stored_record
from service.api.problems import ProblemError, problem_responses
from service.stats.planning import (
    PlanningInputError,
    TargetNotReached,
    cv_upper_limit_to_json,
    plan,
    plan_cv_upper_limit,
    plan_to_json,
)

Reader = Annotated[Caller, Depends(require("read"))]
Design = Literal["two_by_two", "full_replicate_4", "full_replicate_3", "partial_replicate", "parallel"]


class PlanningLimits(BaseModel):
    model_config = ConfigDict(extra="forbid")
    lower: float = 0.80
    upper: float = 1.25


class PlanningBody(BaseModel):
    """What the next study is planned on; the protocol and a qualified statistician fix it."""

    model_config = ConfigDict(extra="forbid")
    design: Design
    cv: float = Field(description="within-subject CV as a fraction (0.30 for 30 %)")
    ratio: float = 0.95
    limits: PlanningLimits = PlanningLimits()
    alpha: float = 0.05
    target_power: float = 0.80
    dropout_rate: float = 0.0
    approach: Literal["none", "widened_limits", "reference_scaled"] = "none"
    cv_reference: float | None = None
    method: Literal["exact", "noncentral_t", "shifted_t", "normal"] = "exact"
    simulations: int = 100_000
    seed: int | None = Field(default=None, ge=0, lt=2**53)


class FromRecordBody(BaseModel):
    """Plan the next study on a metric of an archived one."""

    model_config = ConfigDict(extra="forbid")
    metric: str
    design: Design | None = Field(default=None, description="default: the archived study's")
    target_power: float = 0.80
    ratio: float = 0.95
    cv_from: Literal["estimate", "upper_confidence_limit"] = "estimate"
    cv_confidence_level: float = Field(default=0.80, gt=0, lt=1)
    dropout_rate: float = 0.0
    alpha: float = 0.05


def answer(body: PlanningBody, max_total: int) -> dict[str, Any]:
    """The planning answer, or a 422 problem naming every bad field (blocking: call off-loop)."""
    try:
        return plan_to_json(plan(
            design=body.design, cv=body.cv, ratio=body.ratio,
            limits=(body.limits.lower, body.limits.upper), alpha=body.alpha,
            target_power=body.target_power, dropout_rate=body.dropout_rate,
            approach=body.approach, cv_reference=body.cv_reference, method=body.method,
            simulations=body.simulations, seed=body.seed, max_total=max_total))
    except TargetNotReached as exc:
        raise ProblemError(422, f"no total up to the cap of {exc.cap} subjects reaches the target "
                           "power (setting max_planning_total)",
                           [(["body", *field.split(".")], msg) for field, msg in exc.problems]) from None
    except PlanningInputError as exc:
        raise ProblemError(422, "the planning request is invalid",
                           [(["body", *field.split(".")], msg) for field, msg in exc.problems]) from None


def build_planning_router(max_total: int) -> APIRouter:
    router = APIRouter(prefix="/v1", tags=["planning"])

    @router.post(
        "/planning",
        summary="Power and sample size of the next study (role read)",
        description="Exact power of the two one-sided tests (or a named shortcut), or simulated "
        "power under scaled limits; the smallest balanced total reaching the target, the "
        "enrolment after dropouts and a power curve. Planning assumptions are not guarantees: "
        "the protocol and a qualified statistician fix the sample size.",
        responses=problem_responses(400, 401, 403, 422),
    )
    async def plan_study(body: PlanningBody, _caller: Reader) -> Response:
        return JSONResponse(await run_in_threadpool(answer, body, max_total))

    @router.post(
        "/analyses/{analysis_id}/planning",
        summary="Plan the next study on the within-subject CV of an archived one (role read)",
        responses=problem_responses(400, 401, 403, 404, 422),
    )
    async def plan_from_record(
        analysis_id: AnalysisId, body: FromRecordBody, archive: ArchiveDep, _caller: Reader
    ) -> Response:
        record = stored_record(archive, analysis_id)
        planning, used = from_record(record, body)
        result = await run_in_threadpool(answer, planning, max_total)
        return JSONResponse({**result, "from_record": used})

    return router


def from_record(record: dict[str, Any], body: FromRecordBody) -> tuple[PlanningBody, dict[str, Any]]:
    """The planning request built from an archived metric, and which figures it used."""
    metrics = {m.get("metric"): m for m in record["result"].get("metrics", [])}
    metric = metrics.get(body.metric)
    abe = (metric or {}).get("average_bioequivalence")
    if metric is None:
        raise ProblemError(422, "no such metric in this record",
                           [(["body", "metric"], f"{body.metric[:64]!r} is not one of "
                             + ", ".join(repr(m) for m in metrics))])
    cv_percent = None if abe is None else abe.get("within_subject_cv_percent")
    df = None if abe is None else abe.get("log_difference", {}).get("df")
    if cv_percent is None or df is None:
        raise ProblemError(422, "this metric has no within-subject CV to plan on",
                           [(["body", "metric"], "the record has no average-bioequivalence CV "
                                                 "for it (parallel groups, or not computed)")])
    cv = cv_percent / 100.0
    used: dict[str, Any] = {"id": record.get("id"), "metric": body.metric, "cv_estimate": cv,
                            "df": df, "cv_from": body.cv_from}
    if body.cv_from == "upper_confidence_limit":
        upper = cv_upper_limit_to_json(plan_cv_upper_limit(cv, int(math.floor(df)),
                                                           body.cv_confidence_level))
        if upper["cv_upper"] is None:
            raise ProblemError(422, "the upper confidence limit of the CV cannot be computed",
                               [(["body", "cv_from"], "too few degrees of freedom")])
        used["cv_upper_confidence_limit"] = upper
        cv = upper["cv_upper"]
    design = body.design or _design_of(abe or {})
    used.update({"cv_used": cv, "design": design})
    return PlanningBody(design=design, cv=cv, ratio=body.ratio, target_power=body.target_power,
                        dropout_rate=body.dropout_rate, alpha=body.alpha), used


def _design_of(abe: dict[str, Any]) -> Design:
    description = str(abe.get("design_description") or "")
    if abe.get("design") == "replicate":
        if "partial" in description:
            return "partial_replicate"
        return "full_replicate_3" if "3 periods" in description else "full_replicate_4"
    return "two_by_two"
