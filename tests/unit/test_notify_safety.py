"""Which webhook targets are refused (SSRF protection)."""

from __future__ import annotations

import pytest

from service.notify.safety import UnsafeTargetError, check_target, pinned_url


def resolves_to(*addresses: str):
    def resolver(host: str, port: int) -> list[str]:
        return list(addresses)
    return resolver


def test_loopback_is_refused_unless_allowed() -> None:
    with pytest.raises(UnsafeTargetError, match="loopback"):
        check_target("http://127.0.0.1:8080/hook")
    with pytest.raises(UnsafeTargetError, match="loopback"):
        check_target("http://localhost:8080/hook")
    with pytest.raises(UnsafeTargetError, match="loopback"):
        check_target("http://[::1]/hook")
    allowed = check_target("http://127.0.0.1:8080/hook", allow_hosts={"127.0.0.1:8080"})
    assert allowed.address == "127.0.0.1" and allowed.allowed_by_name


@pytest.mark.parametrize("url", ["file:///etc/passwd", "ftp://hooks.larkspur.example/x",
                                 "gopher://hooks.larkspur.example/", "hooks.larkspur.example"])
def test_only_http_and_https(url: str) -> None:
    with pytest.raises(UnsafeTargetError, match="scheme"):
        check_target(url, resolver=resolves_to("93.184.215.14"))


@pytest.mark.parametrize(("address", "reason"), [
    ("10.1.2.3", "private"), ("192.168.0.10", "private"), ("172.16.5.4", "private"),
    ("169.254.169.254", "link-local"), ("0.0.0.0", "unspecified"), ("224.0.0.1", "multicast"),
    ("240.0.0.1", "reserved"), ("fe80::1", "link-local"), ("fc00::1", "private"),
    ("::ffff:127.0.0.1", "loopback"), ("100.64.0.1", "not globally routable"),
    # IPv6 addresses that carry an internal IPv4 one: 6to4 (RFC 3056), NAT64 (RFC 6052),
    # Teredo (RFC 4380; client 10.0.0.9 stored inverted in the last 32 bits).
    ("2002:a00:1::1", r"private \(embedded 10\.0\.0\.1\)"),
    ("2002:7f00:1::", r"loopback \(embedded 127\.0\.0\.1\)"),
    ("2002:a9fe:a9fe::1", "link-local"), ("64:ff9b::10.0.0.1", "private"),
    ("2001:0:4136:e378:8000:63bf:f5ff:fff6", r"private \(embedded 10\.0\.0\.9\)")])
def test_internal_addresses_are_refused(address: str, reason: str) -> None:
    with pytest.raises(UnsafeTargetError, match=reason):
        check_target("https://hooks.larkspur.example/inrush", resolver=resolves_to(address))


def test_one_internal_address_among_public_ones_is_enough_to_refuse() -> None:
    with pytest.raises(UnsafeTargetError, match=r"10\.0\.0\.7"):
        check_target("https://hooks.larkspur.example/",
                     resolver=resolves_to("93.184.215.14", "10.0.0.7"))


def test_public_address_passes_and_is_pinned() -> None:
    target = check_target("https://hooks.larkspur.example:8443/inrush?team=trails",
                          resolver=resolves_to("93.184.215.14"))
    url, headers, extensions = pinned_url(target)
    assert url == "https://93.184.215.14:8443/inrush?team=trails"
    assert headers == {"Host": "hooks.larkspur.example:8443"}
    assert extensions == {"sni_hostname": "hooks.larkspur.example"}
    ipv6 = check_target("http://hooks.larkspur.example/", resolver=resolves_to("2606:4700::1"))
    assert pinned_url(ipv6)[0] == "http://[2606:4700::1]/"


def test_unresolvable_host_and_credentials_are_refused() -> None:
    def fails(host: str, port: int) -> list[str]:
        raise OSError("Name or service not known")

    with pytest.raises(UnsafeTargetError, match="does not resolve"):
        check_target("https://nowhere.larkspur.example/", resolver=fails)
    with pytest.raises(UnsafeTargetError, match="credentials"):
        check_target("https://user:pw@hooks.larkspur.example/", resolver=resolves_to("8.8.8.8"))


def test_6to4_of_a_public_address_passes() -> None:
    target = check_target("https://hooks.larkspur.example/",
                          resolver=resolves_to("2002:5db8:d70e::1"))  # 93.184.215.14
    assert target.address == "2002:5db8:d70e::1"


@pytest.mark.parametrize("url", ["http://hooks.larkspur.example:0/x", "http://10.0.0.5:0/"])
def test_port_zero_is_refused(url: str) -> None:
    with pytest.raises(UnsafeTargetError, match="port 0"):
        check_target(url, allow_hosts={"10.0.0.5:*"}, resolver=resolves_to("93.184.215.14"))


def test_allow_list_is_by_host_name_and_port() -> None:
    internal = resolves_to("10.0.0.5")
    target = check_target("http://receiver.internal:9000/x",
                          allow_hosts={"receiver.internal:9000"}, resolver=internal)
    assert target.address == "10.0.0.5"
    # A bare host allows the http and https default ports only.
    for url in ("http://receiver.internal/x", "https://receiver.internal/x"):
        assert check_target(url, allow_hosts={"Receiver.Internal"}, resolver=internal)
    with pytest.raises(UnsafeTargetError, match=r"list receiver\.internal:9000"):
        check_target("http://receiver.internal:9000/x", allow_hosts={"receiver.internal"},
                     resolver=internal)
    with pytest.raises(UnsafeTargetError, match="private"):
        check_target("http://receiver.internal:9001/x",
                     allow_hosts={"receiver.internal:9000"}, resolver=internal)
    assert check_target("http://receiver.internal:9001/x", allow_hosts={"receiver.internal:*"},
                        resolver=internal)
    assert check_target("http://[fd00::5]:8080/x", allow_hosts={"[fd00::5]:8080"})
    with pytest.raises(UnsafeTargetError, match="private"):
        check_target("http://[fd00::5]:8080/x", allow_hosts={"fd00::5"})


def test_registration_accepts_names_that_do_not_resolve_yet() -> None:
    from service.notify.safety import check_registration

    def fails(host: str, port: int) -> list[str]:
        raise OSError("Name or service not known")

    assert check_registration("https://hooks.example.test/inrush", resolver=fails) is None
    with pytest.raises(UnsafeTargetError, match="private"):
        check_registration("https://hooks.larkspur.example/", resolver=resolves_to("10.9.8.7"))
    with pytest.raises(UnsafeTargetError, match="loopback"):
        check_registration("http://127.0.0.1:9000/", resolver=fails)
    with pytest.raises(UnsafeTargetError, match="scheme"):
        check_registration("file:///etc/hosts", resolver=fails)
