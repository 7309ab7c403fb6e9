"""Tokens and Standard Webhooks signatures, checked against outside references."""

from __future__ import annotations

import base64
import shutil
import subprocess

import pytest

from service.security import (
    WebhookRejected,
    hash_token,
    new_token,
    new_webhook_secret,
    sign_webhook,
    token_lookup,
    tokens_match,
    verify_webhook,
)


def test_signature_matches_the_specifications_worked_example():
    # Standard Webhooks specification, example delivery (from memory): secret, id, timestamp
    # and body below give this signature.
    secret = "whsec_MfKQ9r8GKYqrTwjUPD8ILPZIo2LaLaSw"
    signature = sign_webhook(
        secret, "msg_p5jXN8AQM9LWM0D4loKWxJek", 1614265330, b'{"test": 2432232314}'
    )
    assert signature == "v1,g0hM9SsE+OTPJTGt/tmIKtSyZlE3uFJELVlNIOLJ1OE="


@pytest.mark.skipif(shutil.which("openssl") is None, reason="openssl not installed")
def test_signature_equals_openssl_hmac(tmp_path):
    # OpenSSL's HMAC-SHA256 (an independent implementation), as the README computes it.
    secret = new_webhook_secret()
    body = b'{"respondent_id": "v1", "answers": {"q01": 3}}'
    content = tmp_path / "content"
    content.write_bytes(b"msg_1.1700000000." + body)
    key_hex = base64.b64decode(secret.removeprefix("whsec_")).hex()
    digest = subprocess.run(
        ["openssl", "dgst", "-sha256", "-mac", "HMAC", "-macopt", f"hexkey:{key_hex}", "-binary",
         str(content)],
        check=True, capture_output=True, timeout=30,
    ).stdout
    expected = "v1," + base64.b64encode(digest).decode()
    assert sign_webhook(secret, "msg_1", 1700000000, body) == expected


def test_secret_form():
    secret = new_webhook_secret()
    assert secret.startswith("whsec_")
    assert len(base64.b64decode(secret.removeprefix("whsec_"))) == 32
    assert new_webhook_secret() != secret


def test_tokens_are_random_and_only_their_hash_is_needed():
    first, second = new_token(), new_token()
    assert first.token != second.token
    assert token_lookup(first.token) == first.lookup
    assert first.token_hash == hash_token(first.token) and len(first.token_hash) == 64
    assert first.token not in first.token_hash
    assert tokens_match(first.token, first.token_hash)
    assert not tokens_match(second.token, first.token_hash)
    assert token_lookup("not-a-token") is None
    assert token_lookup("hf_short_x") is None


def test_verify_accepts_and_refuses():
    secret, other = new_webhook_secret(), new_webhook_secret()
    body, now = b"{}", 1_700_000_000
    good = sign_webhook(secret, "m", now, body)
    verify_webhook([secret], "m", str(now), good, body, 300, now=now)
    verify_webhook([other, secret], "m", str(now), f"v1,bm90 {good}", body, 300, now=now)
    cases = [
        ([other], "m", str(now), good, body, now, "no signature matches"),
        ([secret], "m", str(now), good, b"{ }", now, "no signature matches"),
        ([secret], "x", str(now), good, body, now, "no signature matches"),
        ([secret], "m", str(now), good, body, now + 301, "seconds away"),
        ([secret], "m", str(now), good, body, now - 301, "seconds away"),
        ([secret], "m", "soon", good, body, now, "whole seconds"),
        ([secret], "m", str(now), "v2," + good[3:], body, now, "no v1 signature"),
        ([secret], None, str(now), good, body, now, r"missing header\(s\): webhook-id"),
    ]
    for secrets_, wid, stamp, signature, content, clock, message in cases:
        with pytest.raises(WebhookRejected, match=message):
            verify_webhook(secrets_, wid, stamp, signature, content, 300, now=clock)
    # Within the tolerance on both sides.
    verify_webhook([secret], "m", str(now), good, body, 300, now=now + 299)
    verify_webhook([secret], "m", str(now), good, body, 300, now=now - 299)
