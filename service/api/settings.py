"""Service settings: one frozen class, built explicitly (never at import time)."""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass, replace
from pathlib import Path

# Relative to the current working directory of the process that starts the service, so
# `python -m service serve` run from the checkout keeps its archive in ./var/.
DEFAULT_DATABASE_URL = "sqlite:///./var/bioparity.sqlite3"

ENVIRONMENT_PREFIX = "BIOPARITY_"


@dataclass(frozen=True)
class ServiceSettings:
    """Everything the HTTP service needs to know, with defaults suitable for one machine.

    database_url     SQLAlchemy URL of the archive; default an SQLite file ./var/bioparity.sqlite3
                     relative to the current directory (the directory is created on first use).
    max_body_bytes   largest accepted request body (checked on Content-Length and on bytes read).
    max_records      largest number of rows (records plus profile points) in one request.
    page_size        default `limit` of GET /v1/analyses; max_page_size is its upper bound.
    submitter        the name archived with each record until requests carry an identity.
    busy_timeout_ms  how long an SQLite writer waits for the lock before failing.
    max_work         cap on replicates × subjects × analysed metrics of one analysis (422 above).
    max_compute_seconds  wall-clock cap on computing one result (the bootstrap stops; 422).
    require_keys     refuse every /v1 call while the archive holds no active API key (set by
                     `serve` on a non-loopback address, so revoking the last key never opens it).
    max_planning_total  the largest total a sample-size search tries (BIOPARITY_MAX_PLANNING_TOTAL,
                     default 10 000; a target not reached by then is a 422).
    warm_up          run a tiny analysis at start-up so the compiled kernels are loaded before
                     the service reports ready (BIOPARITY_WARM_UP, default true).
    bootstrap_threads  cap on the threads one bootstrap uses (BIOPARITY_BOOTSTRAP_THREADS;
                     default 0 = the cores this process may use).

    Browser pages (service.api.pages); each field is read from BIOPARITY_ + its name in capitals:
    session_idle_seconds      a browser session ends after this long without a request
                              (BIOPARITY_SESSION_IDLE_SECONDS, default 7200 = 2 h).
    session_absolute_seconds  and this long after sign-in, however busy
                              (BIOPARITY_SESSION_ABSOLUTE_SECONDS, default 43200 = 12 h).
    behind_https     the service is reached over HTTPS (a TLS proxy in front): cookies are marked
                     Secure and take the __Host- prefix (BIOPARITY_BEHIND_HTTPS, default false).
    sign_in_attempts         failed sign-ins allowed from one client address within ...
    sign_in_window_seconds   ... this many seconds; further attempts get 429 until the oldest
                             failure leaves the window (BIOPARITY_SIGN_IN_ATTEMPTS, default 10;
                             BIOPARITY_SIGN_IN_WINDOW_SECONDS, default 600).
    """

    database_url: str = DEFAULT_DATABASE_URL
    max_body_bytes: int = 10 * 1024 * 1024
    max_records: int = 200_000
    page_size: int = 50
    max_page_size: int = 500
    submitter: str = "unauthenticated"
    busy_timeout_ms: int = 10_000
    max_work: int = 200_000_000
    max_compute_seconds: float = 120.0
    require_keys: bool = False
    warm_up: bool = True
    max_planning_total: int = 10_000
    bootstrap_threads: int = 0
    session_idle_seconds: int = 2 * 3600
    session_absolute_seconds: int = 12 * 3600
    behind_https: bool = False
    sign_in_attempts: int = 10
    sign_in_window_seconds: int = 600

    def __post_init__(self) -> None:
        for name in ("session_idle_seconds", "session_absolute_seconds", "sign_in_attempts",
                     "sign_in_window_seconds"):
            if getattr(self, name) < 1:
                raise ValueError(f"{name} must be at least 1, got {getattr(self, name)}")
        if self.bootstrap_threads < 0:
            raise ValueError(f"bootstrap_threads must be 0 (all cores) or more, got "
                             f"{self.bootstrap_threads}")
        if self.max_work < 1:
            raise ValueError(f"max_work must be at least 1, got {self.max_work}")
        if not self.max_compute_seconds > 0:
            raise ValueError(
                f"max_compute_seconds must be positive, got {self.max_compute_seconds}"
            )
        if self.max_body_bytes < 1:
            raise ValueError(f"max_body_bytes must be at least 1, got {self.max_body_bytes}")
        if self.max_records < 1:
            raise ValueError(f"max_records must be at least 1, got {self.max_records}")
        if not 1 <= self.page_size <= self.max_page_size:
            raise ValueError(
                f"page_size must lie in 1..max_page_size ({self.max_page_size}), "
                f"got {self.page_size}"
            )
        if not self.submitter.strip():
            raise ValueError("submitter must be a non-empty name")

    @classmethod
    def from_cli(cls, db: str | None) -> ServiceSettings:
        """Settings for `serve --db VALUE`; without --db, the environment or the default applies."""
        base = cls.from_env()
        if db is None:
            return base
        return replace(base, database_url=database_url_from_argument(db))

    @classmethod
    def from_env(cls, environ: Mapping[str, str] | None = None) -> ServiceSettings:
        """Read BIOPARITY_DATABASE_URL, BIOPARITY_MAX_BODY_BYTES, ... (for --factory workers)."""
        env = os.environ if environ is None else environ
        values: dict[str, str | int | float | bool] = {}
        for name, kind in _FIELD_KINDS.items():
            raw = env.get(ENVIRONMENT_PREFIX + name.upper())
            if raw is None or raw == "":
                continue
            variable = ENVIRONMENT_PREFIX + name.upper()
            if kind is int:
                try:
                    values[name] = int(raw)
                except ValueError:
                    raise ValueError(f"{variable} must be an integer, got {raw!r}") from None
            elif kind is float:
                try:
                    values[name] = float(raw)
                except ValueError:
                    raise ValueError(f"{variable} must be a number, got {raw!r}") from None
            elif kind is bool:
                if raw.lower() not in _BOOLEANS:
                    raise ValueError(f"{variable} must be true or false, got {raw!r}")
                values[name] = _BOOLEANS[raw.lower()]
            else:
                values[name] = raw
        if "database_url" in values:
            values["database_url"] = database_url_from_argument(str(values["database_url"]))
        return cls(**values)  # type: ignore[arg-type]


_FIELD_KINDS: dict[str, type] = {
    "database_url": str,
    "max_body_bytes": int,
    "max_records": int,
    "page_size": int,
    "max_page_size": int,
    "submitter": str,
    "busy_timeout_ms": int,
    "max_work": int,
    "max_compute_seconds": float,
    "require_keys": bool,
    "warm_up": bool,
    "max_planning_total": int,
    "bootstrap_threads": int,
    "session_idle_seconds": int,
    "session_absolute_seconds": int,
    "behind_https": bool,
    "sign_in_attempts": int,
    "sign_in_window_seconds": int,
}

_BOOLEANS = {"1": True, "true": True, "yes": True, "0": False, "false": False, "no": False}


def database_url_from_argument(value: str) -> str:
    """A SQLAlchemy URL passes through; a plain file path becomes sqlite:///ABSOLUTE-PATH."""
    if "://" in value:
        return value
    return "sqlite:///" + str(Path(value).expanduser().resolve())
