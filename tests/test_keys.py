"""Signing identities: encrypted ECDSA P-256 keys, self-signed certificates, PKCS#12.

Outside references: the ``cryptography`` library parses what we write (PKCS#8 encrypted PEM,
X.509 per RFC 5280), and the curve is checked to be NIST P-256 (FIPS 186-4, "secp256r1").
"""

from __future__ import annotations

import stat

import pytest
from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.hazmat.primitives.serialization import pkcs12
from cryptography.x509.oid import NameOID

from benchrun.cli import main
from benchrun.errors import ReportError
from benchrun.report.keys import (
    PASSPHRASE_ENV,
    load_pkcs12_signer,
    load_signer,
    new_identity,
)

PASS = "correct horse battery"


def test_new_identity_writes_encrypted_p256_key_and_self_signed_cert(tmp_path):
    files = new_identity("Q. Ashdown", tmp_path, PASS, role="Quality Engineer",
                         organisation="Korvane Power Components")
    pem = files.key_path.read_bytes()
    assert b"ENCRYPTED PRIVATE KEY" in pem  # PKCS#8 EncryptedPrivateKeyInfo (RFC 5958)
    assert stat.S_IMODE(files.key_path.stat().st_mode) == 0o600
    with pytest.raises(TypeError):  # cryptography refuses to open it without the passphrase
        serialization.load_pem_private_key(pem, None)
    key = serialization.load_pem_private_key(pem, PASS.encode())
    assert isinstance(key, ec.EllipticCurvePrivateKey)
    assert key.curve.name == "secp256r1"  # NIST P-256
    cert = x509.load_pem_x509_certificate(files.cert_path.read_bytes())
    assert cert.issuer == cert.subject
    assert cert.subject.get_attributes_for_oid(NameOID.COMMON_NAME)[0].value == "Q. Ashdown"
    assert cert.subject.get_attributes_for_oid(NameOID.TITLE)[0].value == "Quality Engineer"
    usage = cert.extensions.get_extension_for_class(x509.KeyUsage).value
    assert usage.digital_signature and usage.content_commitment
    cert.verify_directly_issued_by(cert)  # the self-signature checks out
    assert files.fingerprint_sha256 == cert.fingerprint(hashes.SHA256()).hex()


def test_load_signer_reads_name_and_role_and_rejects_wrong_passphrase(tmp_path):
    files = new_identity("Q. Ashdown", tmp_path, PASS, role="Quality Engineer")
    signer = load_signer(files.key_path, files.cert_path, PASS)
    assert (signer.name, signer.role) == ("Q. Ashdown", "Quality Engineer")
    assert "key" not in repr(signer).lower().replace("reportsigner", "")
    with pytest.raises(ReportError, match="wrong passphrase") as info:
        load_signer(files.key_path, files.cert_path, "not the passphrase")
    assert "BEGIN" not in str(info.value)


def test_refuses_short_passphrase_overwrite_and_mismatched_pair(tmp_path):
    with pytest.raises(ReportError, match="at least"):
        new_identity("A", tmp_path / "a", "short")
    files = new_identity("Q. Ashdown", tmp_path, PASS)
    with pytest.raises(ReportError, match="refusing to overwrite"):
        new_identity("Q. Ashdown", tmp_path, PASS)
    other = new_identity("R. Other", tmp_path / "b", PASS)
    with pytest.raises(ReportError, match="does not belong"):
        load_signer(files.key_path, other.cert_path, PASS)


def test_pkcs12_identity_can_sign_instead(tmp_path):
    files = new_identity("Q. Ashdown", tmp_path, PASS, role="Quality Engineer")
    key = serialization.load_pem_private_key(files.key_path.read_bytes(), PASS.encode())
    cert = x509.load_pem_x509_certificate(files.cert_path.read_bytes())
    p12 = tmp_path / "org.p12"
    p12.write_bytes(pkcs12.serialize_key_and_certificates(
        b"org", key, cert, None, serialization.BestAvailableEncryption(b"org-secret")))
    signer = load_pkcs12_signer(p12, "org-secret", role="Head of Quality")
    assert signer.name == "Q. Ashdown" and signer.role == "Head of Quality"
    with pytest.raises(ReportError, match="wrong passphrase"):
        load_pkcs12_signer(p12, "nope")


def test_cli_keys_new_takes_the_passphrase_from_the_environment(tmp_path, monkeypatch, capsys):
    monkeypatch.setenv(PASSPHRASE_ENV, PASS)
    code = main(["keys", "new", "--name", "Q. Ashdown", "--role", "Quality Engineer",
                 "--out", str(tmp_path)])
    out = capsys.readouterr().out
    assert code == 0
    assert (tmp_path / "q-ashdown.key.pem").is_file()
    assert (tmp_path / "q-ashdown.cert.pem").is_file()
    assert PASS not in out and "PRIVATE" not in out
    load_signer(tmp_path / "q-ashdown.key.pem", tmp_path / "q-ashdown.cert.pem", PASS)
