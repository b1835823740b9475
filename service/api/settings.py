"""Service settings, read from the environment (prefix ``MOVECAST_``) by pydantic-settings.

The cap fields (``max_*`` but the body size and batch items) take their defaults from
:data:`service.pipeline.caps.DEFAULT_CAPS`, where they are written once.
"""

from __future__ import annotations

from dataclasses import fields
from pathlib import Path
from typing import Annotated, Any

from pydantic import Field, PrivateAttr, SecretStr, field_validator, model_validator
from pydantic_settings import BaseSettings, NoDecode, SettingsConfigDict

from service.api import settings_checks as checks
from service.pipeline.caps import DEFAULT_CAPS, HEAVY_WORK, Caps
from service.pipeline.memory import HEAVY_MEMORY_BYTES

__all__ = ["HEAVY_NICENESS", "Settings"]

#: Niceness added to the heavy lane's solver processes by default (``MOVECAST_HEAVY_NICENESS``).
#: Linux's scheduler weighs a process's niceness only against the processes of its own
#: control group (CFS group scheduling: a group competes with its siblings by its own
#: ``cpu.weight``, its tasks among themselves by niceness; kernel documentation,
#: ``scheduler/sched-design-CFS``, "group scheduler extensions", and ``admin-guide/cgroup-v2``,
#: "CPU"), so in a container the heavy lane yields only to this service's light lane and
#: serving process, not to other tenants.  Measured on 2 cores with 2 clients keeping the heavy
#: lane busy, three runs each interleaved: small designs' p99 41-57 ms against 52-57 ms and
#: their rate 169-200/s against 157-167/s, for a heavy rate 3.1-3.5/s against 3.6-3.75/s.
HEAVY_NICENESS = 10


class Settings(BaseSettings):
    """Everything an operator can set; every field maps to ``MOVECAST_<NAME>``."""

    model_config = SettingsConfigDict(env_prefix="MOVECAST_", extra="ignore", frozen=True)

    host: str = Field(default="127.0.0.1", description="Address to listen on.")
    port: int = Field(default=8000, ge=1, le=65535, description="TCP port to listen on.")
    workers: int = Field(default=1, ge=1, le=64, description="Worker processes.")
    log_level: str = Field(
        default="info", description="Log level of the service: critical, error, warning, info, debug."
    )

    max_states: int = Field(default=DEFAULT_CAPS.max_states, ge=1, description="Largest state count accepted.")
    max_signals: int = Field(default=DEFAULT_CAPS.max_signals, ge=1, description="Most inputs or outputs accepted.")
    max_prediction_horizon: int = Field(
        default=DEFAULT_CAPS.max_prediction_horizon, ge=1, description="Longest Hp accepted."
    )
    max_hessian_size: int = Field(default=DEFAULT_CAPS.max_hessian_size, ge=1, description="Largest Hu*m accepted.")
    max_prediction_entries: int = Field(
        default=DEFAULT_CAPS.max_prediction_entries,
        ge=1,
        description="Most entries of the prediction matrices [Fx Fu G].",
    )
    max_design_memory_bytes: int = Field(
        default=DEFAULT_CAPS.max_design_memory_bytes,
        ge=1024 * 1024,
        description="Most estimated memory of one design in the solver, in bytes (fits the pod of deploy/).",
    )
    max_request_memory_bytes: int = Field(
        default=DEFAULT_CAPS.max_request_memory_bytes,
        ge=1024 * 1024,
        description="Most estimated peak memory of one request in the compute process, its answer included, in "
        "bytes (runs, sweeps, batches, comparisons, identifications; fits the pod of deploy/).",
    )
    max_answer_memory_bytes: int = Field(
        default=DEFAULT_CAPS.max_answer_memory_bytes,
        ge=1024 * 1024,
        description="Most bytes of answers the serving process holds at once, each estimated from the request's "
        "sizes and held from the solver's reply to its last byte sent; one answer past it is a 422, answers that "
        "do not fit beside the others wait for room within the time limit.",
    )
    max_response_entries: int = Field(
        default=DEFAULT_CAPS.max_response_entries, ge=1, description="Most entries of the horizon gain in a response."
    )
    max_sweep_values: int = Field(
        default=DEFAULT_CAPS.max_sweep_values, ge=1, le=1000, description="Most values in one tuning sweep."
    )
    max_simulation_steps: int = Field(
        default=DEFAULT_CAPS.max_simulation_steps, ge=1, description="Longest run of POST /simulate, in steps."
    )
    max_simulation_work: int = Field(
        default=DEFAULT_CAPS.max_simulation_work,
        ge=1,
        description="Most estimated floating-point work of one simulated run (steps x cost of a step).",
    )
    max_frequency_work: int = Field(
        default=DEFAULT_CAPS.max_frequency_work,
        ge=1,
        description="Most estimated floating-point work of one frequency analysis (points x cost of a point).",
    )
    max_model_error_cases: int = Field(
        default=DEFAULT_CAPS.max_model_error_cases,
        ge=1,
        description="Most loops of one analysis.model_error of /design (gain factors x extra dead times).",
    )
    max_model_error_work: int = Field(
        default=DEFAULT_CAPS.max_model_error_work,
        ge=1,
        description="Most estimated floating-point work of one analysis.model_error (cases x eigenvalues of a loop).",
    )
    max_identify_samples: int = Field(
        default=DEFAULT_CAPS.max_identify_samples,
        ge=20,
        description="Most samples per column of one POST /identify (after resampling).",
    )
    max_identify_work: int = Field(
        default=DEFAULT_CAPS.max_identify_work,
        ge=1,
        description="Most estimated work of one POST /identify (samples x fitted parameters x a fixed 2 000 "
        "simulated samples per parameter for the starts, iterations and Jacobians).",
    )

    max_body_bytes: int = Field(
        default=1_048_576, ge=1024, description="Largest request body in bytes; larger ones get 413."
    )
    max_batch_items: int = Field(default=100, ge=1, le=10_000, description="Most items in one batch.")
    answer_cache_bytes: int = Field(
        default=32 * 1024 * 1024,
        ge=0,
        description="Bytes of 200 answers each serving process keeps for requests repeated byte for byte "
        "(answered again without computing; 0 keeps none).",
    )
    request_timeout_seconds: float = Field(
        default=30.0,
        allow_inf_nan=False,
        gt=0,
        le=3600,
        description="Compute time limit of one request, queueing included.",
    )
    read_timeout_seconds: float = Field(
        default=15.0,
        allow_inf_nan=False,
        gt=0,
        le=600,
        description="A request must arrive whole (line, headers, body) within this time of its first byte; else 408.",
    )
    send_stall_seconds: float = Field(
        default=30.0,
        allow_inf_nan=False,
        gt=0,
        le=3600,
        description="A client that takes none of a response for this long is dropped (the socket's buffer stays "
        "full), so that it cannot hold its answer in memory.",
    )
    keep_alive_seconds: int = Field(
        default=5, ge=1, le=600, description="An idle kept-alive connection is closed after this time."
    )
    max_connections: int = Field(
        default=256, ge=1, le=100_000, description="Open connections per worker; past it a new one gets 503."
    )
    solver_processes: int | None = Field(
        default=None,
        ge=1,
        le=64,
        description="Light-lane solver processes per worker (each runs one computation at a time); "
        "default one per CPU it may use (its cores, within a container's CPU quota).",
    )
    heavy_solver_processes: int = Field(
        default=1, ge=1, le=64, description="Heavy-lane solver processes per worker (lower CPU priority)."
    )
    heavy_work: float = Field(
        default=HEAVY_WORK,
        gt=0,
        description="Estimated operations above which a request runs in the heavy lane.",
    )
    heavy_memory_bytes: int = Field(
        default=HEAVY_MEMORY_BYTES,
        ge=1024 * 1024,
        description="Estimated peak memory (bytes) above which a request runs in the heavy lane, so that the "
        "light lane's processes stay small.",
    )
    heavy_niceness: int = Field(
        default=HEAVY_NICENESS,
        ge=0,
        le=19,
        description="Niceness added to the heavy lane's solver processes, so that small requests get the CPU "
        "first while large ones run (0: the same priority as the light lane).",
    )
    heavy_queue: int = Field(
        default=8, ge=1, le=1000, description="Most heavy requests waiting for the heavy lane; more get 503."
    )
    cors_origins: Annotated[tuple[str, ...], NoDecode] = Field(
        default=(), description="Browser origins allowed by CORS, comma-separated; none by default."
    )
    api_keys: Annotated[tuple[SecretStr, ...], NoDecode] = Field(
        default=(), description="API keys, comma-separated; with none (and no file) there is no authentication."
    )
    api_keys_file: Path | None = Field(default=None, description="File of API keys, one per line.")

    _file_keys: tuple[str, ...] = PrivateAttr(default=())
    _caps: tuple[int, Caps | None] = PrivateAttr(default=(0, None))

    @field_validator("cors_origins", "api_keys", mode="before")
    @classmethod
    def _split(cls, value: Any) -> Any:
        return checks.split_list(value)

    @field_validator("cors_origins")
    @classmethod
    def _origins(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        return tuple(checks.check_origins(value))

    @field_validator("api_keys")
    @classmethod
    def _keys(cls, value: tuple[SecretStr, ...]) -> tuple[SecretStr, ...]:
        checks.check_keys((k.get_secret_value() for k in value), source="MOVECAST_API_KEYS")
        return value

    @field_validator("host")
    @classmethod
    def _host(cls, value: str) -> str:
        return checks.check_host(value)

    @field_validator("api_keys_file")
    @classmethod
    def _key_file(cls, value: Path | None) -> Path | None:
        # read here to name MOVECAST_API_KEYS_FILE in the error (a model validator's error names
        # no field); _read_key_file below keeps the keys
        if value is not None:
            checks.read_key_file(value)
        return value

    @field_validator("log_level", mode="before")
    @classmethod
    def _level(cls, value: Any) -> Any:
        return checks.check_log_level(value)

    @model_validator(mode="after")
    def _read_key_file(self) -> Settings:
        if self.api_keys_file is not None:
            self._file_keys = tuple(checks.read_key_file(self.api_keys_file))
        return self

    def api_key_values(self) -> tuple[str, ...]:
        """Every accepted API key (environment and file), without repeats; empty: no auth."""
        keys = [k.get_secret_value() for k in self.api_keys] + list(self._file_keys)
        return tuple(dict.fromkeys(keys))

    def caps(self) -> Caps:
        """The size caps handed to the pipeline (the settings' fields of the same names).

        Built once per settings object (they are frozen, and so is :class:`Caps`): every
        request asks for them.  The object's id goes with them, so a ``model_copy`` (which
        copies private attributes) builds its own.
        """
        owner, caps = self._caps
        if owner != id(self) or caps is None:
            caps = Caps(**{cap.name: getattr(self, cap.name) for cap in fields(Caps)})
            self._caps = (id(self), caps)
        return caps
