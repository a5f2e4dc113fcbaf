"""Request and response bodies of the /v1 API (pydantic), with the examples shown in OpenAPI.

``JobSettings`` mirrors the CLI settings flags in snake_case (docs/design.md §7); its
``to_settings()`` is the engine's frozen ``search.settings.JobSettings``. Every field is optional:
a missing one takes the engine's default, which the result records. Unknown keys are rejected
(``extra="forbid"``) so a typo never silently runs a different job. Its corpus fields are made
from the one definition of the corpus options (``search.settings.CORPUS_OPTIONS``): same names,
bounds, help and check as the CLI flags and the upload's form fields.
"""
from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, create_model, field_validator

from burstlens.search.compare import parse_compare_to
from burstlens.search.criteria_options import CRITERIA, REDUCERS, SPARSITY_MEASURES
from burstlens.search.settings import CORPUS_OPTIONS, SPACINGS
from burstlens.search.settings import JobSettings as EngineSettings

JobState = Literal["waiting", "working", "done", "error", "withdrawn"]
JobKind = Literal["search", "check", "transform"]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)


class CriterionSettings(_Strict):
    """Sharpness criterion (lower is sharper)."""

    name: Literal[CRITERIA] | None = Field(
        None, description="renyi (default), concentration (Stanković M_p), sparsity, or "
                          "detection (the weakest burst an energy detector on the image finds).")
    alpha: float | None = Field(None, gt=0, le=100, description="Rényi order α (default 3).")
    p: float | None = Field(None, gt=0, le=100, description="Concentration exponent p (default 2).")
    measure: Literal[SPARSITY_MEASURES] | None = Field(None, description="Sparsity measure.")
    negative_mass_penalty: float | None = Field(
        None, ge=0, le=1e6, description="λ: adds λ·Σ|p⁻|/Σ|p| to the score.")
    excess: bool | None = Field(
        None, description="Score each burst's excess over the site's steady level (default "
                          "true); false scores whole windows.")
    reduce: Literal[REDUCERS] | None = Field(
        None, description="How the windows' scores make the corpus's: mean (default), median or "
                          "trimmed mean.")

    @field_validator("alpha")
    @classmethod
    def _alpha_not_one(cls, value):
        if value is not None and value == 1:
            raise ValueError("alpha = 1 is the Shannon limit, not a Rényi order; use e.g. 3")
        return value


def _pair(name: str, value, *, positive: bool) -> list[float] | None:
    if value is None:
        return None
    lo, hi = value
    if positive and lo <= 0:
        raise ValueError(f"{name}: the lower bound must be > 0, got {lo}")
    if lo > hi:
        raise ValueError(f"{name}: expected [low, high] with low <= high, got [{lo}, {hi}]")
    return [float(lo), float(hi)]


class _SearchSettings(_Strict):
    """The search settings of a job; ``JobSettings`` adds the corpus options."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, json_schema_extra={"examples": [
        {"channels": 48, "band_hz": [20.0, 1500.0], "spacing": "log", "criterion": {"name": "renyi",
         "alpha": 3.0}, "evaluations": 120, "bootstrap": 8, "seed": 7}]})

    channels: int | None = Field(None, ge=2, le=512, description="Number of channels.")
    band_hz: list[float] | None = Field(None, min_length=2, max_length=2,
                                        description="[low, high] channel band, Hz.")
    spacing: Literal[SPACINGS] | None = Field(None, description="Channel centre spacing.")
    criterion: CriterionSettings | None = None
    cell_area: list[float] | None = Field(
        None, min_length=2, max_length=2,
        description="[min, max] cell area a (1 = Heisenberg minimum).")
    chirp: bool | None = Field(None, description="Search chirp rates (false: β = 0).")
    guard: bool | None = Field(None, description="Fall back to the best plain spectrogram when "
                                                 "the result detects or picks onsets worse on "
                                                 "the fit windows (default true).")
    refine: bool | None = Field(None, description="Per-channel refinement stage.")
    evaluations: int | None = Field(None, ge=1, le=100_000, description="Evaluation budget.")
    time_limit_s: float | None = Field(None, gt=0, le=7 * 86400, description="Time budget, s.")
    bootstrap: int | None = Field(None, ge=0, le=1000, description="Bootstrap resamples "
                                                                   "(0 = none, else at least 2).")
    held_out: float | None = Field(
        None, ge=0, le=0.9, description="Share of windows kept out of the fit to judge the result "
                                        "on (default 0.25; 0 judges in-sample).")
    max_negative_share: float | None = Field(
        None, ge=0, le=1, description="Largest share of the image's absolute mass that may be "
                                      "negative (default 0.01).")
    jobs: int | None = Field(None, ge=1, le=256, description="Parallel evaluations (at most "
                                                             "the server's cores are used).")
    compare_to: str | None = Field(
        None, max_length=64, description="Your own spectrogram, scored beside the result: "
                                         "KIND:LENGTH[:OVERLAP] in samples, KIND hann or "
                                         "gaussian, e.g. 'hann:256:192'.")

    @field_validator("compare_to")
    @classmethod
    def _compare_to(cls, value):
        if value is None:
            return None
        return parse_compare_to(value).text

    @field_validator("band_hz")
    @classmethod
    def _band(cls, value):
        value = _pair("band_hz", value, positive=True)
        if value is not None and value[0] == value[1]:
            raise ValueError(f"band_hz: the high edge must be above the low edge, got {value}")
        return value

    @field_validator("cell_area")
    @classmethod
    def _area(cls, value):
        return _pair("cell_area", value, positive=True)

    def to_options(self) -> dict[str, Any]:
        """The settings as the job records them: a JSON object of the keys set (unset keys left
        out), for ``search.settings.JobSettings.from_mapping``."""
        return self.model_dump(exclude_none=True, mode="json")

    def to_settings(self) -> EngineSettings:
        """The engine's checked settings (``search.settings.JobSettings``); ``ValueError``
        naming a setting the engine refuses."""
        return EngineSettings.from_mapping(self.to_options())


_KIND_TYPES = {"positive": float, "share": float, "integer": int, "codes": str,
               "band": list[float]}


def _corpus_field(option) -> tuple:
    kind = Literal[option.choices] if option.kind == "choice" else _KIND_TYPES[option.kind]
    size = {"min_length": 2, "max_length": 2} if option.kind == "band" else {}
    return (kind | None, Field(None, description=option.sentence(), **option.bounds(), **size))


def _check_corpus_option(cls, value, info):
    return None if value is None else CORPUS_OPTIONS[info.field_name].check(value)


JobSettings = create_model(
    "JobSettings", __base__=_SearchSettings, __module__=__name__,
    __doc__="Settings of one filterbank search; keys as the CLI flags in snake_case.",
    __validators__={"_corpus_options": field_validator(*CORPUS_OPTIONS)(_check_corpus_option)},
    **{name: _corpus_field(option) for name, option in CORPUS_OPTIONS.items()})


class JobRequest(_Strict):
    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, json_schema_extra={"examples": [
        {"corpus_id": "3f2a0c9e5b8d4e7f9a1b2c3d4e5f6a7b",
         "settings": {"channels": 48, "evaluations": 120, "seed": 7}}]})

    corpus_id: str = Field(..., min_length=1, max_length=64, description="From POST /v1/corpora.")
    settings: JobSettings = Field(default_factory=JobSettings)


class Progress(BaseModel):
    """Where a job is: rounds and evaluations done of budget, best objective so far, stage."""

    model_config = ConfigDict(extra="allow")

    stage: str | None = None
    round: int | None = None
    evaluations: int | None = None
    budget: int | None = None
    best_objective: float | None = None
    fraction: float | None = None


class JobView(BaseModel):
    model_config = ConfigDict(json_schema_extra={"examples": [
        {"id": "8c1d2e3f4a5b6c7d8e9f0a1b2c3d4e5f", "kind": "search", "state": "working",
         "progress": {"stage": "family", "round": 3, "evaluations": 24, "budget": 120,
                      "best_objective": 9.81, "fraction": 0.2},
         "attempts": 1, "error": None, "corpus_id": "3f2a0c9e5b8d4e7f9a1b2c3d4e5f6a7b",
         "settings": {"channels": 48}, "stop_reason": None, "withdraw_requested": False,
         "submitted_at": 1780000000.0, "started_at": 1780000001.0, "ended_at": None,
         "summary": None, "parent_id": None}]})

    id: str
    kind: JobKind = Field(..., description="search: tune a filterbank on a corpus; check: judge "
                                           "a search's filterbank on new data; transform: a "
                                           "search's filterbank over continuous records.")
    state: JobState = Field(..., description="waiting (for a worker) → working → done, error "
                                             "or withdrawn.")
    progress: Progress
    attempts: int
    error: str | None
    corpus_id: str
    settings: dict[str, Any]
    stop_reason: str | None = None
    withdraw_requested: bool = False
    submitted_at: float = Field(..., description="UTC, seconds since 1970.")
    started_at: float | None = Field(None, description="UTC, seconds since 1970.")
    ended_at: float | None = Field(None, description="UTC, seconds since 1970.")
    parent_id: str | None = Field(None, description="For a check or a transform: the search "
                                                    "whose filterbank it uses.")
    summary: dict[str, Any] | None = Field(
        None, description="Once the job is done. A search: scorecard (the detection margin, "
                          "onset fidelity and burst sharpness against the best plain "
                          "spectrogram, in words), scorecard_rows (the same in numbers with "
                          "paired intervals), objective, gain_bits, stop_reason, channels. A "
                          "check: verdict (keep or retune), words, moved, files. A transform: "
                          "time_step_s, parts (SEED id, group, start, steps), channels, files.")

    @classmethod
    def from_job(cls, job: dict[str, Any]) -> JobView:
        return cls(id=job["id"], kind=job["kind"], state=job["state"],
                   progress=Progress(**job["progress"]), attempts=job["attempts"],
                   error=job["error"], corpus_id=job["corpus_id"], settings=job["settings"],
                   stop_reason=job["stop_reason"], withdraw_requested=job["withdraw_requested"],
                   submitted_at=job["submitted_at"], started_at=job["started_at"],
                   ended_at=job["ended_at"], parent_id=job["parent_id"], summary=job["summary"])


class CheckRequest(_Strict):
    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, json_schema_extra={"examples": [
        {"corpus_id": "5d6e7f8a9b0c1d2e3f4a5b6c7d8e9f0a"}]})

    corpus_id: str = Field(..., min_length=1, max_length=64,
                           description="New files from POST /v1/corpora, read as the search "
                                       "read its corpus.")


class TransformJobRequest(_Strict):
    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, json_schema_extra={"examples": [
        {"corpus_id": "5d6e7f8a9b0c1d2e3f4a5b6c7d8e9f0a", "time_step_s": 0.01}]})

    corpus_id: str = Field(..., min_length=1, max_length=64,
                           description="Continuous records from POST /v1/corpora (miniSEED, SAC "
                                       "or SEG-Y: files that carry UTC start times).")
    time_step_s: float | None = Field(
        None, gt=0, le=3600, description="Output time step, s (default: the coarsest step the "
                                         "filterbank's kernels allow within the stated error).")


class JobList(BaseModel):
    jobs: list[JobView]


class CorpusFile(BaseModel):
    name: str = Field(..., description="The client's file name (kept for display only).")
    bytes: int
    sha256: str


class CorpusView(BaseModel):
    model_config = ConfigDict(json_schema_extra={"examples": [
        {"id": "3f2a0c9e5b8d4e7f9a1b2c3d4e5f6a7b", "created_at": 1780000000.0, "bytes": 1048576,
         "files": [{"name": "site-A.mseed", "bytes": 1048576, "sha256": "ab" * 32}],
         "summary": {"n_windows": 120, "sampling_rate_hz": 4000.0}}]})

    id: str
    created_at: float
    bytes: int
    files: list[CorpusFile]
    summary: dict[str, Any] = Field(..., description="What the corpus reader found (no samples).")

    @classmethod
    def from_corpus(cls, corpus: dict[str, Any]) -> CorpusView:
        return cls(id=corpus["id"], created_at=corpus["created_at"], bytes=corpus["bytes"],
                   files=[CorpusFile(name=f["name"], bytes=f["bytes"], sha256=f["sha256"])
                          for f in corpus["files"]],
                   summary=corpus["summary"])


class FieldProblem(BaseModel):
    field: str = Field(..., description="Where: a dotted path into the body, or a query or "
                                        "header name.")
    reason: str


class Problem(BaseModel):
    """An error answer: Problem Details for HTTP APIs (RFC 9457, Nottingham, Wilde and Dalal,
    2023), served as ``application/problem+json``."""

    model_config = ConfigDict(json_schema_extra={"examples": [
        {"type": "about:blank", "title": "Not Found", "status": 404,
         "detail": "no job '8c1d2e3f'", "instance": "/v1/jobs/8c1d2e3f"}]})

    type: str = Field("about:blank", description="A URI naming the kind of problem; "
                                                 "about:blank: the status says it all.")
    title: str = Field(..., description="The status's reason phrase.")
    status: int
    detail: str = Field(..., description="What went wrong, naming the field, file or value.")
    instance: str | None = Field(None, description="The path of the request.")
    errors: list[FieldProblem] | None = Field(
        None, description="For 422: each invalid field and the reason.")


class Health(BaseModel):
    status: Literal["ok"]
    version: str
    auth: bool = Field(..., description="Whether /v1 routes need a bearer token.")
