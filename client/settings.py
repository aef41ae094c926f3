"""The client commands' settings: where the server is and which key to send."""

from __future__ import annotations

from pydantic_settings import BaseSettings, SettingsConfigDict


class ClientSettings(BaseSettings):
    """What the client commands (upload, tune, board, ...) need to reach a server."""

    model_config = SettingsConfigDict(env_prefix="GROVEKEEPER_", extra="ignore")

    url: str = "http://127.0.0.1:8000"
    api_key: str | None = None
