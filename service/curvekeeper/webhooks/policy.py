"""Where a webhook may point: http(s) URLs whose host resolves only to addresses that are
neither link-local (169.254.0.0/16, fe80::/10) nor a cloud-metadata service, unless the
``webhook_allow_link_local`` setting says otherwise. Loopback and private addresses are
allowed (on-site relays). Checked when the webhook is made and again before each send
(a name may resolve elsewhere later)."""

from __future__ import annotations

import ipaddress
import socket
from collections.abc import Callable, Iterable
from urllib.parse import urlsplit

#: host names of cloud metadata services
METADATA_HOSTS = frozenset({"metadata.google.internal", "metadata.goog", "metadata", "instance-data",
                            "instance-data.ec2.internal", "metadata.azure.com"})
#: metadata addresses outside the link-local ranges (AWS IPv6, Alibaba, Oracle ranges are link-local)
METADATA_ADDRESSES = frozenset({ipaddress.ip_address("fd00:ec2::254"), ipaddress.ip_address("100.100.100.200")})

Resolver = Callable[[str], Iterable[str]]


class Refused(ValueError):
    """The URL may not be used; the message says why."""


def resolve(host: str) -> list[str]:
    """The addresses ``host`` resolves to (standard library ``socket.getaddrinfo``)."""
    return sorted({str(info[4][0]) for info in socket.getaddrinfo(host, None, proto=socket.IPPROTO_TCP)})


def refused_address(addr: str) -> str | None:
    """Why ``addr`` (an IP address text) is refused, or None when it is allowed."""
    ip = ipaddress.ip_address(addr.split("%", 1)[0])
    if isinstance(ip, ipaddress.IPv6Address) and ip.ipv4_mapped is not None:
        ip = ip.ipv4_mapped
    if ip in METADATA_ADDRESSES:
        return f"{addr} is a cloud-metadata address"
    if ip.is_link_local:
        return f"{addr} is a link-local address"
    return None


def check(url: str, *, allow_link_local: bool, resolver: Resolver = resolve) -> list[str]:
    """The addresses ``url``'s host resolves to (with ``resolver``; the host itself when it
    is an address), or ``Refused`` when the URL may not receive webhooks."""
    parts = urlsplit(url)
    if parts.scheme not in ("http", "https") or not parts.hostname:
        raise Refused("a webhook URL is http:// or https:// with a host")
    host = parts.hostname.rstrip(".").lower()
    if host in METADATA_HOSTS and not allow_link_local:
        raise Refused(f"{host} is a cloud-metadata host")
    try:
        addrs = [str(ipaddress.ip_address(host))]
    except ValueError:
        try:
            addrs = list(resolver(host))
        except OSError as exc:
            raise Refused(f"{host} does not resolve: {exc}") from exc
    if not addrs:
        raise Refused(f"{host} resolves to no address")
    for a in addrs:
        why = None if allow_link_local else refused_address(a)
        if why:
            raise Refused(why)
    return addrs
