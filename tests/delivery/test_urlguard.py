"""The SSRF guard: refused URLs with clear reasons, allow-lists, and pinned connections."""

from __future__ import annotations

import socket
import ssl
import subprocess

import pytest
from sqlalchemy import select

from rolewatch.delivery.outbox import enqueue_alerts
from rolewatch.delivery.subscriptions import create_subscription
from rolewatch.delivery.urlguard import UnsafeURL, check_url
from rolewatch.delivery.worker import deliver_due
from rolewatch.store.db import write_transaction
from rolewatch.store.schema import deliveries

from .conftest import delivery_settings, now_us


def fake_dns(table):
    """A resolver hook with getaddrinfo's signature answering from ``table`` (name -> addresses)."""

    def resolve(host, port, type=0, **_):
        if host not in table:
            raise socket.gaierror(socket.EAI_NONAME, "Name or service not known")
        family = {4: socket.AF_INET, 6: socket.AF_INET6}
        return [
            (family[6 if ":" in a else 4], socket.SOCK_STREAM, 6, "", (a, port))
            for a in table[host]
        ]

    return resolve


@pytest.mark.parametrize(
    ("url", "reason"),
    [
        ("http://127.0.0.1:8080/hook", "loopback"),  # http allowed, but no allow-list
        ("https://169.254.169.254/latest/meta-data/", "cloud metadata"),
        ("https://[fd00:ec2::254]/", "cloud metadata"),
        ("https://[::ffff:10.0.0.1]/hook", "IPv4-mapped form of 10.0.0.1, a private address"),
        ("https://[::1]/hook", "loopback"),
        ("https://10.1.2.3/hook", "private"),
        ("https://192.168.0.10/hook", "private"),
        ("https://100.64.0.1/hook", "shared (carrier-grade NAT)"),
        ("https://0.0.0.0/hook", "unspecified"),
        ("https://224.0.0.1/hook", "multicast"),
        ("https://240.0.0.1/hook", "reserved"),
        ("https://localhost/hook", "localhost resolves to 127.0.0.1, a loopback address"),
        ("ftp://files.example.org/hook", "scheme 'ftp' is not supported"),
        ("https://user:pw@hooks.example.org/hook", "user name or password"),
        ("https:///hook", "no host"),
        # 6to4, RFC 3056 section 2: 2002:V4ADDR::/48 carries the IPv4 address in bits 16-47.
        ("https://[2002:7f00:1::]/hook", "6to4 address carrying 127.0.0.1, a loopback"),
        ("https://[2002:a9fe:a9fe::1]/", "6to4 address carrying 169.254.169.254, a cloud"),
        ("https://[2002:5db8:d822::1]/", "a 6to4 address (carrying 93.184.216.34)"),
        # NAT64, RFC 6052 section 2.1: 64:ff9b::/96 carries it in the last 32 bits.
        ("https://[64:ff9b::7f00:1]/hook", "NAT64 address carrying 127.0.0.1, a loopback"),
        ("https://[64:ff9b::a00:1]/hook", "NAT64 address carrying 10.0.0.1, a private"),
        # Teredo, RFC 4380 section 4: 2001::/32, server IPv4 in bits 32-63, client IPv4
        # bit-inverted in the last 32 bits (0x80fffffe = NOT 127.0.0.1).
        ("https://[2001:0:5db8:d822:8000:63bf:80ff:fffe]/", "Teredo client address carrying 127"),
        ("https://[2001:0:a9fe:a9fe:8000:63bf:a2c7:2bdd]/", "Teredo server address carrying 169"),
    ],
)
def test_refused_urls_say_why(url, reason):
    with pytest.raises(UnsafeURL) as refused:
        check_url(url, allow_http=True)  # real DNS for "localhost"
    assert reason in str(refused.value)


def test_https_is_required_unless_allowed():
    with pytest.raises(UnsafeURL, match=r"must use https://.*webhook_allow_http"):
        check_url("http://8.8.8.8/hook", allow_http=False)
    assert check_url("http://8.8.8.8/hook", allow_http=True).addresses == ("8.8.8.8",)


def test_any_private_answer_refuses_the_name():
    # One public and one private answer: refused, because the sender could reach either.
    dns = fake_dns({"hooks.example.org": ["93.184.215.14", "10.0.0.7"]})
    with pytest.raises(UnsafeURL, match="resolves to 10.0.0.7, a private address"):
        check_url("https://hooks.example.org/x", allow_http=False, resolver=dns)
    public = fake_dns(
        {"hooks.example.org": ["93.184.215.14", "2606:2800:21f:cb07:6820:80da:af6b:8b2c"]}
    )
    checked = check_url("https://hooks.example.org/x?a=1", allow_http=False, resolver=public)
    assert checked.addresses == ("93.184.215.14", "2606:2800:21f:cb07:6820:80da:af6b:8b2c")
    assert checked.pinned_url() == "https://93.184.215.14:443/x?a=1"
    assert (
        checked.pinned_url(checked.addresses[1])
        == "https://[2606:2800:21f:cb07:6820:80da:af6b:8b2c]:443/x?a=1"
    )
    assert checked.host_header == "hooks.example.org"


def test_unresolvable_names_are_refused_clearly():
    with pytest.raises(UnsafeURL, match="does not resolve"):
        check_url("https://nowhere.invalid/x", allow_http=False, resolver=fake_dns({}))


def test_allow_list_by_host_address_or_range():
    assert check_url("http://127.0.0.1:9/x", allow_http=True, allow_hosts=["127.0.0.1"])
    assert check_url("http://127.0.0.5:9/x", allow_http=True, allow_hosts=["127.0.0.0/8"])
    assert check_url("https://localhost/x", allow_http=False, allow_hosts=["localhost"])
    assert check_url("https://[::ffff:10.0.0.1]/x", allow_http=False, allow_hosts=["10.0.0.0/8"])
    with pytest.raises(UnsafeURL):
        check_url("https://10.0.0.1/x", allow_http=False, allow_hosts=["10.0.1.0/24"])
    with pytest.raises(UnsafeURL):  # the name of another host does not allow this one
        check_url("https://localhost/x", allow_http=False, allow_hosts=["other.example"])


def test_subscription_time_check_refuses_before_storing(engine, db_url):
    strict = delivery_settings(db_url, webhook_allow_http=False, webhook_allow_hosts=[])
    for url in ("http://127.0.0.1/hook", "https://localhost/hook", "ftp://x.example/"):
        with pytest.raises(UnsafeURL):
            with write_transaction(engine) as connection:
                create_subscription(connection, strict, url=url, now_us=now_us())


def _certificate(tmp_path, name: str):
    """A self-signed certificate for ``name`` made with the openssl command line tool."""
    key, cert = tmp_path / "key.pem", tmp_path / "cert.pem"
    subprocess.run(
        [
            "openssl",
            "req",
            "-x509",
            "-newkey",
            "rsa:2048",
            "-nodes",
            "-days",
            "1",
            "-keyout",
            str(key),
            "-out",
            str(cert),
            "-subj",
            f"/CN={name}",
            "-addext",
            f"subjectAltName=DNS:{name}",
        ],
        check=True,
        capture_output=True,
    )
    return key, cert


def test_send_is_pinned_to_the_checked_address_with_tls_for_the_host_name(
    tmp_path, db_url, engine, receiver, make_alert
):
    # The name exists only in the injected resolver, so the request can only arrive if the
    # sender connected to the checked address itself; TLS must still verify the certificate
    # against the name (SNI and hostname check), and the Host header must carry the name.
    name = "receiver.rolewatch.test"
    key, cert = _certificate(tmp_path, name)
    context = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    context.load_cert_chain(cert, key)
    hook = receiver(ssl_context=context).start()
    dns = fake_dns({name: ["127.0.0.1"]})
    settings = delivery_settings(
        db_url,
        webhook_allow_http=False,
        webhook_allow_hosts=[name],
        delivery_ca_bundle=str(cert),
    )
    with write_transaction(engine) as connection:
        create_subscription(
            connection,
            settings,
            url=f"https://{name}:{hook.port}/hook",
            now_us=now_us(),
            resolver=dns,
        )
    alert = make_alert()
    with write_transaction(engine) as connection:
        enqueue_alerts(connection, settings, [alert])
    report = deliver_due(engine, settings, resolver=dns)
    assert report.delivered == 1
    assert hook.received[0].headers["host"] == f"{name}:{hook.port}"

    # A certificate for another name fails verification: the pin does not weaken TLS.
    (tmp_path / "other").mkdir()
    other_key, other_cert = _certificate(tmp_path / "other", "someone-else.test")
    other = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    other.load_cert_chain(other_cert, other_key)
    impostor = receiver(ssl_context=other).start()
    wrong = delivery_settings(
        db_url,
        webhook_allow_http=False,
        webhook_allow_hosts=[name],
        delivery_ca_bundle=str(other_cert),
    )
    with write_transaction(engine) as connection:
        made = create_subscription(
            connection,
            wrong,
            url=f"https://{name}:{impostor.port}/hook",
            now_us=now_us(),
            resolver=dns,
        )
    alert = make_alert(account="m-00050")
    with write_transaction(engine) as connection:
        enqueue_alerts(connection, wrong, [alert])
    report = deliver_due(engine, wrong, resolver=dns)
    assert report.delivered == 0 and impostor.received == []
    with engine.connect() as connection:
        error = connection.execute(
            select(deliveries.c.last_error).where(
                deliveries.c.subscription_id == made.subscription["id"]
            )
        ).scalar_one()
    assert "certificate" in error.lower() and name in error


def test_send_falls_back_to_the_next_checked_address(db_url, engine, receiver, make_alert):
    # 127.0.0.2 refuses (the receiver listens on 127.0.0.1 only); the second answer works.
    hook = receiver().start()
    dns = fake_dns({"hooks.rolewatch.test": ["127.0.0.2", "127.0.0.1"]})
    settings = delivery_settings(db_url, webhook_allow_hosts=["127.0.0.0/8"])
    with write_transaction(engine) as connection:
        create_subscription(
            connection,
            settings,
            url=f"http://hooks.rolewatch.test:{hook.port}/x",
            now_us=now_us(),
            resolver=dns,
        )
    alert = make_alert()
    with write_transaction(engine) as connection:
        enqueue_alerts(connection, settings, [alert])
    assert deliver_due(engine, settings, resolver=dns).delivered == 1
    assert hook.received[0].headers["host"] == f"hooks.rolewatch.test:{hook.port}"
