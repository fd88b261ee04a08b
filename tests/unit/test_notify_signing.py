"""Webhook signatures against the Standard Webhooks specification."""

from __future__ import annotations

import base64
import hashlib
import hmac

import pytest

from service.notify import signing

# The specification's own worked example (Standard Webhooks, reference library test suite;
# from memory): secret, message id, timestamp and payload with the signature it publishes.
SPEC_SECRET = "whsec_MfKQ9r8GKYqrTwjUPD8ILPZIo2LaLaSw"
SPEC_ID = "msg_p5jXN8AQM9LWM0D4loKWxJek"
SPEC_TIMESTAMP = 1614265330
SPEC_BODY = b'{"test": 2432232314}'
SPEC_SIGNATURE = "v1,g0hM9SsE+OTPJTGt/tmIKtSyZlE3uFJELVlNIOLJ1OE="

# Our own vector, computed with Python's hmac module per the Standard Webhooks spec:
# key = b"larkspur-trails-key" (secret "whsec_" + base64 of it), signed content
# b"inrush-alert-7-t12.1793404800." + body, HMAC-SHA256, base64.
OWN_SECRET = "whsec_bGFya3NwdXItdHJhaWxzLWtleQ=="
OWN_ID = "inrush-alert-7-t12"
OWN_TIMESTAMP = 1793404800
OWN_BODY = b'{"type":"alert.opened"}'
OWN_SIGNATURE = "v1,a752n4YHbk2jlmdfJzi/UyQnw9HxkE45FY/oq2sL3+E="


def independent_signature(secret: str, msg_id: str, timestamp: int, body: bytes) -> str:
    """The spec's recipe written out with the standard library alone."""
    key = base64.b64decode(secret.removeprefix("whsec_"))
    content = msg_id.encode() + b"." + str(timestamp).encode() + b"." + body
    return "v1," + base64.b64encode(hmac.new(key, content, hashlib.sha256).digest()).decode()


def test_published_example_of_the_specification() -> None:
    assert signing.sign(SPEC_SECRET, SPEC_ID, SPEC_TIMESTAMP, SPEC_BODY) == SPEC_SIGNATURE


def test_own_vector_and_independent_computation() -> None:
    assert signing.sign(OWN_SECRET, OWN_ID, OWN_TIMESTAMP, OWN_BODY) == OWN_SIGNATURE
    assert independent_signature(OWN_SECRET, OWN_ID, OWN_TIMESTAMP, OWN_BODY) == OWN_SIGNATURE
    body = b'{"experiment":"route-cards","arm":"cards","excess":897.5}'
    assert (signing.sign(OWN_SECRET, "evt", 1, body)
            == independent_signature(OWN_SECRET, "evt", 1, body))


def test_key_is_the_decoded_part_and_plain_secrets_are_their_bytes() -> None:
    assert signing.secret_key(OWN_SECRET) == b"larkspur-trails-key"
    assert signing.secret_key("shared-trail-secret") == b"shared-trail-secret"
    with pytest.raises(signing.SignatureError):
        signing.secret_key("whsec_not*base64")


def test_generated_secrets_are_fresh_and_well_formed() -> None:
    one, two = signing.generate_secret(), signing.generate_secret()
    assert one != two and one.startswith("whsec_")
    assert len(signing.secret_key(one)) == 32


def headers_for(timestamp: int, signature: str) -> dict[str, str]:
    return {"webhook-id": OWN_ID, "webhook-timestamp": str(timestamp),
            "webhook-signature": signature}


def test_verify_accepts_valid_and_rotated_signatures() -> None:
    assert signing.verify(OWN_SECRET, headers_for(OWN_TIMESTAMP, OWN_SIGNATURE), OWN_BODY,
                          now=OWN_TIMESTAMP + 10)
    rotated = "v1,c29tZXRoaW5nLWVsc2U= " + OWN_SIGNATURE
    assert signing.verify(OWN_SECRET, headers_for(OWN_TIMESTAMP, rotated), OWN_BODY,
                          now=OWN_TIMESTAMP)


def test_verify_rejects_tampering_wrong_key_and_stale_timestamps() -> None:
    good = headers_for(OWN_TIMESTAMP, OWN_SIGNATURE)
    assert not signing.verify(OWN_SECRET, good, OWN_BODY + b" ", now=OWN_TIMESTAMP)
    assert not signing.verify("whsec_" + base64.b64encode(b"other").decode(), good, OWN_BODY,
                              now=OWN_TIMESTAMP)
    assert not signing.verify(OWN_SECRET, good, OWN_BODY, now=OWN_TIMESTAMP + 301)
    assert not signing.verify(OWN_SECRET, good, OWN_BODY, now=OWN_TIMESTAMP - 301)
    assert signing.verify(OWN_SECRET, good, OWN_BODY, now=OWN_TIMESTAMP + 299)
    assert not signing.verify(OWN_SECRET, headers_for(OWN_TIMESTAMP, "v2," + OWN_SIGNATURE[3:]),
                              OWN_BODY, now=OWN_TIMESTAMP)


def test_verify_names_missing_or_malformed_headers() -> None:
    with pytest.raises(signing.SignatureError, match="webhook-signature"):
        signing.verify(OWN_SECRET, {"webhook-id": "x", "webhook-timestamp": "1"}, b"")
    with pytest.raises(signing.SignatureError, match="unix seconds"):
        signing.verify(OWN_SECRET, headers_for(0, OWN_SIGNATURE) | {"webhook-timestamp": "soon"},
                       b"")


def test_headers_carry_id_timestamp_and_signature() -> None:
    out = signing.headers(OWN_SECRET, OWN_ID, OWN_TIMESTAMP, OWN_BODY)
    assert out == {"webhook-id": OWN_ID, "webhook-timestamp": str(OWN_TIMESTAMP),
                   "webhook-signature": OWN_SIGNATURE}
    assert "webhook-signature" not in signing.headers(None, OWN_ID, OWN_TIMESTAMP, OWN_BODY)
