"""Flow definitions: load YAML, validate with pydantic, resolve the chain of steps.

A flow definition is data (config/*.yaml). Every error names the key, with its
position in the file's structure, and what is allowed there.
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.resources
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from thresher.flows.registry import BUILTIN_STEPS
from thresher.steps.spec import StepParams, StepSpec

DEFAULT_CONFIG_NAME = "default.yaml"


class ConfigError(ValueError):
    """A flow definition that cannot be used; the message says which key and why."""


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class SourceSection(_Strict):
    root: str = "sample_inputs"
    include: list[str] = Field(default_factory=lambda: ["**/*"])
    exclude: list[str] = Field(default_factory=list)
    # True: hash every file's bytes on every run instead of trusting an unchanged stat record.
    verify: bool = False
    # Folders of superseded copies (globs, case-insensitive): when the same bytes sit in
    # such a folder and elsewhere, the hand-off names the copy elsewhere. Folder names
    # that mean "old" on shared drives; common practice, no source.
    archive_folders: list[str] = Field(default_factory=lambda: ["**/archive/**", "**/archives/**", "**/old/**"])
    # Which of several copies of the same bytes (outside archive folders) is named:
    # newest = the one modified last; path = the first in path order. Ties go to path order.
    copies_by: Literal["newest", "path"] = "newest"
    # A run that would remove more than this share of the documents the last run held
    # (and at least plan.REMOVAL_FLOOR of them) stops before it changes anything: an
    # unmounted share looks like an empty folder. 1.0 turns the check off. Common
    # practice, no source.
    removal_limit: float = Field(default=0.5, ge=0.0, le=1.0)


class RunnerSection(_Strict):
    kind: Literal["sequential", "threads", "processes", "dask"] = "threads"
    workers: int = Field(default=2, ge=1, le=256)
    # For kind "dask": the scheduler of an existing cluster ("tcp://host:8786"); without
    # one, a local Dask cluster of `workers` processes is started for the run.
    address: str | None = None
    # Documents per task at most. Each task run costs Prefect about 25 ms of CPU in
    # this process and about 0.1 s in a pool process or Dask worker, so a batch should
    # hold seconds of work; the byte budget (pipeline.make_batches) spreads the drive
    # over about four batches per worker, which keeps the workers evenly busy. 32 made
    # the scale bench's 1,200 small files 38 task runs per segment: 256 there took a
    # sequential run 13.8 -> 12.3 s, 2 threads 11.2 -> 9.9 s and 2 processes 19.7 ->
    # 14.2 s (bench/scale.py's drive, one run each in turn).
    batch_size: int = Field(default=256, ge=1, le=10_000)
    retries: int = Field(default=2, ge=0, le=20)
    retry_delay_seconds: float = Field(default=2.0, ge=0)

    @field_validator("address")
    @classmethod
    def _scheduler_address(cls, v: str | None) -> str | None:
        if v is not None and "://" not in v:
            raise ValueError("a Dask scheduler address looks like tcp://host:8786")
        return v

    @model_validator(mode="after")
    def _address_needs_dask(self) -> "RunnerSection":
        if self.address is not None and self.kind != "dask":
            raise ValueError(f"address is the Dask scheduler's; it needs kind: dask (kind is {self.kind})")
        return self


class ScheduleSection(_Strict):
    deployment: str = "weekly-ingest"
    cron: str = "0 3 * * 1"
    timezone: str = "UTC"

    @field_validator("cron")
    @classmethod
    def _five_fields(cls, v: str) -> str:
        if len(v.split()) != 5:
            raise ValueError("a cron expression has 5 fields: minute hour day month weekday")
        return v

    @field_validator("timezone")
    @classmethod
    def _known_zone(cls, v: str) -> str:
        from zoneinfo import ZoneInfo

        try:
            ZoneInfo(v)
        except Exception as exc:  # noqa: BLE001 - any failure means unknown zone
            raise ValueError(f"unknown time zone {v!r} (use an IANA name such as Europe/Berlin)") from exc
        return v


class TargetEntry(_Strict):
    """One index that `thresher deliver` keeps up to date."""

    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)

    name: str = Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")
    # "sqlite", "postgres", or your own target as "package.module:factory"
    kind: str
    # sqlite: the database file (relative paths from the directory thresher starts in)
    database: str | None = None
    # postgres: the name of an environment variable holding the connection string, so
    # no password sits in the definition; `dsn` is for password-less local sockets.
    dsn_env: str | None = None
    dsn: str | None = None
    db_schema: str = Field(default="thresher", alias="schema", pattern=r"^[a-z_][a-z0-9_]*$")
    table: str = Field(default="chunks", pattern=r"^[a-z_][a-z0-9_]*$")
    # free settings for your own target
    options: dict[str, Any] = Field(default_factory=dict)

    @field_validator("kind")
    @classmethod
    def _known_kind(cls, v: str) -> str:
        if v in ("sqlite", "postgres"):
            return v
        module, colon, attr = v.partition(":")
        if not colon or not module or not attr.isidentifier():
            raise ValueError("kind is sqlite, postgres, or your own target as package.module:factory")
        return v

    @model_validator(mode="after")
    def _settings_for_kind(self) -> "TargetEntry":
        if self.kind == "sqlite" and not self.database:
            raise ValueError("a sqlite target needs database: the path of its database file")
        if self.kind == "postgres" and not (self.dsn_env or self.dsn):
            raise ValueError("a postgres target needs dsn_env (an environment variable holding "
                             "the connection string) or dsn")
        return self


class DeliverSection(_Strict):
    # Deliver to every target after each committed run (`thresher run`, the weekly deployment).
    after_run: bool = True
    targets: list[TargetEntry] = Field(default_factory=list)

    @field_validator("targets")
    @classmethod
    def _unique_names(cls, v: list[TargetEntry]) -> list[TargetEntry]:
        names = [t.name for t in v]
        dupes = sorted({n for n in names if names.count(n) > 1})
        if dupes:
            raise ValueError(f"target names must be unique: {', '.join(dupes)} appears more than once")
        return v


class HousekeepingSection(_Strict):
    # After a run, compact a stage whose rows are spread over more part files than
    # this (0: only by hand, `thresher compact`). Each run adds about one part per
    # batch per stage; a few hundred small files still read quickly (common practice).
    compact_parts: int = Field(default=200, ge=0)


class AccessRule(_Strict):
    """One access rule: source paths (globs) -> the readers allowed, and a label."""

    paths: list[str] = Field(min_length=1)
    readers: list[str]  # group or user names of the organisation; [] = nobody
    label: str | None = None

    @field_validator("paths", mode="before")
    @classmethod
    def _one_or_many(cls, v: Any) -> Any:
        return [v] if isinstance(v, str) else v

    @field_validator("readers")
    @classmethod
    def _names(cls, v: list[str]) -> list[str]:
        if any(not r.strip() for r in v):
            raise ValueError("a reader is a non-empty name (an empty list means nobody)")
        return sorted(set(v))


class AccessDefault(_Strict):
    readers: list[str] = Field(default_factory=list)
    label: str | None = None


class AccessSection(_Strict):
    """Who may read each document: not a step parameter, so it re-runs no step."""

    # combine: the file system's readers (owner, group, others, ACL entries) join the
    # rule's; ignore: only the rules count.
    file_system: Literal["combine", "ignore"] = "combine"
    rules: list[AccessRule] = Field(default_factory=list)
    # What matches no rule. "nobody" fails closed: such documents stay out of the hand-off.
    default: AccessDefault = Field(default_factory=lambda: AccessDefault(readers=["everyone"]))

    @field_validator("default", mode="before")
    @classmethod
    def _nobody(cls, v: Any) -> Any:
        if v == "nobody":
            return {"readers": []}
        if isinstance(v, str):
            raise ValueError("the default is 'nobody' or a mapping with readers (and optionally label)")
        return v


class StepEntry(_Strict):
    step: str
    params: dict[str, Any] = Field(default_factory=dict)


class FlowDefinitionModel(_Strict):
    name: str = "thresher"
    source: SourceSection = Field(default_factory=SourceSection)
    store: str = ".thresher-store"
    runner: RunnerSection = Field(default_factory=RunnerSection)
    schedule: ScheduleSection = Field(default_factory=ScheduleSection)
    deliver: DeliverSection = Field(default_factory=DeliverSection)
    # A probe file (questions and the documents that should answer them), checked after each run.
    probes: str | None = None
    housekeeping: HousekeepingSection = Field(default_factory=HousekeepingSection)
    steps: list[StepEntry]
    access: AccessSection = Field(default_factory=AccessSection)


@dataclass(frozen=True)
class ResolvedStep:
    spec: StepSpec
    params: StepParams
    ref: str  # what the definition said: a built-in name or a dotted path
    digest: str  # covers this step and every step before it

    @property
    def name(self) -> str:
        return self.spec.name


@dataclass(frozen=True)
class FlowDefinition:
    model: FlowDefinitionModel
    steps: tuple[ResolvedStep, ...]
    origin: str  # where it was loaded from, for messages and the manifest

    @property
    def chain_digest(self) -> str:
        return self.steps[-1].digest

    @property
    def source_limit(self) -> int | None:
        """The most bytes of a source file the chain's first step accepts (StepSpec.
        source_limit); a larger file is neither read to extract nor read to hash."""
        first = self.steps[0]
        return first.spec.source_limit(first.params) if first.spec.source_limit else None

    def step(self, name: str) -> ResolvedStep:
        for s in self.steps:
            if s.name == name:
                return s
        raise KeyError(name)

    def snapshot(self) -> dict[str, Any]:
        """The definition as the run used it, parameters filled in with defaults."""
        data = self.model.model_dump(mode="json")
        data["steps"] = [
            {"step": s.ref, "name": s.name, "version": s.spec.version, "unit": s.spec.produces,
             "scope": s.spec.scope, "formats": list(s.spec.formats),
             "params": s.params.model_dump(mode="json"), "digest": s.digest}
            for s in self.steps
        ]
        return data


def _loc(parts: tuple[Any, ...]) -> str:
    out = ""
    for p in parts:
        out += f"[{p}]" if isinstance(p, int) else (f".{p}" if out else str(p))
    return out or "(top level)"


def _allowed_keys(model: type[BaseModel]) -> str:
    return ", ".join(model.model_fields) or "(none)"


def _model_at(parts: tuple[Any, ...]) -> type[BaseModel] | None:
    """The pydantic model that owns the key at `parts` in a flow definition."""
    model: type[BaseModel] | None = FlowDefinitionModel
    for p in parts[:-1]:
        if model is None or isinstance(p, int):
            continue
        field = model.model_fields.get(p)
        if field is None:
            return None
        ann = field.annotation
        inner = getattr(ann, "__args__", (ann,))
        model = next((a for a in inner if isinstance(a, type) and issubclass(a, BaseModel)), None)
    return model


def _format_errors(exc: ValidationError, prefix: tuple[Any, ...] = (), model: type[BaseModel] | None = None) -> list[str]:
    lines = []
    for err in exc.errors():
        parts = prefix + tuple(err["loc"])
        where = _loc(parts)
        if err["type"] == "extra_forbidden":
            owner = model if model is not None else _model_at(tuple(err["loc"]))
            allowed = _allowed_keys(owner) if owner is not None else "see the documentation"
            lines.append(f"{where}: unknown key; allowed keys here: {allowed}")
        elif err["type"] == "missing":
            lines.append(f"{where}: required key is missing")
        else:
            msg = err["msg"].removeprefix("Value error, ")
            lines.append(f"{where}: {msg} (got {err.get('input')!r})")
    return lines


def resolve_step_ref(ref: str) -> StepSpec:
    """A built-in step name, or "package.module:ATTRIBUTE" naming a StepSpec."""
    if ref in BUILTIN_STEPS:
        module_name, attr = BUILTIN_STEPS[ref]
    elif ":" in ref:
        module_name, attr = ref.split(":", 1)
    else:
        raise ConfigError(
            f"unknown step {ref!r}; built-in steps are {', '.join(BUILTIN_STEPS)}, "
            "or give a dotted path 'package.module:STEP' to your own StepSpec"
        )
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise ConfigError(f"step {ref!r}: cannot import module {module_name!r} ({exc})") from exc
    spec = getattr(module, attr, None)
    if not isinstance(spec, StepSpec):
        raise ConfigError(f"step {ref!r}: {module_name}.{attr} is not a thresher StepSpec")
    return spec


def _digest(payload: Any) -> str:
    return hashlib.sha256(json.dumps(payload, sort_keys=True, separators=(",", ":")).encode()).hexdigest()[:16]


def _check_chain(steps: list[ResolvedStep]) -> list[str]:
    errors = []
    names = [s.name for s in steps]
    for i, s in enumerate(steps):
        if names.count(s.name) > 1 and names.index(s.name) != i:
            errors.append(f"steps[{i}]: step name {s.name!r} appears twice; each stage needs its own name")
    if not steps or steps[0].spec.consumes != "source":
        errors.append("steps[0]: the chain must start with a step that reads source files (extract)")
    unit = "source"
    for i, s in enumerate(steps):
        if s.spec.consumes != unit:
            errors.append(
                f"steps[{i}] ({s.name}): takes {s.spec.consumes} but the step before it gives {unit}; "
                "order the chain extract -> page steps -> split -> chunk steps"
            )
        if s.spec.scope == "corpus" and s.spec.consumes != s.spec.produces:
            errors.append(f"steps[{i}] ({s.name}): a corpus-wide step must give the units it takes")
        if s.spec.formats and s.spec.consumes != s.spec.produces:
            errors.append(f"steps[{i}] ({s.name}): a step limited to some formats must give the units it takes, "
                          "so other documents can pass it by")
        unit = s.spec.produces
    if unit != "chunks":
        errors.append("steps: the chain must end with chunks (include a split step) so there is something to hand off")
    return errors


def build_definition(data: Any, origin: str = "<memory>") -> FlowDefinition:
    if not isinstance(data, dict):
        raise ConfigError(f"{origin}: a flow definition is a mapping of keys ({', '.join(FlowDefinitionModel.model_fields)})")
    try:
        model = FlowDefinitionModel.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(f"{origin}: " + "; ".join(_format_errors(exc))) from None
    errors: list[str] = []
    resolved: list[ResolvedStep] = []
    previous = ""
    for i, entry in enumerate(model.steps):
        try:
            spec = resolve_step_ref(entry.step)
        except ConfigError as exc:
            errors.append(f"steps[{i}].step: {exc}")
            continue
        try:
            params = spec.params.model_validate(entry.params)
        except ValidationError as exc:
            errors.extend(_format_errors(exc, ("steps", i, "params"), spec.params))
            continue
        digest = _digest({"prev": previous, "name": spec.name, "version": spec.version,
                          "params": params.model_dump(mode="json")})
        previous = digest
        resolved.append(ResolvedStep(spec=spec, params=params, ref=entry.step, digest=digest))
    if not errors:
        errors.extend(_check_chain(resolved))
    if errors:
        raise ConfigError(f"{origin}: " + "; ".join(errors))
    return FlowDefinition(model=model, steps=tuple(resolved), origin=origin)


def default_config_text() -> str:
    return importlib.resources.files("thresher.config").joinpath(DEFAULT_CONFIG_NAME).read_text("utf-8")


def load_definition(path: str | Path | None = None) -> FlowDefinition:
    """Load a flow definition file, or the embedded default when path is None."""
    if path is None:
        text, origin = default_config_text(), f"(embedded) {DEFAULT_CONFIG_NAME}"
    else:
        p = Path(path)
        if not p.is_file():
            raise ConfigError(f"flow definition not found: {p}")
        text, origin = p.read_text("utf-8"), str(p)
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise ConfigError(f"{origin}: not valid YAML ({exc})".replace("\n", " ")) from None
    return build_definition(data, origin)
