"""Which webhook targets the service may call: public http(s) addresses only.

A target is checked when it is registered and again before every delivery, because a name
can be re-pointed at an internal address after registration (DNS rebinding). The delivery then
connects to the very address that passed the check (see :func:`pinned_url`), so a second
lookup cannot swap it. Redirects are never followed.

``INRUSH_WEBHOOK_ALLOW_HOSTS`` exempts receivers on your own network from the address check,
each entry on some ports only: ``HOST`` on ports 80 and 443 (the http and https defaults),
``HOST:PORT`` on that port, ``HOST:*`` on any port (``[ADDRESS]:PORT`` for IPv6 literals).
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


_NAT64 = ipaddress.IPv6Network("64:ff9b::/96")  # RFC 6052: the IPv4 address in the low bits
DEFAULT_ALLOWED_PORTS = (80, 443)


def embedded_ipv4(address: ipaddress.IPv6Address) -> ipaddress.IPv4Address | None:
    """The IPv4 address an IPv6 one carries, and through which a packet may reach it:
    IPv4-mapped, 6to4 (2002::/16, RFC 3056), Teredo's client (RFC 4380) and NAT64's
    well-known prefix."""
    if address.ipv4_mapped is not None:
        return address.ipv4_mapped
    if address.sixtofour is not None:
        return address.sixtofour
    if address.teredo is not None:
        return address.teredo[1]
    if address in _NAT64:
        return ipaddress.IPv4Address(int(address) & 0xFFFFFFFF)
    return None


def forbidden_reason(address: IPAddress) -> str | None:
    """Why ``address`` is not a public unicast address, or ``None`` when it is."""
    if isinstance(address, ipaddress.IPv6Address):
        inner = embedded_ipv4(address)
        if inner is not None:
            reason = forbidden_reason(inner)
            return None if reason is None else f"{reason} (embedded {inner})"
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
    if port == 0:
        raise UnsafeTargetError("port 0 is not a port one can connect to")
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
    allowed = host_allowed(host, port, allow_hosts)
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
                    f"public addresses only (list {host}:{port} in "
                    "INRUSH_WEBHOOK_ALLOW_HOSTS to allow it)")
    return CheckedTarget(url=url.strip(), host=host, port=port, address=addresses[0],
                         allowed_by_name=allowed)


def host_allowed(host: str, port: int, allow_hosts: Collection[str]) -> bool:
    """Whether an entry of ``allow_hosts`` (``HOST``, ``HOST:PORT``, ``HOST:*``) names this
    host on this port; a bare ``HOST`` allows ports 80 and 443 only."""
    for entry in allow_hosts:
        name, ports = split_allow_entry(entry)
        if name == host and (ports is None or port in ports):
            return True
    return False


def split_allow_entry(entry: str) -> tuple[str, tuple[int, ...] | None]:
    """``(host, ports)`` of an allow-list entry; ``None`` ports: any.

    Example:
        >>> split_allow_entry("Hooks.Internal:8080"), split_allow_entry("[fd00::5]:*")
        (('hooks.internal', (8080,)), ('fd00::5', None))
        >>> split_allow_entry("hooks.internal")
        ('hooks.internal', (80, 443))
    """
    text = entry.strip().lower()
    if text.startswith("["):
        name, _, rest = text[1:].partition("]")
        port = rest.removeprefix(":") if rest.startswith(":") else ""
    elif text.count(":") == 1:
        name, _, port = text.partition(":")
    else:  # a bare name, or a bare IPv6 literal
        name, port = text, ""
    name = name.rstrip(".")
    if port == "*":
        return name, None
    if port.isdigit() and 0 < int(port) < 65536:
        return name, (int(port),)
    return name, DEFAULT_ALLOWED_PORTS if not port else ()


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
