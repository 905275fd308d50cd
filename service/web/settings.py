"""All settings of the web service in one object, read from ``RAMIFORM_*`` environment variables."""

from __future__ import annotations

from pathlib import Path

from pydantic import Field, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

from service.cpus import usable_cpus


class Settings(BaseSettings):
    """Configuration of one service instance.

    Every field is read from the environment variable ``RAMIFORM_<FIELD NAME>``; several
    instances that share ``database_url`` and ``data_dir`` serve the same specimens.
    """

    model_config = SettingsConfigDict(env_prefix="RAMIFORM_", extra="ignore")

    data_dir: Path = Field(Path("data"), description="folder for stored images, overlays and plots")
    database_url: str | None = Field(
        None, description="SQLAlchemy URL; default: SQLite file ramiform.db in the data folder"
    )
    library_dir: Path | None = Field(None, description="reference set folder; default: the bundled set")
    max_upload_mb: float = Field(50.0, gt=0, description="largest accepted request body, in MiB")
    max_pixels: int = Field(100_000_000, gt=0, description="largest decoded image, in pixels")
    api_keys: str = Field("", description='"lab-a:KEY,lab-b:KEY" turns access control on')
    workers: int | None = Field(
        None, ge=0, description="analysis processes (default: one per usable CPU; 0 runs analyses in threads)"
    )
    secret_key: str | None = Field(None, description="key signing page cookies; default: derived from api_keys")

    @field_validator("database_url", "secret_key", mode="before")
    @classmethod
    def _blank_is_unset(cls, value: object) -> object:
        return None if isinstance(value, str) and not value.strip() else value

    @property
    def resolved_database_url(self) -> str:
        """The database URL in use (the default SQLite file when none is set)."""
        if self.database_url:
            return self.database_url
        return f"sqlite:///{(self.data_dir / 'ramiform.db').resolve()}"

    @property
    def max_upload_bytes(self) -> int:
        return int(self.max_upload_mb * 1024 * 1024)

    @property
    def worker_count(self) -> int:
        """Processes in the analysis pool (0: analyses run in threads of this process)."""
        if self.workers is None:
            return usable_cpus()
        return self.workers

    @property
    def keys_by_lab(self) -> dict[str, str]:
        """``{lab: key}`` parsed from ``api_keys``; empty when access control is off."""
        labs: dict[str, str] = {}
        for entry in filter(None, (part.strip() for part in self.api_keys.split(","))):
            lab, sep, key = entry.partition(":")
            if not sep or not lab.strip() or not key.strip():
                raise ValueError(f"RAMIFORM_API_KEYS entries must read 'lab:key', got {entry!r}")
            labs[lab.strip()] = key.strip()
        return labs
