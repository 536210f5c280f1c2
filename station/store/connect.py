"""Opening the store: a libpq URL or conninfo, with the password never shown.

Credentials come from the URL (`postgresql://user:pw@host/db`), or, as libpq does it, from
the standard PG* environment variables, ~/.pgpass or a service file (`service=NAME`). The
station never writes the URL into a datalog or a log: every message names the store by
`shown(url)`, which drops the password, and any text from the driver passes `scrub()`.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from station.errors import Refused, StationError

if TYPE_CHECKING:
    import psycopg

CONNECT_TIMEOUT_S = 5


class StoreError(StationError):
    """The store could not be reached or refused a write (exit 1); the folders keep everything."""


class StoreRefused(Refused):
    """A store URL or a store that the station will not use (exit 2)."""


def _params(url: str) -> dict[str, str]:
    from psycopg.conninfo import conninfo_to_dict

    try:
        return {k: str(v) for k, v in conninfo_to_dict(url).items() if v is not None}
    except Exception:
        raise StoreRefused("--store: not a PostgreSQL URL or conninfo (give e.g. "
                           "postgresql://user@host:5432/dbname, or service=NAME)") from None


def shown(url: str) -> str:
    """The store as it may be printed: host, port, database and user, never a password."""
    params = _params(url)
    if "service" in params and "host" not in params:
        return f"service={params['service']}"
    user = f"{params['user']}@" if "user" in params else ""
    host = params.get("host", "(libpq default)")
    port = f":{params['port']}" if "port" in params else ""
    return f"postgresql://{user}{host}{port}/{params.get('dbname', '')}"


def scrub(text: str, url: str) -> str:
    """`text` with the URL's password (if any) blanked out, for driver messages."""
    try:
        password = _params(url).get("password")
    except StoreRefused:
        return text.replace(url, "<store URL>")
    text = text.replace(url, shown(url))
    return text.replace(password, "***") if password else text


def connect(url: str, autocommit: bool = False, timeout_s: int = CONNECT_TIMEOUT_S) -> psycopg.Connection:
    """A connection, or StoreError naming the store (without its password) and the cause."""
    import psycopg

    _params(url)          # a URL that does not parse is refused, not sent
    try:
        return psycopg.connect(url, autocommit=autocommit, connect_timeout=timeout_s,
                               application_name="ampscreen-station")
    except psycopg.Error as exc:
        reason = scrub(str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__, url)
        raise StoreError(f"cannot reach the store {shown(url)}: {reason}") from None
