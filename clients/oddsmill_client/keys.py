"""CURVE keys for a client of a daemon that requires them (PROTOCOL 1).

ZeroMQ's CURVE authenticates and encrypts a connection: the client proves it holds a secret key whose
public half the daemon's operator has allowed, and it checks it is talking to the daemon by the
daemon's public key. Keys are ZeroMQ certificate files, as `oddsmill keys` (or pyzmq's
`zmq.auth.create_certificates`) writes them: NAME.key (public) and NAME.key_secret (both halves).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import zmq
import zmq.auth


@dataclass(frozen=True)
class CurveKeys:
    """A client's key pair and the daemon's public key, each as ZeroMQ's 40-character Z85 text."""

    public: bytes
    secret: bytes
    server_public: bytes

    @classmethod
    def load(cls, client_secret_file: str | Path, server_public_file: str | Path) -> CurveKeys:
        """From the client's secret certificate (NAME.key_secret) and the daemon's public one."""
        public, secret = zmq.auth.load_certificate(str(client_secret_file))
        if secret is None:
            raise ValueError(f"{client_secret_file}: holds no secret key (use the .key_secret file)")
        server_public, _ = zmq.auth.load_certificate(str(server_public_file))
        return cls(public, secret, server_public)

    def apply(self, sock: zmq.Socket[Any]) -> None:
        """Make `sock` a CURVE client of the daemon; before it connects."""
        sock.curve_publickey = self.public
        sock.curve_secretkey = self.secret
        sock.curve_serverkey = self.server_public
