"""Which webhook targets the service may call: public http(s) addresses only.

A target is checked when it is registered and again before every delivery, because a name
can be re-pointed at an internal address after registration (DNS rebinding). The delivery then
connects to the very address that passed the check (see :func:`pinned_url`), so a second
lookup cannot swap it. Hosts named in ``INRUSH_WEBHOOK_ALLOW_HOSTS`` skip the address check
(receivers on the same network, tests). Redirects are never followed.
"""

from __future__ import annotations

import ipaddress
import socket
from collections.abc import Callable, Collection
from dataclasses import dataclass
from urllib.parse import SplitResult, urlsplit, urlunsplit

IPAddress = ipaddress.IPv4Address | ipaddress.IPv6Address
Resolver = Callable[[str, int], list[str]]
ALLOWED_SCHEMES = ("http", "https")


class UnsafeTargetError(ValueError):
    """The webhook URL may not be called; the message says why."""


@dataclass(frozen=True, slots=True)
class CheckedTarget:
    """A URL that passed the check and the address to connect to."""

    url: str
    host: str
    port: int
    address: str
    allowed_by_name: bool


def system_resolver(host: str, port: int) -> list[str]:
    """Every address ``host`` resolves to (IPv4 and IPv6)."""
    infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)
    return list(dict.fromkeys(str(info[4][0]) for info in infos))


def forbidden_reason(address: IPAddress) -> str | None:
    """Why ``address`` is not a public unicast address, or ``None`` when it is."""
    if isinstance(address, ipaddress.IPv6Address) and address.ipv4_mapped is not None:
        return forbidden_reason(address.ipv4_mapped)
    checks = (("unspecified", address.is_unspecified), ("loopback", address.is_loopback),
              ("link-local", address.is_link_local), ("multicast", address.is_multicast),
              ("reserved", address.is_reserved), ("private", address.is_private))
    for name, hit in checks:
        if hit:
            return name
    if not address.is_global:  # e.g. shared address space 100.64.0.0/10
        return "not globally routable"
    return None


def parse_target(url: str) -> tuple[SplitResult, str, int]:
    """Split ``url`` and check its form: scheme, host, port, no credentials."""
    try:
        parts = urlsplit(url.strip())
        port = parts.port
    except ValueError as error:
        raise UnsafeTargetError(f"the URL is malformed: {error}") from None
    scheme = parts.scheme.lower()
    if scheme not in ALLOWED_SCHEMES:
        raise UnsafeTargetError(f"scheme {parts.scheme or '(none)'!r} is not allowed; use "
                                "http or https")
    host = (parts.hostname or "").rstrip(".").lower()
    if not host:
        raise UnsafeTargetError("the URL has no host")
    if parts.username is not None or parts.password is not None:
        raise UnsafeTargetError("credentials in the URL are not allowed; sign with the secret "
                                "instead")
    return parts, host, port or (443 if scheme == "https" else 80)


def check_target(url: str, *, allow_hosts: Collection[str] = (),
                 resolver: Resolver = system_resolver) -> CheckedTarget:
    """Check ``url`` and pick the address to connect to; raise :class:`UnsafeTargetError`.

    Every address the host resolves to must be public (a name with one internal address among
    public ones is refused: which one a client connects to is not ours to choose).
    """
    _, host, port = parse_target(url)
    allowed = host in {h.lower() for h in allow_hosts}
    try:
        literal: IPAddress | None = ipaddress.ip_address(host)
    except ValueError:
        literal = None
    if literal is not None:
        addresses = [str(literal)]
    else:
        try:
            addresses = resolver(host, port)
        except (OSError, UnicodeError) as error:
            raise UnsafeTargetError(f"host {host!r} does not resolve: {error}") from None
        if not addresses:
            raise UnsafeTargetError(f"host {host!r} does not resolve to any address")
    if not allowed:
        for text in addresses:
            reason = forbidden_reason(ipaddress.ip_address(text.split("%", 1)[0]))
            if reason is not None:
                raise UnsafeTargetError(
                    f"host {host!r} resolves to {text}, a {reason} address; webhooks go to "
                    "public addresses only (list the host in INRUSH_WEBHOOK_ALLOW_HOSTS to "
                    "allow it)")
    return CheckedTarget(url=url.strip(), host=host, port=port, address=addresses[0],
                         allowed_by_name=allowed)


def check_registration(url: str, *, allow_hosts: Collection[str] = (),
                       resolver: Resolver = system_resolver) -> CheckedTarget | None:
    """The check when a webhook is registered; ``None`` when the name does not resolve yet.

    Form, scheme and addresses are checked as at delivery. A name that does not resolve now
    (a receiver not deployed yet, a resolver unreachable from the service) is accepted: every
    delivery checks it again and refuses it then if it points inward.
    """
    _, host, port = parse_target(url)
    try:
        ipaddress.ip_address(host)
    except ValueError:
        try:
            resolver(host, port)
        except (OSError, UnicodeError):
            return None
    return check_target(url, allow_hosts=allow_hosts, resolver=resolver)


def pinned_url(target: CheckedTarget) -> tuple[str, dict[str, str], dict[str, str]]:
    """``(url, headers, extensions)`` that connect to ``target.address``.

    The URL's host is replaced by the checked address; ``Host`` keeps the name, and for https
    the TLS server name (SNI and certificate check) stays the name through httpx's
    ``sni_hostname`` request extension.
    """
    parts = urlsplit(target.url)
    address = ipaddress.ip_address(target.address.split("%", 1)[0])
    shown = f"[{address}]" if address.version == 6 else str(address)
    netloc = f"{shown}:{parts.port}" if parts.port else shown
    url = urlunsplit((parts.scheme, netloc, parts.path or "/", parts.query, ""))
    host_header = target.host if not parts.port else f"{target.host}:{parts.port}"
    if ":" in target.host and not target.host.startswith("["):
        host_header = f"[{target.host}]" + (f":{parts.port}" if parts.port else "")
    extensions = {"sni_hostname": target.host} if parts.scheme.lower() == "https" else {}
    return url, {"Host": host_header}, extensions
