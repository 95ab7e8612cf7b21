"""Refuse webhook URLs that would let a subscriber make this service reach inside its network.

A URL is checked when a subscription is made (the API answers 422 with the reason) and again
before every send, because DNS answers change. Every address the host resolves to must be
public unless the operator allow-listed the host name, the address or a range containing it
(``webhook_allow_hosts``). The sender then connects to an address that was checked (the
request is *pinned*), so a second, different DNS answer cannot slip past the check.
"""

from __future__ import annotations

import ipaddress
import socket
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from urllib.parse import urlsplit

from rolewatch.config import Settings

IPAddress = ipaddress.IPv4Address | ipaddress.IPv6Address
Resolver = Callable[..., list]

#: Cloud instance metadata endpoints, named in the error so operators see why.
METADATA_ADDRESSES = frozenset(
    {ipaddress.ip_address("169.254.169.254"), ipaddress.ip_address("fd00:ec2::254")}
)
#: Shared address space for carrier-grade NAT (RFC 6598); not "private" to Python.
SHARED_ADDRESS_SPACE = ipaddress.ip_network("100.64.0.0/10")
#: IPv6 ranges that embed an IPv4 address (see ``_embedded_ipv4``).
SIX_TO_FOUR = ipaddress.ip_network("2002::/16")  # RFC 3056
NAT64_PREFIX = ipaddress.ip_network("64:ff9b::/96")  # RFC 6052 well-known prefix


class UnsafeURL(ValueError):
    """The webhook URL may not be used; the message says why and what to do."""


@dataclass(frozen=True)
class CheckedURL:
    """A webhook URL that passed the guard, with the addresses that were checked."""

    url: str
    scheme: str
    host: str  # as written in the URL, lower case, without brackets
    port: int
    target: str  # path and query, at least "/"
    addresses: tuple[str, ...]  # every resolved address; all passed the check

    @property
    def host_header(self) -> str:
        """The Host header value the receiver expects."""
        default = 443 if self.scheme == "https" else 80
        host = f"[{self.host}]" if ":" in self.host else self.host
        return host if self.port == default else f"{host}:{self.port}"

    def pinned_url(self, address: str | None = None) -> str:
        """The URL with its host replaced by a checked address (bracketed for IPv6)."""
        address = address or self.addresses[0]
        literal = f"[{address}]" if ":" in address else address
        return f"{self.scheme}://{literal}:{self.port}{self.target}"

    @property
    def is_ip_literal(self) -> bool:
        """True when the URL names an address rather than a host name."""
        return _parse_ip(self.host) is not None


def _parse_ip(text: str) -> IPAddress | None:
    try:
        return ipaddress.ip_address(text)
    except ValueError:
        return None


def _embedded_ipv4(address: ipaddress.IPv6Address) -> list[tuple[str, ipaddress.IPv4Address]]:
    """The IPv4 addresses an IPv6 address carries inside it, each with the form's name."""
    found = []
    if address in SIX_TO_FOUR and address.sixtofour is not None:
        # RFC 3056 section 2: 2002:V4ADDR::/48, the IPv4 address in bits 16-47.
        found.append(("6to4", address.sixtofour))
    if address in NAT64_PREFIX:
        # RFC 6052 section 2.1-2.2: the well-known prefix 64:ff9b::/96, IPv4 in the last 32 bits.
        found.append(("NAT64", ipaddress.IPv4Address(int(address) & 0xFFFF_FFFF)))
    if address.teredo is not None:
        # RFC 4380 section 4: 2001::/32, the Teredo server's IPv4 in bits 32-63 and the
        # client's, bit-inverted, in the last 32 bits (ipaddress undoes the inversion).
        server, client = address.teredo
        found += [("Teredo server", server), ("Teredo client", client)]
    return found


def blocked_reason(address: IPAddress) -> str | None:
    """Why ``address`` must not be reached, or None when it is an ordinary public address.

    IPv6 addresses that carry an IPv4 address (IPv4-mapped, 6to4, NAT64, Teredo) are judged
    by the IPv4 address as well; 6to4 is refused whole (its relays are deprecated, RFC 7526).
    """
    if isinstance(address, ipaddress.IPv6Address):
        mapped = address.ipv4_mapped
        if mapped is not None:
            inner = blocked_reason(mapped)
            return f"the IPv4-mapped form of {mapped}, {inner}" if inner else None
        for form, inner_address in _embedded_ipv4(address):
            inner = blocked_reason(inner_address)
            if inner:
                return f"a {form} address carrying {inner_address}, {inner}"
        if address in SIX_TO_FOUR:
            return f"a 6to4 address (carrying {address.sixtofour}); 6to4 is deprecated"
    if address in METADATA_ADDRESSES:
        return "a cloud metadata address"
    if address.is_loopback:
        return "a loopback address"
    if address.is_unspecified:
        return "the unspecified address"
    if address.is_link_local:
        return "a link-local address"
    if address.is_multicast:
        return "a multicast address"
    if isinstance(address, ipaddress.IPv4Address) and address in SHARED_ADDRESS_SPACE:
        return "a shared (carrier-grade NAT) address"
    if address.is_reserved:
        return "a reserved address"
    if address.is_private:
        return "a private address"
    if not address.is_global:
        return "a non-public address"
    return None


def _allowed(host: str, address: IPAddress, allow_hosts: Sequence[str]) -> bool:
    for entry in allow_hosts:
        entry = entry.strip().lower()
        if not entry:
            continue
        try:
            network = ipaddress.ip_network(entry, strict=False)
        except ValueError:
            if entry == host:
                return True
            continue
        candidates = [address]
        if isinstance(address, ipaddress.IPv6Address) and address.ipv4_mapped is not None:
            candidates.append(address.ipv4_mapped)
        if any(c.version == network.version and c in network for c in candidates):
            return True
    return False


def resolve(host: str, port: int, resolver: Resolver | None = None) -> tuple[str, ...]:
    """Every address ``host`` resolves to (TCP), in resolver order, without duplicates."""
    resolver = resolver or socket.getaddrinfo
    try:
        infos = resolver(host, port, type=socket.SOCK_STREAM)
    except (socket.gaierror, UnicodeError) as error:
        raise UnsafeURL(f"the host {host!r} does not resolve ({error}); check the URL") from None
    addresses: list[str] = []
    for info in infos:
        # getaddrinfo may append an IPv6 zone ("fe80::1%eth0"); keep the address part.
        text = str(info[4][0]).split("%", 1)[0]
        if text not in addresses:
            addresses.append(text)
    if not addresses:
        raise UnsafeURL(f"the host {host!r} resolves to no address; check the URL")
    return tuple(addresses)


def check_url(
    url: str,
    *,
    allow_http: bool,
    allow_hosts: Sequence[str] = (),
    resolver: Resolver | None = None,
) -> CheckedURL:
    """Parse, resolve and check a webhook URL; raise ``UnsafeURL`` with a clear reason."""
    if not isinstance(url, str) or not url.strip():
        raise UnsafeURL("the webhook URL is empty")
    if any(ord(ch) < 0x21 or ord(ch) == 0x7F for ch in url):
        raise UnsafeURL("the webhook URL contains spaces or control characters")
    try:
        parts = urlsplit(url)
        port = parts.port
    except ValueError as error:
        raise UnsafeURL(f"the webhook URL is malformed ({error})") from None
    scheme = parts.scheme.lower()
    if scheme not in ("http", "https"):
        raise UnsafeURL(
            f"the webhook URL scheme {scheme or '(none)'!r} is not supported: use https://"
        )
    if scheme == "http" and not allow_http:
        raise UnsafeURL(
            "the webhook URL must use https:// (plain http is allowed only when the operator "
            "sets webhook_allow_http)"
        )
    if parts.username is not None or parts.password is not None:
        raise UnsafeURL("the webhook URL must not carry a user name or password")
    host = (parts.hostname or "").lower().rstrip(".")
    if not host:
        raise UnsafeURL("the webhook URL has no host")
    port = port or (443 if scheme == "https" else 80)
    target = parts.path or "/"
    if parts.query:
        target += "?" + parts.query

    literal = _parse_ip(host)
    addresses = (str(literal),) if literal is not None else resolve(host, port, resolver)
    for text in addresses:
        address = ipaddress.ip_address(text)
        reason = blocked_reason(address)
        if reason and not _allowed(host, address, allow_hosts):
            where = f"{host} resolves to {text}, " if literal is None else f"{text} is "
            raise UnsafeURL(
                f"the webhook URL is refused: {where}{reason}. Use a public address, or ask "
                "the operator to add the host or its range to webhook_allow_hosts"
            )
    return CheckedURL(
        url=url, scheme=scheme, host=host, port=port, target=target, addresses=addresses
    )


def check_url_for(url: str, settings: Settings, resolver: Resolver | None = None) -> CheckedURL:
    """``check_url`` with the operator's settings (allow http, allow-listed hosts)."""
    return check_url(
        url,
        allow_http=settings.webhook_allow_http,
        allow_hosts=settings.webhook_allow_hosts,
        resolver=resolver,
    )
