"""Where the live page listens: `--view [HOST:]PORT`, and whether that is loopback only.

Kept apart from the server so the command line can check the option without importing the
web stack.
"""

from __future__ import annotations

import ipaddress
from dataclasses import dataclass

from station.errors import Refused

LOOPBACK_NAMES = {"localhost"}


@dataclass(frozen=True)
class ViewAddress:
    host: str
    port: int

    @property
    def loopback(self) -> bool:
        return is_loopback(self.host)


def is_loopback(host: str) -> bool:
    if host.lower() in LOOPBACK_NAMES:
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False   # a host name other than localhost may resolve anywhere


def parse_address(text: str, option: str = "--view") -> ViewAddress:
    """`PORT` (loopback), `HOST:PORT`, or `[IPv6]:PORT`. Refused with how to write it."""
    value = text.strip()
    if value.startswith("["):
        host, _, rest = value[1:].partition("]")
        port_text = rest[1:] if rest.startswith(":") else ""
    elif value.count(":") == 1:
        host, _, port_text = value.partition(":")
    elif ":" not in value:
        host, port_text = "127.0.0.1", value
    else:
        host, port_text = "", ""
    if not host or not port_text.isdigit() or not 0 <= int(port_text) <= 65535:
        raise Refused(f"{option} {text!r}: give PORT or HOST:PORT, e.g. {option} 8080 (loopback) or "
                      f"{option} 0.0.0.0:8080 (every address, with a token); IPv6 as [::1]:8080")
    return ViewAddress(host, int(port_text))
