"""Optional CurveZMQ security: encrypted streams, pinned source keys, authorised monitors.

* The source has a key pair; monitors *pin* its public key (a monitor refuses any other
  source).
* Each monitor has its own key pair; the source accepts only clients whose public keys are in
  its allowed-keys directory (a ZAP authenticator thread), so unknown keys and plaintext peers
  are refused at the handshake.  The control channel uses the same keys, so only authorised
  monitors can send stop commands.

Keys are the Z85 certificate files written by :func:`generate_keys` (``zmq.auth``).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import zmq
import zmq.auth
from zmq.auth.thread import ThreadAuthenticator

__all__ = ["ClientKeys", "ServerKeys", "generate_keys"]


def generate_keys(directory: str | os.PathLike[str], name: str) -> tuple[Path, Path]:
    """Create ``NAME.key`` (public) and ``NAME.key_secret`` in ``directory``; returns both paths."""
    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    public, secret = zmq.auth.create_certificates(str(d), name)
    os.chmod(secret, 0o600)
    return Path(public), Path(secret)


def _load(path: str | os.PathLike[str], need_secret: bool) -> tuple[bytes, bytes | None]:
    public, secret = zmq.auth.load_certificate(str(path))
    if need_secret and not secret:
        raise ValueError(f"{path} holds no secret key (use the NAME.key_secret file)")
    return public, secret


@dataclass(frozen=True)
class ClientKeys:
    """A monitor's key pair and the pinned public key of the source."""

    server_public: bytes
    public: bytes
    secret: bytes

    @classmethod
    def from_files(cls, server_public_file: str, client_secret_file: str | None) -> ClientKeys:
        """Load the pinned source key and this monitor's key pair from certificate files."""
        if client_secret_file is None:
            raise ValueError("CurveZMQ needs --client-key (this monitor's .key_secret file) too")
        server_public, _ = _load(server_public_file, need_secret=False)
        public, secret = _load(client_secret_file, need_secret=True)
        assert secret is not None
        return cls(server_public, public, secret)

    def apply_client(self, sock: zmq.Socket) -> None:
        """Configure a socket (before connect) as an authenticated CURVE client."""
        sock.curve_serverkey = self.server_public
        sock.curve_publickey = self.public
        sock.curve_secretkey = self.secret


class ServerKeys:
    """A source's key pair plus the directory of authorised client keys.

    ``apply_server(socket)`` starts (once per context) a ZAP authenticator that admits only
    the allowed client keys, then makes the socket a CURVE server.
    """

    def __init__(self, secret_file: str, allowed_keys_dir: str | None) -> None:
        public, secret = _load(secret_file, need_secret=True)
        assert secret is not None
        self.public, self.secret = public, secret
        if allowed_keys_dir is None:
            raise ValueError("CurveZMQ needs --allowed-keys (directory of monitor public keys)")
        if not Path(allowed_keys_dir).is_dir():
            raise ValueError(f"allowed-keys directory {allowed_keys_dir!r} does not exist")
        self.allowed_keys_dir = str(allowed_keys_dir)
        self._authenticators: dict[int, ThreadAuthenticator] = {}

    def apply_server(self, sock: zmq.Socket) -> None:
        """Configure a socket (before bind) as a CURVE server with client authentication."""
        ctx = sock.context
        if id(ctx) not in self._authenticators:
            auth = ThreadAuthenticator(ctx)
            auth.start()
            auth.configure_curve(domain="*", location=self.allowed_keys_dir)
            self._authenticators[id(ctx)] = auth
        sock.curve_secretkey = self.secret
        sock.curve_publickey = self.public
        sock.curve_server = True

    def stop(self, context: zmq.Context | None = None) -> None:
        """Stop the authenticator thread of ``context`` (all of them when None).

        Call this before ``context.term()``: the authenticator's socket would keep ``term``
        waiting forever.
        """
        keys = list(self._authenticators) if context is None else [id(context)]
        for key in keys:
            auth = self._authenticators.pop(key, None)
            if auth is not None:
                auth.stop()
