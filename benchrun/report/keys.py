"""Signing identities for reports: ECDSA P-256 keys, self-signed certificates, PKCS#12 files.

A signing identity is a private key plus its X.509 certificate. ``new_identity`` makes an
ECDSA P-256 key (FIPS 186-4 curve P-256, as PAdES baseline profiles allow) encrypted with a
passphrase (PKCS#8, best available encryption of the ``cryptography`` library) and a self-signed
certificate naming the signer and their role. An organisation's PKCS#12 file can be loaded
instead with :func:`load_pkcs12_signer`.

The private key is only ever held in memory and on disk encrypted; it is never written to a
report, a log or an error message.
"""

from __future__ import annotations

import datetime as _dt
import os
import re
from dataclasses import dataclass
from pathlib import Path

from benchrun.errors import ReportError

#: Environment variable holding the key passphrase for unattended use.
PASSPHRASE_ENV = "BENCHRUN_KEY_PASSPHRASE"

#: Minimum passphrase length accepted for a new key (common practice).
MIN_PASSPHRASE_LENGTH = 8


@dataclass(frozen=True)
class IdentityFiles:
    """Where :func:`new_identity` wrote the key and the certificate."""

    key_path: Path
    cert_path: Path
    fingerprint_sha256: str


@dataclass(frozen=True)
class ReportSigner:
    """A loaded signing identity, ready to sign reports.

    Attributes
    ----------
    name, role, organisation
        Shown in the visible signature block and on the cover page.
    pyhanko_signer
        The ``pyhanko.sign.signers.SimpleSigner`` doing the cryptography.
    cert_fingerprint_sha256
        SHA-256 of the DER certificate, printed on the report so an auditor can match it.
    """

    name: str
    role: str
    organisation: str
    pyhanko_signer: object
    cert_fingerprint_sha256: str

    def __repr__(self) -> str:  # never show key material, even by accident
        return f"ReportSigner(name={self.name!r}, role={self.role!r})"


def _slug(name: str) -> str:
    slug = re.sub(r"[^A-Za-z0-9]+", "-", name).strip("-").lower()
    return slug or "signer"


def new_identity(
    name: str,
    out_dir: str | Path,
    passphrase: str,
    *,
    role: str = "",
    organisation: str = "",
    valid_days: int = 3 * 365,
    overwrite: bool = False,
) -> IdentityFiles:
    """Create an encrypted ECDSA P-256 key and a self-signed certificate.

    Parameters
    ----------
    name
        Signer's name (certificate common name).
    out_dir
        Folder for ``<slug>.key.pem`` (PKCS#8, encrypted) and ``<slug>.cert.pem``.
    passphrase
        Encrypts the key; at least :data:`MIN_PASSPHRASE_LENGTH` characters.
    role, organisation
        Recorded in the certificate subject (title, organisation).
    valid_days
        Certificate validity.
    overwrite
        Refuse to replace existing files unless True.
    """
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

    if not name.strip():
        raise ReportError("a signer name is required")
    if len(passphrase) < MIN_PASSPHRASE_LENGTH:
        raise ReportError(
            f"the key passphrase must have at least {MIN_PASSPHRASE_LENGTH} characters"
        )
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    stem = _slug(name)
    key_path = out / f"{stem}.key.pem"
    cert_path = out / f"{stem}.cert.pem"
    for path in (key_path, cert_path):
        if path.exists() and not overwrite:
            raise ReportError(f"{path} exists; refusing to overwrite a signing identity")

    key = ec.generate_private_key(ec.SECP256R1())
    attributes = [x509.NameAttribute(NameOID.COMMON_NAME, name.strip())]
    if role.strip():
        attributes.append(x509.NameAttribute(NameOID.TITLE, role.strip()))
    if organisation.strip():
        attributes.append(x509.NameAttribute(NameOID.ORGANIZATION_NAME, organisation.strip()))
    subject = x509.Name(attributes)
    now = _dt.datetime.now(_dt.UTC)
    cert = (
        x509.CertificateBuilder()
        .subject_name(subject)
        .issuer_name(subject)
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now - _dt.timedelta(minutes=5))
        .not_valid_after(now + _dt.timedelta(days=valid_days))
        .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
        .add_extension(
            x509.KeyUsage(
                digital_signature=True,
                content_commitment=True,  # "non-repudiation", required by PDF validators
                key_encipherment=False,
                data_encipherment=False,
                key_agreement=False,
                key_cert_sign=False,
                crl_sign=False,
                encipher_only=False,
                decipher_only=False,
            ),
            critical=True,
        )
        .add_extension(
            x509.ExtendedKeyUsage([ExtendedKeyUsageOID.EMAIL_PROTECTION]), critical=False
        )
        .add_extension(
            x509.SubjectKeyIdentifier.from_public_key(key.public_key()), critical=False
        )
        .sign(key, hashes.SHA256())
    )
    key_pem = key.private_bytes(
        serialization.Encoding.PEM,
        serialization.PrivateFormat.PKCS8,
        serialization.BestAvailableEncryption(passphrase.encode("utf-8")),
    )
    # the key file is created readable by its owner only
    fd = os.open(key_path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    with os.fdopen(fd, "wb") as handle:
        handle.write(key_pem)
    cert_path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    return IdentityFiles(key_path, cert_path, cert.fingerprint(hashes.SHA256()).hex())


def _subject_fields(cert: object) -> tuple[str, str, str]:
    from cryptography.x509.oid import NameOID

    def first(oid: object) -> str:
        values = cert.subject.get_attributes_for_oid(oid)  # type: ignore[attr-defined]
        return str(values[0].value) if values else ""

    return first(NameOID.COMMON_NAME), first(NameOID.TITLE), first(NameOID.ORGANIZATION_NAME)


def _make_signer(key: object, cert: object, extra_certs: list, role: str | None) -> ReportSigner:
    from asn1crypto import keys as asn1_keys
    from asn1crypto import x509 as asn1_x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from pyhanko.sign.signers import SimpleSigner
    from pyhanko_certvalidator.registry import SimpleCertificateStore

    if not isinstance(key, ec.EllipticCurvePrivateKey) and not hasattr(key, "private_bytes"):
        raise ReportError("the signing key type is not supported")
    key_der = key.private_bytes(  # type: ignore[attr-defined]
        serialization.Encoding.DER,
        serialization.PrivateFormat.PKCS8,
        serialization.NoEncryption(),
    )
    cert_der = cert.public_bytes(serialization.Encoding.DER)  # type: ignore[attr-defined]
    registry = SimpleCertificateStore()
    registry.register_multiple(
        [
            asn1_x509.Certificate.load(c.public_bytes(serialization.Encoding.DER))
            for c in extra_certs
        ]
    )
    signer = SimpleSigner(
        signing_cert=asn1_x509.Certificate.load(cert_der),
        signing_key=asn1_keys.PrivateKeyInfo.load(key_der),
        cert_registry=registry,
    )
    name, title, org = _subject_fields(cert)
    return ReportSigner(
        name=name or "unnamed signer",
        role=role if role is not None else title,
        organisation=org,
        pyhanko_signer=signer,
        cert_fingerprint_sha256=cert.fingerprint(hashes.SHA256()).hex(),  # type: ignore[attr-defined]
    )


def load_signer(
    key_path: str | Path, cert_path: str | Path, passphrase: str, *, role: str | None = None
) -> ReportSigner:
    """Load a PEM key (encrypted PKCS#8) and its certificate.

    Raises
    ------
    ReportError
        Missing files, wrong passphrase, or a key that does not match the certificate.
        The message never contains key material.
    """
    from cryptography import x509
    from cryptography.hazmat.primitives import serialization

    try:
        key_bytes = Path(key_path).read_bytes()
        cert_bytes = Path(cert_path).read_bytes()
    except OSError as exc:
        raise ReportError(f"cannot read signing identity: {exc.strerror}: {exc.filename}") from None
    try:
        key = serialization.load_pem_private_key(key_bytes, passphrase.encode("utf-8"))
    except (ValueError, TypeError):
        raise ReportError(
            f"cannot decrypt the key {key_path}: wrong passphrase or not a PEM private key"
        ) from None
    try:
        cert = x509.load_pem_x509_certificate(cert_bytes)
    except ValueError:
        raise ReportError(f"{cert_path} is not a PEM certificate") from None
    _check_pair(key, cert)
    return _make_signer(key, cert, [], role)


def load_pkcs12_signer(
    p12_path: str | Path, passphrase: str, *, role: str | None = None
) -> ReportSigner:
    """Load an organisation's PKCS#12 (.p12/.pfx) signing identity."""
    from cryptography.hazmat.primitives.serialization import pkcs12

    try:
        data = Path(p12_path).read_bytes()
    except OSError as exc:
        raise ReportError(f"cannot read {p12_path}: {exc.strerror}") from None
    try:
        key, cert, extra = pkcs12.load_key_and_certificates(data, passphrase.encode("utf-8"))
    except (ValueError, TypeError):
        raise ReportError(
            f"cannot open {p12_path}: wrong passphrase or not a PKCS#12 file"
        ) from None
    if key is None or cert is None:
        raise ReportError(f"{p12_path} holds no private key and certificate pair")
    _check_pair(key, cert)
    return _make_signer(key, cert, list(extra or []), role)


def _check_pair(key: object, cert: object) -> None:
    from cryptography.hazmat.primitives import serialization

    fmt = (serialization.Encoding.DER, serialization.PublicFormat.SubjectPublicKeyInfo)
    if key.public_key().public_bytes(*fmt) != cert.public_key().public_bytes(*fmt):  # type: ignore[attr-defined]
        raise ReportError("the private key does not belong to the certificate")


#: What to do when no passphrase can be had (said by every error about it).
PASSPHRASE_HELP = (f"set {PASSPHRASE_ENV}, or give --passphrase-file FILE (the passphrase on "
                   "its first line; keep the file readable by you only)")


def read_passphrase_file(path: str | Path) -> str:
    """The passphrase on the first line of ``path`` (its line ending removed).

    Raises
    ------
    ReportError
        The file cannot be read, or its first line is empty.
    """
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        reason = getattr(exc, "strerror", None) or str(exc)
        raise ReportError(f"cannot read the passphrase file {path}: {reason}") from exc
    first = text.splitlines()[0] if text else ""
    if not first:
        raise ReportError(f"the passphrase file {path} is empty (the passphrase goes on its "
                          "first line)")
    return first


def has_terminal() -> bool:
    """Whether a person can be asked: standard input is a terminal."""
    import sys

    try:
        return sys.stdin is not None and sys.stdin.isatty()
    except (AttributeError, ValueError):
        return False


def passphrase_from_env_or_prompt(
    prompt: str = "Key passphrase: ", *, confirm: bool = False,
    passphrase_file: str | Path | None = None,
) -> str:
    """The key passphrase: from ``passphrase_file`` when given, else :data:`PASSPHRASE_ENV`,
    else asked on the terminal (not echoed).

    Raises
    ------
    ReportError
        No file, no environment variable and no terminal (an unattended run), the terminal
        closed while asking, or the two entries differ (``confirm``). The message says what
        to do; nothing has been signed or fired when it is raised.
    """
    if passphrase_file is not None:
        return read_passphrase_file(passphrase_file)
    value = os.environ.get(PASSPHRASE_ENV)
    if value:
        return value
    if not has_terminal():
        raise ReportError(f"the signing key needs its passphrase and there is no terminal to "
                          f"ask on: {PASSPHRASE_HELP}")
    import getpass

    try:
        first = getpass.getpass(prompt)
        if confirm and getpass.getpass("Repeat passphrase: ") != first:
            raise ReportError("the passphrases do not match")
    except EOFError as exc:
        raise ReportError(f"no passphrase was entered: {PASSPHRASE_HELP}") from exc
    return first
