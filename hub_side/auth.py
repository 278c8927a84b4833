"""Proof of a shared secret for the hello, with no secret on the wire (challenge-response).

When the hub holds a secret, a hello without proof is refused with a fresh random challenge.
The host answers with HMAC-SHA256(secret, "host|" + challenge + "|" + session); the hub checks
it (each challenge is good for one try) and proves itself back with the same over "hub|...",
so the host also knows it reached the right robot. HMAC is written out here (RFC 2104) because
MicroPython has hashlib.sha256 but no hmac module; the host uses this same code.
"""

import hashlib

try:
    from os import urandom as _random_bytes

    _random_bytes(1)
    STRONG_RANDOM = True
except (ImportError, AttributeError, NotImplementedError, OSError):  # a port without os.urandom
    # The listener refuses a secret here: predictable challenges would let a recorded hello be
    # replayed. The fallback only keeps hubs without a secret importable.
    import random

    def _random_bytes(n):
        return bytes(random.getrandbits(8) for _ in range(n))

    STRONG_RANDOM = False


_BLOCK = 64  # SHA-256 block size in bytes (RFC 2104 "B")


def hmac_sha256(key, message):
    if len(key) > _BLOCK:
        key = hashlib.sha256(key).digest()
    key = key + bytes(_BLOCK - len(key))
    inner = hashlib.sha256(bytes(b ^ 0x36 for b in key))
    inner.update(message)
    outer = hashlib.sha256(bytes(b ^ 0x5C for b in key))
    outer.update(inner.digest())
    return outer.digest()


def new_challenge():
    return "".join("%02x" % b for b in _random_bytes(16))


def proof(secret, role, challenge, session):
    """Hex proof that `role` ("host" or "hub") knows the secret, bound to this challenge and session."""
    message = ("%s|%s|%s" % (role, challenge, session)).encode()
    return "".join("%02x" % b for b in hmac_sha256(secret.encode(), message))


def same(a, b):
    """Compare two proofs in time independent of where they differ."""
    if not isinstance(a, str) or not isinstance(b, str) or len(a) != len(b):
        return False
    diff = 0
    for x, y in zip(a, b):
        diff |= ord(x) ^ ord(y)
    return diff == 0
