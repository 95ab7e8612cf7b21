"""Standard Webhooks signatures: ``webhook-id``, ``webhook-timestamp``, ``webhook-signature``.

A secret is written ``whsec_<base64 of 32 random bytes>``; the HMAC key is the decoded bytes
after the prefix. The signed content is ``"{id}.{timestamp}.{body}"`` and each signature is
``v1,<base64 HMAC-SHA256>``. During a rotation overlap the header carries one signature per
active secret, separated by spaces, as the specification allows, so receivers holding either
secret verify the message.
"""

from __future__ import annotations

import base64
import binascii
import hashlib
import hmac
import secrets as _random
from collections.abc import Iterable

SECRET_PREFIX = "whsec_"
SECRET_BYTES = 32


class BadSecret(ValueError):
    """A signing secret is not in the ``whsec_<base64>`` form."""


def new_secret() -> str:
    """Make a fresh random signing secret in the ``whsec_<base64>`` form."""
    return SECRET_PREFIX + base64.b64encode(_random.token_bytes(SECRET_BYTES)).decode("ascii")


def secret_key(secret: str) -> bytes:
    """The HMAC key of ``secret``: the base64-decoded bytes after the ``whsec_`` prefix."""
    encoded = secret[len(SECRET_PREFIX) :] if secret.startswith(SECRET_PREFIX) else secret
    try:
        key = base64.b64decode(encoded, validate=True)
    except (binascii.Error, ValueError):
        raise BadSecret("the signing secret is not base64 after the whsec_ prefix") from None
    if not key:
        raise BadSecret("the signing secret is empty")
    return key


def sign(secret: str, message_id: str, timestamp: int, body: bytes) -> str:
    """One ``v1,<base64>`` signature of ``body`` sent as ``message_id`` at ``timestamp``
    (unix seconds)."""
    signed = message_id.encode("utf-8") + b"." + str(int(timestamp)).encode("ascii") + b"." + body
    digest = hmac.new(secret_key(secret), signed, hashlib.sha256).digest()
    return "v1," + base64.b64encode(digest).decode("ascii")


def signature_header(secrets: Iterable[str], message_id: str, timestamp: int, body: bytes) -> str:
    """The ``webhook-signature`` value: one signature per active secret, space-separated."""
    return " ".join(sign(secret, message_id, timestamp, body) for secret in secrets)


def webhook_headers(
    secrets: Iterable[str], message_id: str, timestamp: int, body: bytes
) -> dict[str, str]:
    """The three Standard Webhooks headers for one attempt."""
    return {
        "webhook-id": message_id,
        "webhook-timestamp": str(int(timestamp)),
        "webhook-signature": signature_header(secrets, message_id, timestamp, body),
    }
