"""CURVE key pairs for the operator interface (ZeroMQ certificate files).

``make_keypair(DIR, NAME)`` writes ``DIR/NAME.key`` (public, safe to copy to the controller's
directory of authorised clients) and ``DIR/NAME.key_secret`` (secret, mode 0600, never leaves its
owner).  Existing key files are never overwritten: losing a secret key silently locks out an
operator, and replacing one silently admits whoever holds the new one.

The loaders turn a bad or missing key file into a :class:`ProfileError` naming the file.
"""
from __future__ import annotations

import logging
import os
import re
import shutil
import stat
import struct
import tempfile
from pathlib import Path

import zmq
import zmq.auth
from zmq.utils import z85

from .errors import FlapctlError, ProfileError

__all__ = ["KeyFileExists", "make_keypair", "load_secret_key", "load_public_key",
           "load_authorized_keys", "PUBLIC_SUFFIX", "SECRET_SUFFIX"]

log = logging.getLogger(__name__)

PUBLIC_SUFFIX = ".key"
SECRET_SUFFIX = ".key_secret"
_NAME_RE = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.-]{0,63}\Z")


class KeyFileExists(FlapctlError, FileExistsError):
    """A key file of that name exists already; it is left untouched."""


def _z85_key(source: str, key: str, value: object) -> bytes:
    """A 40-character Z85 CURVE key (32 bytes once decoded)."""
    if isinstance(value, str):
        value = value.encode("ascii", "replace")
    if not isinstance(value, bytes) or len(value) != 40:
        raise ProfileError(source, key, value, "a 40-character Z85 CURVE key")
    try:
        if len(z85.decode(value)) != 32:
            raise ValueError
    except (ValueError, KeyError, IndexError, struct.error):
        raise ProfileError(source, key, value, "a 40-character Z85 CURVE key") from None
    return value


def make_keypair(directory: str | Path, name: str) -> tuple[Path, Path]:
    """Create ``name.key`` and ``name.key_secret`` in ``directory`` (made if missing).

    Returns (public key path, secret key path).  Raises :class:`KeyFileExists` if either file
    exists (nothing is written then) and ProfileError for a bad name.
    """
    if not zmq.has("curve"):
        raise FlapctlError("this libzmq was built without CURVE security: cannot make keys")
    d = Path(directory)
    if not isinstance(name, str) or not _NAME_RE.match(name):
        raise ProfileError(str(d), "name", name, "1-64 characters of letters, digits, '_', '.', '-', "
                                                 "starting with a letter or digit")
    public, secret = d / f"{name}{PUBLIC_SUFFIX}", d / f"{name}{SECRET_SUFFIX}"
    for p in (public, secret):
        if p.exists() or p.is_symlink():
            raise KeyFileExists(f"{p} exists already: refusing to overwrite a key file "
                                f"(choose another name or remove it deliberately)")
    try:
        d.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=".keys-", dir=d))     # mode 0700
    except OSError as exc:
        raise ProfileError(str(d), "directory", str(d), f"a writable directory ({exc.strerror or exc})") from None
    try:
        tmp_public, tmp_secret = (Path(p) for p in zmq.auth.create_certificates(tmp, name))
        os.chmod(tmp_secret, stat.S_IRUSR | stat.S_IWUSR)
        # os.link never replaces an existing file: no window in which a key is overwritten
        os.link(tmp_public, public)
        try:
            os.link(tmp_secret, secret)
        except OSError:
            public.unlink()
            raise
    except FileExistsError as exc:
        raise KeyFileExists(f"{exc.filename} exists already: refusing to overwrite a key file") from None
    except OSError as exc:
        raise ProfileError(str(d), "directory", str(d), f"a writable directory ({exc.strerror or exc})") from None
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    log.info("made CURVE key pair %s (public) and %s (secret)", public, secret)
    return public, secret


def load_secret_key(path: str | Path) -> tuple[bytes, bytes]:
    """(public, secret) Z85 keys from a ``.key_secret`` file."""
    source = str(path)
    try:
        pub, sec = zmq.auth.load_certificate(path)
    except (OSError, ValueError) as exc:
        raise ProfileError(source, "file", source, f"a readable CURVE secret key file ({exc})") from None
    if sec is None:
        raise ProfileError(source, "secret-key", "<missing>",
                           f"a secret key file ({SECRET_SUFFIX}, made by make_keypair), not a public one")
    try:
        mode = os.stat(path).st_mode
        if mode & (stat.S_IRWXG | stat.S_IRWXO):
            log.warning("%s is readable by others (mode %o): chmod 600 it", source, mode & 0o777)
    except OSError:
        pass
    return _z85_key(source, "public-key", pub), _z85_key(source, "secret-key", sec)


def load_public_key(key: str | Path | bytes) -> bytes:
    """A Z85 public key from bytes (40 characters) or from a ``.key`` / ``.key_secret`` file."""
    if isinstance(key, bytes):
        return _z85_key("<server key>", "public-key", key)
    source = str(key)
    try:
        pub, _ = zmq.auth.load_certificate(key)
    except (OSError, ValueError) as exc:
        raise ProfileError(source, "file", source, f"a readable CURVE public key file ({exc})") from None
    return _z85_key(source, "public-key", pub)


def load_authorized_keys(directory: str | Path) -> dict[bytes, str]:
    """Public key (Z85) -> operator name (file stem) for every ``*.key`` in ``directory``."""
    d = Path(directory)
    source = str(d)
    if not d.is_dir():
        raise ProfileError(source, "authorized_clients_dir", source, "an existing directory of *.key files")
    keys: dict[bytes, str] = {}
    for p in sorted(d.glob(f"*{PUBLIC_SUFFIX}")):
        keys[load_public_key(p)] = p.stem
    if not keys:
        raise ProfileError(source, "authorized_clients_dir", source,
                           f"at least one authorised client public key (*{PUBLIC_SUFFIX})")
    return keys
