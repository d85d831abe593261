"""Signed certificates (harness.signing) and `harness keys` / `harness verify`.

Outside references: the RFC 8032 section 7.1 TEST 1 key pair and signature (pure
Ed25519, empty message); the RFC 8410 section 10.1 example public key (SubjectPublicKeyInfo
DER = 12-byte algorithm prefix 302a300506032b6570032100 + the 32 raw key bytes), whose
fingerprint is recomputed here with hashlib; POSIX permission bits from os.stat.
"""

from __future__ import annotations

import base64
import hashlib
import json
import os
import random
import stat
from pathlib import Path

import pytest

from harness import signing
from harness.cli import main
from harness.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]
PROFILE = ROOT / "fixtures" / "profile-line-kf8.toml"

# RFC 8032 section 7.1, TEST 1
RFC8032_SK = bytes.fromhex("9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60")
RFC8032_PK = bytes.fromhex("d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a")
RFC8032_SIG = bytes.fromhex("e5564300c360ac729086e2cc806e828a84877f1eb8e5d974d873e065224901555fb8821590a33bacc61e39"
                            "701cf9b46bd25bf5f0595bbe24655141438e7a100b")
# RFC 8410 section 10.1, example Ed25519 public key
RFC8410_PEM = b"-----BEGIN PUBLIC KEY-----\nMCowBQYDK2VwAyEAGb9ECWmEzf6FQbrBZ9w7lshQhqowtrbLDFw4rXAxZuE=\n-----END PUBLIC KEY-----\n"


def signing_station(tmp_path: Path, key: Path) -> Path:
    text = (ROOT / "fixtures" / "station-line-48k.toml").read_text().replace(
        'device_model = "dut-kf8-line.toml"', f'device_model = "{ROOT / "fixtures" / "dut-kf8-line.toml"}"')
    f = tmp_path / "station-signed.toml"
    f.write_text(text + f'\n[signing]\nprivate_key = "{key}"\n')
    return f


@pytest.fixture(scope="module")
def signed(tmp_path_factory):
    """One measured, signed KF-8 certificate with its key pair."""
    from harness.measure import run_from_files

    d = tmp_path_factory.mktemp("signed")
    priv, pub, fp = signing.new_keypair(d / "keys" / "line-1")
    res = run_from_files(PROFILE, signing_station(d, priv), "KF8-SIG-1", out_dir=d / "out")
    return {"dir": d, "priv": priv, "pub": pub, "fp": fp, "cert": res.json_path, "raw": res.raw_path, "res": res}


# --------------------------------------------------------------------------------------
# keys and the algorithm
# --------------------------------------------------------------------------------------
def test_rfc8032_test1_is_what_the_library_signs_and_verifies():
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

    key = Ed25519PrivateKey.from_private_bytes(RFC8032_SK)
    assert signing._raw_public(key.public_key()) == RFC8032_PK
    assert key.sign(b"") == RFC8032_SIG                       # pure Ed25519, deterministic
    assert signing.fingerprint(key.public_key()) == hashlib.sha256(RFC8032_PK).hexdigest()


def test_fingerprint_is_sha256_of_the_raw_key_in_the_rfc8410_example(tmp_path):
    f = tmp_path / "rfc8410.pub"
    f.write_bytes(RFC8410_PEM)
    der = base64.b64decode(b"MCowBQYDK2VwAyEAGb9ECWmEzf6FQbrBZ9w7lshQhqowtrbLDFw4rXAxZuE=")
    assert der[:12] == bytes.fromhex("302a300506032b6570032100") and len(der) == 44
    assert signing.fingerprint(signing.load_public_key(f)) == hashlib.sha256(der[12:]).hexdigest()


def test_keys_new_writes_an_owner_only_private_key_and_never_overwrites(tmp_path, capsys):
    assert main(["keys", "new", "--out", str(tmp_path / "k" / "line-7")]) == 0
    out = capsys.readouterr().out
    priv, pub = tmp_path / "k" / "line-7.key", tmp_path / "k" / "line-7.pub"
    assert stat.S_IMODE(priv.stat().st_mode) == 0o600
    assert stat.S_IMODE(pub.stat().st_mode) & 0o077 == 0o044      # readable by all, writable by owner
    assert b"BEGIN PRIVATE KEY" in priv.read_bytes() and b"BEGIN PUBLIC KEY" in pub.read_bytes()
    der = base64.b64decode("".join(pub.read_text().splitlines()[1:-1]))
    fp = hashlib.sha256(der[12:]).hexdigest()                      # RFC 8410 layout
    assert fp in out
    assert main(["keys", "fingerprint", str(pub)]) == 0 and capsys.readouterr().out.strip() == fp
    before = priv.read_bytes()
    assert main(["keys", "new", "--out", str(tmp_path / "k" / "line-7")]) == 2
    assert "never overwritten" in capsys.readouterr().err
    assert priv.read_bytes() == before


def test_keys_new_for_a_station_creates_the_key_it_names(tmp_path, capsys):
    st_file = signing_station(tmp_path, tmp_path / "keys" / "st.key")
    assert main(["keys", "new", "--station", str(st_file)]) == 0
    assert (tmp_path / "keys" / "st.key").is_file() and (tmp_path / "keys" / "st.pub").is_file()


def test_a_private_key_others_can_read_is_refused(tmp_path):
    priv, _, _ = signing.new_keypair(tmp_path / "k")
    os.chmod(priv, 0o644)
    with pytest.raises(ConfigError, match="accessible by group or others"):
        signing.load_private_key(priv)
    with pytest.raises(ConfigError, match="private key not found"):
        signing.load_private_key(tmp_path / "none.key")


# --------------------------------------------------------------------------------------
# signed certificates
# --------------------------------------------------------------------------------------
def test_certificate_carries_signature_over_the_canonical_json_without_it(signed):
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

    from harness.certificate import canonical_json

    data = signed["cert"].read_bytes()
    doc = json.loads(data)
    sig = doc["signature"]
    assert sig["algorithm"] == "Ed25519" and sig["public_key_fingerprint"] == signed["fp"]
    assert data == canonical_json(doc)                          # the file is the canonical form
    body = json.dumps({k: v for k, v in doc.items() if k != "signature"}, sort_keys=True, separators=(",", ":"),
                      ensure_ascii=False).encode("utf-8")       # the documented signed bytes, built independently
    pub = Ed25519PublicKey.from_public_bytes(base64.b64decode(sig["public_key"]))
    pub.verify(base64.b64decode(sig["value"]), body)            # raises if wrong
    assert hashlib.sha256(base64.b64decode(sig["public_key"])).hexdigest() == sig["public_key_fingerprint"]


def test_verify_passes_with_the_station_key_and_with_the_embedded_key(signed, capsys):
    v = signing.verify_certificate(signed["cert"], public_key=signed["pub"])
    assert v.ok and v.signature.trusted and v.problems == []
    assert any("recomputed" in c for c in v.checked) and any("raw capture" in c for c in v.checked)
    assert main(["verify", str(signed["cert"])]) == 0                  # the embedded key
    out = capsys.readouterr().out
    assert "VERIFIED" in out and "embedded" in out


def test_another_stations_key_is_named(signed, tmp_path):
    _, other_pub, other_fp = signing.new_keypair(tmp_path / "other")
    v = signing.verify_certificate(signed["cert"], public_key=other_pub)
    assert not v.ok
    assert any(signed["fp"] in p and other_fp in p for p in v.problems)


def _mutations(data: bytes, positions):
    for i in positions:
        b = bytearray(data)
        b[i] ^= 1 + (i * 7) % 255                 # a different byte value, varied per position
        yield i, bytes(b)


def _sig_rejects(mutated: bytes, pub) -> bool:
    return not signing.verify_signature(mutated, pub).ok


def test_single_byte_changes_to_the_certificate_are_detected(signed):
    """Every byte of the signature block and 1500 random positions elsewhere."""
    from harness.signing import load_public_key

    data = signed["cert"].read_bytes()
    pub = load_public_key(signed["pub"])
    start = data.index(b'"signature":')
    end = data.index(b"}", start) + 1
    rng = random.Random(8032)
    positions = set(range(start, end)) | set(rng.sample(range(len(data)), 1500)) | {0, len(data) - 1}
    missed = [i for i, m in _mutations(data, sorted(positions)) if not _sig_rejects(m, pub)]
    assert missed == []


@pytest.mark.slow
def test_every_single_byte_change_to_the_certificate_is_detected(signed):
    from harness.signing import load_public_key

    data = signed["cert"].read_bytes()
    pub = load_public_key(signed["pub"])
    missed = [i for i, m in _mutations(data, range(len(data))) if not _sig_rejects(m, pub)]
    assert missed == [] and len(data) > 5000


def test_single_byte_changes_to_the_raw_capture_are_detected(signed, tmp_path):
    """The signed certificate holds the raw capture's SHA-256: any change to the capture
    is named by verify (checked on a copy, at 300 positions spread over the file)."""
    import shutil

    d = tmp_path / "copy"
    shutil.copytree(signed["cert"].parent, d)
    raw = d / signed["raw"].name
    data = raw.read_bytes()
    rng = random.Random(1)
    positions = sorted(set(rng.sample(range(len(data)), 300)) | {0, 1, len(data) // 2, len(data) - 1})
    cert = d / signed["cert"].name
    for i, m in _mutations(data, positions):
        raw.write_bytes(m)
        v = signing.verify_certificate(cert, public_key=signed["pub"])
        assert not v.ok and any("raw: SHA-256" in p for p in v.problems), i
    raw.write_bytes(data)
    assert signing.verify_certificate(cert, public_key=signed["pub"]).ok


def test_a_changed_figure_is_named_by_the_signature_and_by_the_recomputation(signed, tmp_path, capsys):
    import shutil

    from harness.certificate import canonical_json

    d = tmp_path / "copy"
    shutil.copytree(signed["cert"].parent, d)
    cert = d / signed["cert"].name
    doc = json.loads(cert.read_bytes())
    doc["points"][3]["gain_db"] += 0.5
    cert.write_bytes(canonical_json(doc))
    v = signing.verify_certificate(cert, public_key=signed["pub"])
    assert not v.ok
    assert any("does NOT verify" in p for p in v.problems)
    assert any("points[3].gain_db" in p for p in v.problems)
    # re-signed by someone else's key: still caught against the station's key, figure still named
    forged = signing.sign_certificate(doc, signing.new_keypair(tmp_path / "forger")[0])
    cert.write_bytes(canonical_json(forged))
    v = signing.verify_certificate(cert, public_key=signed["pub"])
    assert not v.ok and any("not by the given key" in p for p in v.problems)
    assert any("points[3].gain_db" in p for p in v.problems)
    assert main(["verify", str(cert), "--key", str(signed["pub"])]) == 1
    out = capsys.readouterr().out
    assert "NOT VERIFIED" in out and "points[3].gain_db" in out


def test_a_non_canonical_rewrite_that_parses_alike_is_detected(signed, tmp_path):
    """'1e-05' and '1E-05' parse to the same number: a one-byte change the signature over
    the parsed document alone would miss; the canonical-form check catches it."""
    data = signed["cert"].read_bytes()
    i = data.find(b"e-")
    assert i > 0, "the certificate has no exponent to flip"
    m = data[:i] + b"E" + data[i + 1:]
    assert json.loads(m) == json.loads(data)
    chk = signing.verify_signature(m, signing.load_public_key(signed["pub"]))
    assert not chk.ok and any("canonical form" in p for p in chk.problems)


def test_unsigned_certificate_needs_allow_unsigned(tmp_path, capsys):
    from harness.measure import run_from_files

    st_file = ROOT / "fixtures" / "station-line-48k.toml"
    res = run_from_files(PROFILE, st_file, "KF8-UNSIGNED", out_dir=tmp_path)
    assert main(["verify", str(res.json_path)]) == 1
    assert "not signed" in capsys.readouterr().out
    assert main(["verify", str(res.json_path), "--allow-unsigned"]) == 0
    assert main(["verify", str(tmp_path / "missing.json")]) == 2
