"""Pydantic models of the request parts, and the translation of their errors into Problems."""

from __future__ import annotations

import math
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BaseModel, ConfigDict, Field, ValidationError, model_validator

from service.intake.problems import Loc, Problem

INTERVAL_METHODS = ("percentile", "basic", "normal", "bca")
# RFC 8785 canonical JSON only represents integers up to 2**53 - 1 exactly (I-JSON, RFC 7493
# section 2.2); a larger integer in the inputs could not be hashed.
JSON_SAFE_INTEGER_LIMIT = 2**53


def _encodable(text: str) -> str:
    if text.isascii():  # no surrogate is ASCII; the common case, checked without encoding
        return text
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        # a lone surrogate would break the canonical JSON used for the inputs hash
        raise ValueError("contains an unpaired surrogate character") from None
    return text


def _label(text: str) -> str:
    _encodable(text)
    if not text.strip():
        raise ValueError("must be a non-empty label, got " + ("an empty string" if not text
                                                              else "only whitespace"))
    return text


MAX_MAGNITUDE = 1e100


def _finite(value: float) -> float:
    if not math.isfinite(value):
        shown = "NaN" if math.isnan(value) else ("Infinity" if value > 0 else "-Infinity")
        raise ValueError(f"must be a finite number, got {shown}")
    if abs(value) > MAX_MAGNITUDE:
        # Sums of squares and cubes of such values overflow double precision; no assay reports them.
        raise ValueError(f"must be at most {MAX_MAGNITUDE:g} in magnitude, got {value:g}")
    return float(value)


Text = Annotated[str, AfterValidator(_encodable)]
Label = Annotated[str, AfterValidator(_label)]
Finite = Annotated[float, AfterValidator(_finite)]
Level = Annotated[Finite, Field(gt=0.5, lt=0.999)]


class _Model(BaseModel):
    # strict: no "3" -> 3 and no True -> 1; ints are still accepted for floats (3 -> 3.0)
    model_config = ConfigDict(extra="forbid", strict=True, frozen=True)


class Study(_Model):
    title: Text = ""
    analyte: Text = ""
    unit: Text = ""
    description: Text = ""


class Design(_Model):
    test: Label
    reference: Label
    baseline: Label | None = None


class Record(_Model):
    subject: Label
    period: Annotated[int, Field(ge=1, lt=JSON_SAFE_INTEGER_LIMIT)]
    sequence: Label | None = None
    treatment: Label
    metric: Label = "response"
    value: Finite


class Profile(_Model):
    subject: Label
    period: Annotated[int, Field(ge=1, lt=JSON_SAFE_INTEGER_LIMIT)]
    treatment: Label
    sequence: Label | None = None
    time: Annotated[Finite, Field(ge=0)]
    concentration: Annotated[Finite, Field(ge=0)] | None = None
    below_lloq: bool = False


class Limits(_Model):
    lower: Finite = -0.20
    upper: Finite = 0.20

    @model_validator(mode="after")
    def _ordered(self) -> Limits:
        if self.lower >= self.upper:
            raise ValueError(f"lower ({self.lower}) must be less than upper ({self.upper})")
        return self


class PercentLimits(_Model):
    lower: Annotated[Finite, Field(gt=0, lt=100)] = 80.0
    upper: Annotated[Finite, Field(gt=100)] = 125.0


class AverageBioequivalence(_Model):
    confidence_level: Level = 0.90
    limits: PercentLimits = PercentLimits()
    treatments_in_model: Literal["compared", "all"] = "compared"


class ProfileSettings(_Model):
    auc_method: Literal["linear_up_log_down", "linear"] = "linear_up_log_down"
    lloq: Annotated[Finite, Field(gt=0)] | None = None
    baseline_correction: bool = False
    below_lloq_after_first: Literal["exclude", "zero"] = "exclude"


class Scaling(_Model):
    """Limits scaled to the reference's variability, for the metrics the protocol names
    (EMA 2010 §4.1.10 widened limits; FDA 2011 progesterone draft guidance, reference-scaled)."""

    approach: Literal["none", "widened_limits", "reference_scaled"] = "none"
    metrics: list[Annotated[str, Field(min_length=1, max_length=200)]] = []

    @model_validator(mode="after")
    def _named(self) -> Scaling:
        if self.approach != "none" and not self.metrics:
            raise ValueError("name the metrics the scaling applies to (settings.scaling.metrics); "
                             "the protocol fixes them in advance")
        if len(set(self.metrics)) != len(self.metrics):
            raise ValueError("metrics: each metric may be named once")
        return self


class ShiftLimits(_Model):
    lower: Finite
    upper: Finite

    @model_validator(mode="after")
    def _ordered(self) -> ShiftLimits:
        if self.lower >= self.upper:
            raise ValueError(f"lower ({self.lower}) must be less than upper ({self.upper})")
        return self


class Settings(_Model):
    replicates: Annotated[int, Field(ge=100, le=1_000_000)] = 10_000
    seed: Annotated[int, Field(ge=0, lt=JSON_SAFE_INTEGER_LIMIT)] | None = None
    confidence_level: Level = 0.90
    interval: Literal["percentile", "basic", "normal", "bca"] = "bca"
    limits: Limits = Limits()
    stratify_by_sequence: bool = False
    incomplete_subjects: Literal["exclude", "reject"] = "exclude"
    average_bioequivalence: AverageBioequivalence = AverageBioequivalence()
    profiles: ProfileSettings = ProfileSettings()
    # Added after the first release: absent unless given, so the normalized inputs (and the hash)
    # of a request that does not use them stay as they were.
    scaling: Scaling | None = None
    tmax_limits: ShiftLimits | None = None


def describe_json_type(got: Any) -> str:
    if got is None:
        return "null"
    if isinstance(got, bool):
        return "a boolean"
    if isinstance(got, str):
        return "a string"
    if isinstance(got, int):
        return "an integer"
    if isinstance(got, float):
        return "a number"
    if isinstance(got, list | tuple):
        return "a list"
    if isinstance(got, dict):
        return "an object"
    return type(got).__name__


def _message(error: Any) -> str:
    kind: str = error["type"]
    ctx: dict[str, Any] = error.get("ctx") or {}
    got = error.get("input")
    wanted = {
        "string_type": "must be a string",
        "int_type": "must be an integer",
        "float_type": "must be a number",
        "bool_type": "must be true or false",
        "model_type": "must be an object",
        "dict_type": "must be an object",
        "list_type": "must be a list",
    }
    if kind == "missing":
        return "field required"
    if kind == "extra_forbidden":
        return "unknown field"
    if kind == "float_type" and isinstance(got, int) and not isinstance(got, bool):
        return "must be a number within floating-point range"
    if kind in wanted:
        return f"{wanted[kind]}, got {describe_json_type(got)}"
    if kind == "literal_error":
        return f"must be one of {ctx.get('expected', '')}, got {got!r}"
    bounds = {"greater_than": "greater than", "greater_than_equal": "at least",
              "less_than": "less than", "less_than_equal": "at most"}
    if kind in bounds:
        bound = next(iter(ctx.values()), "")
        return f"must be {bounds[kind]} {bound}, got {got!r}"
    if kind == "value_error":
        return str(ctx.get("error", error.get("msg", "invalid value")))
    return str(error.get("msg", "invalid value"))


def validate_part(model: type[_Model], raw: Any, loc: Loc) -> tuple[Any, list[Problem]]:
    """Validate one request part; return (model or None, problems with locations under `loc`)."""
    try:
        return model.model_validate(raw), []
    except ValidationError as exc:
        problems = [
            Problem(loc + tuple(p for p in error["loc"] if isinstance(p, str | int)),
                    _message(error))
            for error in exc.errors()
        ]
        return None, problems
