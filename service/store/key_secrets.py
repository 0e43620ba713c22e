"""How API key secrets are stored: only their SHA-256, compared in constant time.

Secrets are 256-bit random values, so a fast hash is enough; a slow password KDF
protects low-entropy secrets and would only add latency here.
"""

import hashlib
import hmac


def secret_hash(secret: str) -> str:
    return hashlib.sha256(secret.encode()).hexdigest()


def secret_matches(secret: str, stored_hash: str) -> bool:
    return hmac.compare_digest(secret_hash(secret).encode(), stored_hash.encode())
