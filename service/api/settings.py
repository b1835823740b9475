"""Service settings, read from the environment (prefix ``MOVECAST_``) by pydantic-settings."""

from __future__ import annotations

from pydantic import Field
from pydantic_settings import BaseSettings, SettingsConfigDict

from service.schemas.common import Caps

__all__ = ["Settings"]


class Settings(BaseSettings):
    """Everything an operator can set; every field maps to ``MOVECAST_<NAME>``."""

    model_config = SettingsConfigDict(env_prefix="MOVECAST_", extra="ignore", frozen=True)

    host: str = Field(default="127.0.0.1", description="Address to listen on.")
    port: int = Field(default=8000, ge=1, le=65535, description="TCP port to listen on.")
    workers: int = Field(default=1, ge=1, le=64, description="Worker processes.")
    log_level: str = Field(default="info", description="Log level of the service.")

    max_states: int = Field(default=500, ge=1, description="Largest state count accepted.")
    max_signals: int = Field(default=100, ge=1, description="Most inputs or outputs accepted.")
    max_prediction_horizon: int = Field(default=2000, ge=1, description="Longest Hp accepted.")
    max_hessian_size: int = Field(default=4000, ge=1, description="Largest Hu*m accepted.")
    max_prediction_entries: int = Field(
        default=25_000_000, ge=1, description="Most entries of the prediction matrices [Fx Fu G]."
    )
    max_response_entries: int = Field(
        default=2_000_000, ge=1, description="Most entries of the horizon gain in a response."
    )

    def caps(self) -> Caps:
        """The size caps handed to the schema layer."""
        return Caps(
            max_states=self.max_states,
            max_signals=self.max_signals,
            max_prediction_horizon=self.max_prediction_horizon,
            max_hessian_size=self.max_hessian_size,
            max_prediction_entries=self.max_prediction_entries,
            max_response_entries=self.max_response_entries,
        )
