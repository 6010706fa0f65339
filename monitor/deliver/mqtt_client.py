"""The paho-mqtt client as bandwatch sets it up, for paho 1.6 and 2.x.

The client id, the password file, the TLS context (the broker's chain and
host name verified; with ``cert_file`` a client certificate presented to
brokers that require one) and the differences between paho 1.6 and 2.x
live here; `mqtt.py` is the sink that publishes through the client.
"""

import hashlib
import ssl
from typing import Any, Optional

import paho.mqtt.client as mqtt

from ..config import MqttConfig
from ..errors import DeliveryError

# paho 2.x wants the callback API chosen up front; 1.x has only the old one.
PAHO2 = hasattr(mqtt, "CallbackAPIVersion")


if PAHO2:
    _Client = mqtt.Client
else:

    class _Client(mqtt.Client):  # type: ignore[no-redef]
        """paho 1.6 catches only ConnectionError around its socket reads and
        writes; any other OSError (an SSLError such as a broker's refusal of
        our certificate, a timeout) escapes and ends its network thread for
        good. Raised as ConnectionError, paho drops the connection and
        retries, as 2.x does by itself."""

        def _sock_recv(self, bufsize: int) -> bytes:
            try:
                return super()._sock_recv(bufsize)
            except (BlockingIOError, ConnectionError):
                raise
            except OSError as err:
                raise ConnectionError(str(err)) from err

        def _sock_send(self, buf: bytes) -> int:
            try:
                return super()._sock_send(buf)
            except (BlockingIOError, ConnectionError):
                raise
            except OSError as err:
                raise ConnectionError(str(err)) from err


def client_id(prefix: str, node: str) -> str:
    """A stable MQTT client id: readable node name plus a digest of prefix/node.

    Distinct nodes (or one node name under two prefixes) get distinct ids, and
    a restart reuses the same one.
    """
    digest = hashlib.sha1(f"{prefix}/{node}".encode("utf-8")).hexdigest()[:8]
    return f"bw-{node}-{digest}"


def read_password(path: str) -> str:
    """The password in `path`, less one trailing newline."""
    try:
        with open(path, "r", encoding="utf-8") as f:
            text = f.read()
    except (OSError, UnicodeDecodeError) as err:
        reason = getattr(err, "strerror", None) or str(err)
        raise DeliveryError(f"mqtt.password_file {path!r} cannot be read: {reason}") from err
    if text.endswith("\r\n"):
        return text[:-2]
    if text.endswith("\n"):
        return text[:-1]
    return text


class _EncryptedKey(Exception):
    """Raised from the key password callback: there is nobody to ask."""


def _no_password() -> bytes:
    raise _EncryptedKey()


def _check_readable(key: str, path: str) -> None:
    try:
        with open(path, "rb") as f:
            f.read(1)
    except OSError as err:
        raise DeliveryError(f"mqtt.{key} {path!r} cannot be read: {err.strerror or err}") from err


def tls_context(cfg: MqttConfig) -> ssl.SSLContext:
    """The TLS context for the broker connection.

    It verifies the broker's chain (against `ca_file`, or the system store)
    and its host name, and presents `cert_file`/`key_file` when set, for
    brokers that require a client certificate. Every file is read here, at
    start, so a bad path or a wrong file is a clear error now rather than an
    endless round of failed handshakes later.
    """
    # PROTOCOL_TLS_CLIENT: CERT_REQUIRED and check_hostname, as paho's own
    # tls_set would set them, without paho 1.6 picking a deprecated protocol.
    context = ssl.SSLContext(ssl.PROTOCOL_TLS_CLIENT)
    if cfg.ca_file:
        _check_readable("ca_file", cfg.ca_file)
        try:
            context.load_verify_locations(cafile=cfg.ca_file)
        except (ssl.SSLError, ValueError) as err:
            raise DeliveryError(f"mqtt.ca_file {cfg.ca_file!r} holds no PEM CA certificate: {err}") from err
    else:
        try:
            context.load_default_certs()
        except (OSError, ValueError) as err:  # pragma: no cover - a broken system store
            raise DeliveryError(f"TLS cannot load the system CA store: {err}") from err
    if cfg.cert_file:
        _check_readable("cert_file", cfg.cert_file)
        if cfg.key_file:
            _check_readable("key_file", cfg.key_file)
        key_path = cfg.key_file or cfg.cert_file
        try:
            # A password callback that refuses: OpenSSL would otherwise
            # prompt on the terminal, and a service has none.
            context.load_cert_chain(cfg.cert_file, cfg.key_file or None, password=_no_password)
        except _EncryptedKey:
            raise DeliveryError(
                f"mqtt.key_file {key_path!r} holds an encrypted private key; bandwatch needs it "
                "unencrypted (protect it with file permissions instead)"
            ) from None
        except (ssl.SSLError, ValueError) as err:
            where = f"mqtt.cert_file {cfg.cert_file!r}"
            if cfg.key_file:
                where += f" with mqtt.key_file {cfg.key_file!r}"
            raise DeliveryError(f"{where}: not a PEM certificate and its matching private key: {err}") from err
    return context


def rc_value(rc: Any) -> int:
    """The number in a paho 1.x int or a paho 2.x ReasonCode."""
    value = getattr(rc, "value", rc)
    try:
        return int(value)
    except (TypeError, ValueError):
        return -1


def connack_text(rc: Any) -> str:
    if PAHO2:
        return str(rc)
    return mqtt.connack_string(rc)


def new_client(cfg: MqttConfig, client_id: str, password: Optional[str], reconnect_min: float,
               reconnect_max: float, max_inflight: int, clean_session: bool = True) -> Any:
    """A paho client for `cfg`, not yet connected and without callbacks.
    `clean_session=False` asks the broker to keep the session while the
    client is away (the collector's)."""
    if PAHO2:
        client = _Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id, clean_session=clean_session,
                         protocol=mqtt.MQTTv311)
    else:
        client = _Client(client_id=client_id, clean_session=clean_session, protocol=mqtt.MQTTv311)
    if cfg.username:
        client.username_pw_set(cfg.username, password)
    if cfg.tls:
        client.tls_set_context(tls_context(cfg))
    client.reconnect_delay_set(min_delay=reconnect_min, max_delay=reconnect_max)
    client.max_inflight_messages_set(max_inflight)
    return client
