"""Settings of the REST service: one pydantic-settings object, read once at start-up.

Every field can be given to :class:`ServiceSettings` directly (tests, ``dipshape serve``
options) or as an environment variable ``DIPSHAPE_<FIELD>`` (upper case), e.g.
``DIPSHAPE_MAX_BODY_BYTES=8388608``. Options given on the command line win over the
environment, which wins over the defaults below.
"""

from __future__ import annotations

import ipaddress
from pathlib import Path
from typing import Annotated

from pydantic import Field, field_validator
from pydantic_settings import BaseSettings, NoDecode, SettingsConfigDict

__all__ = ["LOOPBACK_HOSTS", "ServiceSettings", "is_loopback"]

LOOPBACK_HOSTS = ("127.0.0.1", "::1", "localhost")
"""Addresses the service may bind without API keys."""


def is_loopback(host: str) -> bool:
    """Whether ``host`` is a loopback address (RFC 1122 §3.2.1.3 127/8, RFC 4291 ::1).

    Examples
    --------
    >>> is_loopback("127.0.0.1"), is_loopback("0.0.0.0"), is_loopback("localhost")
    (True, False, True)
    """
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


class ServiceSettings(BaseSettings):
    """Everything the service needs to know, with the defaults a single machine expects.

    Attributes
    ----------
    host, port : str, int
        Where ``dipshape serve`` listens.
    workers : int
        uvicorn worker processes (each loads the model once; scoring is CPU-bound, so about one
        per core).
    registry : Path or None
        Model registry folder (None: ``./models`` when present, else the shipped models).
    db : Path
        SQLite store of submitted labels and the optional score log.
    keys_file : Path or None
        API keys, one per line ``NAME ROLES SHA256`` (see :mod:`service.auth`).
    api_keys : str
        The same lines, separated by ``;``, from the environment (``DIPSHAPE_API_KEYS``).
    max_body_bytes : int
        Largest request body [bytes]; beyond it 413 (default 16 MiB).
    max_points : int
        Most points per segment; beyond it 422 ``too_many_points``.
    max_batch : int
        Most segments per batch request; beyond it 422 ``batch_too_large``.
    request_timeout_s : float
        Per-request scoring time limit [s]; beyond it 504 ``timeout``.
    max_concurrency : int
        Segments scored at once per worker process (threads).
    max_queue : int
        Requests allowed to wait for a scoring slot per worker; beyond it 503 ``overloaded``
        with ``Retry-After``.
    retry_after_s : int
        The ``Retry-After`` value [s] of an overload answer.
    cors_origins : list of str
        Origins allowed by CORS; empty (the default) leaves CORS off.
    score_log : bool
        Also record every result in the store.
    active_check_s : float
        How often [s] a worker re-reads the registry's ACTIVE file, so an activation made
        through any worker reaches all of them.
    """

    model_config = SettingsConfigDict(env_prefix="DIPSHAPE_", extra="forbid")

    host: str = "127.0.0.1"
    port: int = Field(8000, ge=0, le=65535)
    workers: int = Field(1, ge=1, le=64)
    registry: Path | None = None
    db: Path = Path("dipshape-store.sqlite")
    keys_file: Path | None = None
    api_keys: str = ""
    max_body_bytes: int = Field(16 * 1024 * 1024, ge=1024)
    max_points: int = Field(500_000, ge=20)
    max_batch: int = Field(256, ge=1)
    request_timeout_s: float = Field(60.0, gt=0)
    max_concurrency: int = Field(1, ge=1, le=64)
    max_queue: int = Field(64, ge=0)
    retry_after_s: int = Field(1, ge=1, le=3600)
    cors_origins: Annotated[list[str], NoDecode] = Field(default_factory=list)
    score_log: bool = False
    active_check_s: float = Field(1.0, ge=0)

    @field_validator("cors_origins", mode="before")
    @classmethod
    def _split_origins(cls, value: object) -> object:
        if isinstance(value, str):
            return [v.strip() for v in value.split(",") if v.strip()]
        return value
