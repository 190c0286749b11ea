"""TLS for the node's associations, both directions (DICOM PS3.15 secure transport).

The node speaks DICOM over TLS through Python's :mod:`ssl` module handed to pynetdicom: the
receiver wraps every accepted socket with :func:`server_context` (``AE.start_server(...,
ssl_context=...)``), the sender wraps its connection with :func:`client_context`
(``AE.associate(..., tls_args=(context, host))``).

Both contexts follow the BCP 195 TLS profile of PS3.15 Annex B (from memory: TLS 1.2 or
later, certificate-based authentication of the peer): the minimum protocol version is TLS 1.2,
the cipher suites are Python's defaults (forward-secret AEAD suites first), and a peer
certificate must chain to the configured CA. The receiver asks for a client certificate and,
with ``require_client_cert``, refuses a peer without one; the sender checks the destination's
certificate against the CA and, with ``check_hostname``, its host name or IP address.

Public names: :class:`TlsSettings`, :func:`server_context`, :func:`client_context`.
"""

from __future__ import annotations

import ssl
from dataclasses import dataclass
from pathlib import Path
from typing import Any

__all__ = ["MINIMUM_VERSION", "TlsSettings", "client_context", "server_context"]

MINIMUM_VERSION = ssl.TLSVersion.TLSv1_2
"""Oldest TLS version accepted in either direction (BCP 195 profile, PS3.15 Annex B)."""


@dataclass(frozen=True)
class TlsSettings:
    """Certificates and policy for TLS associations.

    Attributes
    ----------
    receive
        Listen with TLS only (plain TCP associations then fail the handshake).
    cert_file, key_file
        The node's certificate chain and private key (PEM). Required to receive; when
        sending they are offered as the client certificate.
    ca_file
        PEM bundle of the CA certificates that peer certificates must chain to. Required to
        send over TLS and to require client certificates.
    require_client_cert
        When receiving: refuse a peer that presents no certificate signed by ``ca_file``.
    check_hostname
        When sending: the destination's certificate must name its host (DNS name or IP
        address in subjectAltName).
    """

    receive: bool = False
    cert_file: Path | None = None
    key_file: Path | None = None
    ca_file: Path | None = None
    require_client_cert: bool = True
    check_hostname: bool = True

    def __post_init__(self) -> None:
        if (self.cert_file is None) != (self.key_file is None):
            raise ValueError("tls: cert_file and key_file go together (give both or neither)")
        if self.receive and self.cert_file is None:
            raise ValueError("tls.receive: needs cert_file and key_file (the node's certificate)")
        if self.receive and self.require_client_cert and self.ca_file is None:
            raise ValueError("tls.require_client_cert: needs ca_file (the CA that signs the "
                             "peers' certificates)")


def _readable(path: Path | None, what: str) -> str:
    if path is None:
        raise ValueError(f"tls.{what}: not set")
    if not path.is_file():
        raise ValueError(f"tls.{what}: {path} is not a readable file")
    return str(path)


class _ClosingSSLSocket(ssl.SSLSocket):
    """An SSLSocket whose ``shutdown`` never raises.

    pynetdicom closes a socket only after ``shutdown`` succeeded; after a failed handshake
    (a peer without an acceptable certificate) ``shutdown`` raises, and the file descriptor
    would leak with every refused peer.
    """

    def shutdown(self, how: int) -> None:
        try:
            super().shutdown(how)
        except OSError:
            pass


class _LazyHandshakeContext(ssl.SSLContext):
    """A server context whose sockets do their handshake on first use, not when wrapped.

    pynetdicom wraps each accepted socket in its accept loop; with the default
    ``do_handshake_on_connect=True`` one peer that connects and stays silent would stop every
    other peer from being accepted. Deferred, the handshake runs in that association's own
    thread (OpenSSL completes it inside the first read).
    """

    def wrap_socket(self, sock: Any, *args: Any, **kwargs: Any) -> ssl.SSLSocket:
        kwargs["do_handshake_on_connect"] = False
        return super().wrap_socket(sock, *args, **kwargs)


def server_context(settings: TlsSettings) -> ssl.SSLContext:
    """The context the receiver wraps accepted sockets with.

    Raises
    ------
    ValueError
        A certificate, key or CA file is missing or cannot be loaded (the message names it).
    """
    ctx = _LazyHandshakeContext(ssl.PROTOCOL_TLS_SERVER)
    ctx.sslsocket_class = _ClosingSSLSocket
    ctx.minimum_version = MINIMUM_VERSION
    cert, key = _readable(settings.cert_file, "cert_file"), _readable(settings.key_file, "key_file")
    try:
        ctx.load_cert_chain(cert, key)
    except (ssl.SSLError, OSError) as exc:
        raise ValueError(f"tls.cert_file/key_file: cannot load {cert} with {key} ({exc})") from None
    if settings.ca_file is not None:
        ca = _readable(settings.ca_file, "ca_file")
        try:
            ctx.load_verify_locations(cafile=ca)
        except (ssl.SSLError, OSError) as exc:
            raise ValueError(f"tls.ca_file: cannot load {ca} ({exc})") from None
        ctx.verify_mode = ssl.CERT_REQUIRED if settings.require_client_cert else ssl.CERT_OPTIONAL
    else:
        ctx.verify_mode = ssl.CERT_NONE
    return ctx


def client_context(settings: TlsSettings) -> ssl.SSLContext:
    """The context the sender wraps its connection to a TLS destination with.

    Raises
    ------
    ValueError
        ``ca_file`` is not set, or a file cannot be loaded (the message names it).
    """
    ca = _readable(settings.ca_file, "ca_file")
    try:
        ctx = ssl.create_default_context(ssl.Purpose.SERVER_AUTH, cafile=ca)
    except (ssl.SSLError, OSError) as exc:
        raise ValueError(f"tls.ca_file: cannot load {ca} ({exc})") from None
    ctx.minimum_version = MINIMUM_VERSION
    ctx.sslsocket_class = _ClosingSSLSocket
    ctx.check_hostname = settings.check_hostname
    ctx.verify_mode = ssl.CERT_REQUIRED
    if settings.cert_file is not None:
        cert = _readable(settings.cert_file, "cert_file")
        key = _readable(settings.key_file, "key_file")
        try:
            ctx.load_cert_chain(cert, key)
        except (ssl.SSLError, OSError) as exc:
            raise ValueError(f"tls.cert_file/key_file: cannot load {cert} with {key} "
                             f"({exc})") from None
    return ctx
