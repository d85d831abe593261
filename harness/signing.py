"""Signed certificates: Ed25519 (RFC 8032) signatures with the `cryptography` package.

What is signed
--------------
The certificate document WITHOUT its ``signature`` key, serialised by
`harness.certificate.canonical_json` (keys sorted, compact separators, UTF-8). The
signature block is then added::

    "signature": {
        "algorithm": "Ed25519",
        "signed": "canonical JSON of the certificate without this block",
        "public_key": "<base64 of the 32 raw public-key bytes>",
        "public_key_fingerprint": "<SHA-256 hex of the 32 raw public-key bytes>",
        "value": "<base64 of the 64-byte signature>"
    }

and the whole certificate is written in canonical form. Verification (`verify_certificate`)
checks that the file is byte for byte the canonical form of what it contains (so that no
byte can change without changing the document: ``1e-05`` and ``1E-05`` parse alike),
removes the block, re-canonicalises and verifies the signature with the trusted public key
(``--key``) or, without one, with the embedded key, whose fingerprint the user then
compares with the station's published fingerprint. Because the certificate carries the
SHA-256 of the raw capture and of the profile, the signature covers them too.

Keys
----
``harness keys new --out keys/line-1`` writes ``keys/line-1.key`` (PKCS#8 PEM, created
with mode 0600, owner only; refused if it exists) and ``keys/line-1.pub``
(SubjectPublicKeyInfo PEM, to publish). A private key readable by group or others is
refused when signing. Station file::

    [signing]
    private_key = "keys/line-1.key"     # relative to the station file
"""

from __future__ import annotations

import base64
import copy
import hashlib
import json
import os
import stat
from dataclasses import dataclass
from pathlib import Path

from harness.errors import ConfigError

ALGORITHM = "Ed25519"
SIGNED_TEXT = "canonical JSON of the certificate without this block"


@dataclass(frozen=True)
class SigningConfig:
    """The ``[signing]`` section of a station file."""

    private_key: Path
    source: str | None = None


def parse_config(table, *, base_dir: Path, station_id: str, backend: str) -> SigningConfig:
    """Validate a station's ``[signing]`` table: ``private_key`` (path, relative to the
    station file). The key file itself is read (and its permissions checked) when a
    certificate is signed, so a station file can name a key not created yet."""
    table.check_known(("private_key",))
    raw = table.str("private_key")
    if not raw.strip():
        raise table.error("private_key", "must name the private key file")
    p = Path(raw).expanduser()
    return SigningConfig(private_key=p if p.is_absolute() else Path(base_dir) / p, source=table.file)


# --------------------------------------------------------------------------------------
# keys
# --------------------------------------------------------------------------------------
def _raw_public(public_key) -> bytes:
    from cryptography.hazmat.primitives import serialization

    return public_key.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)


def fingerprint(public_key) -> str:
    """SHA-256 (hex) of the 32 raw bytes of an Ed25519 public key."""
    return hashlib.sha256(_raw_public(public_key)).hexdigest()


def _write_exclusive(path: Path, data: bytes, mode: int) -> None:
    # O_EXCL: never overwrite a key; the mode is applied at creation (no readable window)
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
    try:
        os.write(fd, data)
        os.fsync(fd)
    finally:
        os.close(fd)
    os.chmod(path, mode)   # in case the umask removed bits we want (never adds access)


def new_keypair(out: str | Path) -> tuple[Path, Path, str]:
    """Create an Ed25519 key pair: ``OUT.key`` (private, mode 0600) and ``OUT.pub``.

    Returns ``(private_path, public_path, fingerprint)``. Refuses (ConfigError) when
    either file exists: a station key is never replaced silently.
    """
    from cryptography.hazmat.primitives import serialization
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

    out = Path(out)
    if out.suffix in (".key", ".pub"):
        out = out.with_suffix("")
    priv_path, pub_path = out.with_name(out.name + ".key"), out.with_name(out.name + ".pub")
    for p in (priv_path, pub_path):
        if p.exists():
            raise ConfigError(str(p), None, "exists already: a station key is never overwritten "
                                            "(move it away first if you really mean to replace it)")
    out.parent.mkdir(parents=True, exist_ok=True)
    key = Ed25519PrivateKey.generate()
    pem = key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                            serialization.NoEncryption())
    pub = key.public_key().public_bytes(serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo)
    _write_exclusive(priv_path, pem, 0o600)
    _write_exclusive(pub_path, pub, 0o644)
    return priv_path, pub_path, fingerprint(key.public_key())


def load_private_key(path: str | Path):
    """An Ed25519 private key from a PEM file that only its owner can read."""
    from cryptography.hazmat.primitives import serialization
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

    path = Path(path)
    try:
        st = path.stat()
    except FileNotFoundError:
        raise ConfigError(str(path), "signing.private_key",
                          "private key not found (create the station's key pair with "
                          f"'harness keys new --out {path.with_suffix('')}')") from None
    if os.name == "posix" and st.st_mode & (stat.S_IRWXG | stat.S_IRWXO):
        raise ConfigError(str(path), "signing.private_key",
                          f"private key is accessible by group or others (mode {stat.S_IMODE(st.st_mode):04o}): "
                          "chmod 600 it (and consider it compromised if others could read it)")
    try:
        key = serialization.load_pem_private_key(path.read_bytes(), password=None)
    except (ValueError, TypeError) as exc:
        raise ConfigError(str(path), "signing.private_key", f"not an unencrypted PEM private key ({exc})") from None
    if not isinstance(key, Ed25519PrivateKey):
        raise ConfigError(str(path), "signing.private_key", f"not an Ed25519 key ({type(key).__name__})")
    return key


def load_public_key(path: str | Path):
    """An Ed25519 public key from a PEM file (``.pub`` of `new_keypair`), or from the
    private key file (its public half)."""
    from cryptography.hazmat.primitives import serialization
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

    path = Path(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise ConfigError(str(path), None, "public key file not found") from None
    try:
        key = serialization.load_pem_public_key(data)
    except ValueError:
        try:
            priv = serialization.load_pem_private_key(data, password=None)
        except (ValueError, TypeError) as exc:
            raise ConfigError(str(path), None, f"not a PEM public key ({exc})") from None
        if not isinstance(priv, Ed25519PrivateKey):
            raise ConfigError(str(path), None, "not an Ed25519 key") from None
        key = priv.public_key()
    if not isinstance(key, Ed25519PublicKey):
        raise ConfigError(str(path), None, f"not an Ed25519 public key ({type(key).__name__})")
    return key


# --------------------------------------------------------------------------------------
# sign and verify
# --------------------------------------------------------------------------------------
def signed_bytes(cert: dict) -> bytes:
    """The bytes the signature covers: the canonical JSON of `cert` without ``signature``."""
    from harness.certificate import canonical_json

    return canonical_json({k: v for k, v in cert.items() if k != "signature"})


def sign_certificate(cert: dict, private_key) -> dict:
    """A copy of `cert` with its ``signature`` block (see the module docstring).

    `private_key` is an Ed25519PrivateKey or a path to its PEM file.
    """
    if not hasattr(private_key, "sign"):
        private_key = load_private_key(private_key)
    doc = copy.deepcopy({k: v for k, v in cert.items() if k != "signature"})
    sig = private_key.sign(signed_bytes(doc))
    pub = private_key.public_key()
    doc["signature"] = {"algorithm": ALGORITHM, "signed": SIGNED_TEXT,
                        "public_key": base64.b64encode(_raw_public(pub)).decode("ascii"),
                        "public_key_fingerprint": fingerprint(pub),
                        "value": base64.b64encode(sig).decode("ascii")}
    return doc


def sign_for_station(cert: dict, config: SigningConfig) -> dict:
    """Sign with the station's key (`measure_unit` calls this before writing the JSON)."""
    return sign_certificate(cert, load_private_key(config.private_key))


@dataclass
class SignatureCheck:
    """Outcome of `verify_signature`.

    ``ok`` is True when the signature verifies; ``trusted`` when it verified with a key the
    caller supplied (not only the key embedded in the certificate); ``problems`` names
    every problem found; ``fingerprint`` is the fingerprint of the key used.
    """

    ok: bool
    trusted: bool
    fingerprint: str | None
    problems: list[str]


def verify_signature(cert_bytes: bytes, public_key=None) -> SignatureCheck:
    """Check a certificate file's signature.

    Parameters
    ----------
    cert_bytes : bytes
        The certificate file exactly as stored.
    public_key : Ed25519PublicKey, path, or None
        The trusted key of the station. None: the key embedded in the certificate
        (checked against its fingerprint); the result is then not ``trusted``.
    """
    from cryptography.exceptions import InvalidSignature
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

    from harness.certificate import canonical_json

    problems: list[str] = []
    try:
        doc = json.loads(cert_bytes.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        return SignatureCheck(False, False, None, [f"certificate: not valid JSON ({exc})"])
    if not isinstance(doc, dict):
        return SignatureCheck(False, False, None, ["certificate: not a JSON object"])
    try:
        canonical = canonical_json(doc)
    except (TypeError, ValueError) as exc:
        return SignatureCheck(False, False, None, [f"certificate: cannot be put in canonical form ({exc})"])
    if canonical != cert_bytes:
        i = next((k for k, (a, b) in enumerate(zip(canonical, cert_bytes)) if a != b),
                 min(len(canonical), len(cert_bytes)))
        problems.append(f"certificate: the file is not in the canonical form it was written in "
                        f"(first difference at byte {i}): it was altered")
    sig = doc.get("signature")
    if not isinstance(sig, dict):
        return SignatureCheck(False, False, None, problems + ["signature: the certificate is not signed"])
    # the block itself is not signed: it must be exactly what sign_certificate writes
    if set(sig) != {"algorithm", "signed", "public_key", "public_key_fingerprint", "value"}:
        problems.append(f"signature: unexpected keys {sorted(set(sig) ^ {'algorithm', 'signed', 'public_key', 'public_key_fingerprint', 'value'})}")
    if sig.get("signed") != SIGNED_TEXT:
        problems.append(f"signature.signed: {sig.get('signed')!r}, expected {SIGNED_TEXT!r}")
    if sig.get("algorithm") != ALGORITHM:
        return SignatureCheck(False, False, None, problems + [f"signature.algorithm: {sig.get('algorithm')!r}, "
                                                              f"expected {ALGORITHM!r}"])
    try:
        value = base64.b64decode(str(sig.get("value")), validate=True)
        embedded_raw = base64.b64decode(str(sig.get("public_key")), validate=True)
        embedded = Ed25519PublicKey.from_public_bytes(embedded_raw)
    except (ValueError, TypeError) as exc:
        return SignatureCheck(False, False, None, problems + [f"signature: malformed ({exc})"])
    if hashlib.sha256(embedded_raw).hexdigest() != sig.get("public_key_fingerprint"):
        problems.append("signature.public_key_fingerprint: does not match the embedded public key")
    trusted = public_key is not None
    if public_key is None:
        key = embedded
    else:
        key = public_key if hasattr(public_key, "verify") else load_public_key(public_key)
        if fingerprint(key) != sig.get("public_key_fingerprint"):
            problems.append(f"signature: signed by key {sig.get('public_key_fingerprint')}, "
                            f"not by the given key {fingerprint(key)}")
    ok = True
    try:
        key.verify(value, signed_bytes(doc))
    except InvalidSignature:
        ok = False
        problems.append("signature: does NOT verify: the certificate was changed after signing "
                        "(or signed by another key)")
    return SignatureCheck(ok and not problems, trusted, fingerprint(key), problems)


@dataclass
class Verification:
    """Outcome of `verify_certificate`: ``ok`` when every check passed."""

    ok: bool
    signature: SignatureCheck
    problems: list[str]
    checked: list[str]


def verify_certificate(cert_path: str | Path, *, public_key=None, profile_path=None,
                       require_signature: bool = True) -> Verification:
    """Verify a certificate: its signature, the raw capture's SHA-256, and every figure
    recomputed from the raw capture and the profile (`harness.certificate.recompute`).

    Returns every difference found, each named; ``ok`` when there are none.
    """
    from harness.certificate import recompute
    from harness.errors import HarnessError

    cert_path = Path(cert_path)
    try:
        data = cert_path.read_bytes()
    except FileNotFoundError:
        raise ConfigError(str(cert_path), None, "file not found") from None
    problems: list[str] = []
    checked: list[str] = []
    sc = verify_signature(data, public_key)
    if sc.problems and not (sc.problems == ["signature: the certificate is not signed"] and not require_signature):
        problems += sc.problems
    if sc.ok:
        checked.append(f"signature: Ed25519, key fingerprint {sc.fingerprint}"
                       + ("" if sc.trusted else " (embedded key: compare it with the station's published fingerprint)"))
    try:
        doc = json.loads(data.decode("utf-8"))
        raw_name = doc["raw"]["file"]
        raw_sha = doc["raw"]["sha256"]
    except (UnicodeDecodeError, ValueError, KeyError, TypeError):
        problems.append("certificate: no raw capture named (raw.file / raw.sha256)")
        return Verification(False, sc, problems, checked)
    raw_path = cert_path.parent / str(raw_name)
    try:
        raw = raw_path.read_bytes()
    except OSError:
        problems.append(f"raw: capture {raw_path.name} not found beside the certificate")
        return Verification(False, sc, problems, checked)
    if hashlib.sha256(raw).hexdigest() != raw_sha:
        problems.append(f"raw: SHA-256 of {raw_path.name} does not match the certificate: the raw capture "
                        "was changed or replaced")
        return Verification(False, sc, problems, checked)
    checked.append(f"raw capture: SHA-256 matches ({raw_path.name})")
    try:
        diffs = recompute(cert_path, profile_path)
    except HarnessError as exc:
        diffs = [f"recompute: {exc}"]
    except (OSError, ValueError, KeyError, TypeError) as exc:
        diffs = [f"recompute: cannot recompute ({type(exc).__name__}: {exc})"]
    if diffs:
        problems += diffs
    else:
        checked.append("recomputed: every figure equals the certificate (from the raw capture and the profile)")
    return Verification(not problems, sc, problems, checked)
