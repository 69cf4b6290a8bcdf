"""Where a webhook may point. Checked at creation and again on the resolved address at every
delivery, so that a name which later resolves elsewhere does not slip through."""

from __future__ import annotations

import ipaddress
import socket
from urllib.parse import urlsplit

METADATA = {
    ipaddress.ip_address("169.254.169.254"),
    ipaddress.ip_address("fd00:ec2::254"),
    ipaddress.ip_address("100.100.100.200"),
}


class UnsafeUrl(ValueError):
    """A webhook URL that must not be called."""


def _port(scheme: str, port: int | None) -> int:
    return port or (443 if scheme == "https" else 80)


def check(
    url: str, *, allow_private: bool, own: tuple[str, int] | None, resolve: bool = True
) -> list[str]:
    """Refuse unsafe URLs; return the resolved addresses when `resolve`."""
    parts = urlsplit(url)
    if parts.scheme not in ("http", "https") or not parts.hostname:
        raise UnsafeUrl("the URL must be http(s)://host[:port]/path")
    if parts.username or parts.password:
        raise UnsafeUrl("the URL must not carry credentials")
    port = _port(parts.scheme, parts.port)
    if not resolve:
        return []
    try:
        infos = socket.getaddrinfo(parts.hostname, port, type=socket.SOCK_STREAM)
    except socket.gaierror as exc:
        raise UnsafeUrl(f"the host {parts.hostname!r} does not resolve") from exc
    addresses = sorted({str(info[4][0]) for info in infos})
    for text in addresses:
        ip = ipaddress.ip_address(text.split("%")[0])
        if isinstance(ip, ipaddress.IPv6Address) and ip.ipv4_mapped:
            ip = ip.ipv4_mapped
        if ip in METADATA or ip.is_link_local:
            raise UnsafeUrl(f"{parts.hostname} resolves to a link-local or metadata address")
        local = (ip.is_loopback or ip.is_private) and not ip.is_unspecified
        if ip.is_unspecified or ((ip.is_multicast or ip.is_reserved) and not local):
            raise UnsafeUrl(f"{parts.hostname} resolves to an address that cannot be called")
        if (
            own is not None
            and port == own[1]
            and (ip.is_loopback or text == own[0] or own[0] in ("0.0.0.0", "::"))
        ):
            raise UnsafeUrl("the URL points at this service itself")
        if not allow_private and local:
            raise UnsafeUrl(
                f"{parts.hostname} resolves to a loopback or private address, refused while "
                "BELATED_WEBHOOK_PRIVATE is off"
            )
    return addresses
