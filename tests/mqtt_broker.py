"""A real mosquitto on a free loopback port, for the delivery tests.

`Broker` writes a config file into a temporary directory, starts mosquitto,
waits until the port accepts connections, and stops it on exit. `stop()` and
`start()` reuse the SAME port, so a client sees an outage and a return, not a
new broker. With ``persistence=True`` the broker keeps retained messages and
persistent sessions (queued QoS 1 messages) across such a restart.

Access control, as a fleet's broker would have it: ``users`` (name ->
password, written with mosquitto_passwd), ``acl`` (the text of a mosquitto
ACL file), and with ``tls`` a client certificate check
(``require_certificate=True`` and the CA in ``tls["cafile"]``; with
``identity_as_username=True`` the certificate's CN is the user the ACL sees).

`Collector` is a paho subscriber (1.6 or 2.x) that records what arrives.
"""

import contextlib
import os
import random
import signal
import socket
import ssl
import subprocess
import threading
import time
from typing import Any, Callable, Dict, Iterator, List, Optional

import paho.mqtt.client as mqtt

from conftest import need_program

HOST = "127.0.0.1"
PAHO2 = hasattr(mqtt, "CallbackAPIVersion")


def _openssl(*args: str, cwd: str) -> None:
    subprocess.run([need_program("openssl"), *args], cwd=cwd, check=True, capture_output=True)


_EC_KEY = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"]


def make_certs(directory: Any, names: str) -> Dict[str, str]:
    """A throw-away CA and a server certificate for `names` (subjectAltName).

    Returns the paths as ``ca``, ``certfile``, ``keyfile``; the CA's key stays
    in `directory` for `make_client_cert`.
    """
    d = str(directory)
    os.makedirs(d, exist_ok=True)
    _openssl("req", "-x509", *_EC_KEY, "-keyout", "ca.key", "-out", "ca.pem", "-days", "2",
             "-subj", "/CN=bandwatch test CA",
             "-addext", "basicConstraints=critical,CA:TRUE",
             "-addext", "keyUsage=critical,keyCertSign,cRLSign", cwd=d)
    _openssl("req", *_EC_KEY, "-keyout", "server.key", "-out", "server.csr", "-subj", "/CN=broker", cwd=d)
    with open(os.path.join(d, "ext.cnf"), "w") as f:
        f.write(
            "basicConstraints=CA:FALSE\nkeyUsage=digitalSignature\nextendedKeyUsage=serverAuth\n"
            "authorityKeyIdentifier=keyid\nsubjectKeyIdentifier=hash\n"
            f"subjectAltName={names}\n"
        )
    _openssl("x509", "-req", "-in", "server.csr", "-CA", "ca.pem", "-CAkey", "ca.key",
             "-CAcreateserial", "-out", "server.pem", "-days", "2", "-extfile", "ext.cnf", cwd=d)
    os.chmod(os.path.join(d, "server.key"), 0o644)  # mosquitto reads it
    return {k: os.path.join(d, v) for k, v in
            {"ca": "ca.pem", "certfile": "server.pem", "keyfile": "server.key"}.items()}


def make_client_cert(directory: Any, cn: str) -> Dict[str, str]:
    """A client certificate with common name `cn`, signed by the CA that
    `make_certs` left in `directory`; paths as ``certfile`` and ``keyfile``."""
    d = str(directory)
    _openssl("req", *_EC_KEY, "-keyout", f"{cn}.key", "-out", f"{cn}.csr", "-subj", f"/CN={cn}", cwd=d)
    with open(os.path.join(d, "client-ext.cnf"), "w") as f:
        f.write(
            "basicConstraints=CA:FALSE\nkeyUsage=digitalSignature\nextendedKeyUsage=clientAuth\n"
            "authorityKeyIdentifier=keyid\nsubjectKeyIdentifier=hash\n"
        )
    _openssl("x509", "-req", "-in", f"{cn}.csr", "-CA", "ca.pem", "-CAkey", "ca.key",
             "-CAcreateserial", "-out", f"{cn}.pem", "-days", "2", "-extfile", "client-ext.cnf", cwd=d)
    return {"certfile": os.path.join(d, f"{cn}.pem"), "keyfile": os.path.join(d, f"{cn}.key")}


def _ephemeral_low() -> int:
    try:
        with open("/proc/sys/net/ipv4/ip_local_port_range") as f:
            return int(f.read().split()[0])
    except (OSError, ValueError, IndexError):
        return 32768


def free_port() -> int:
    """A loopback TCP port nobody listens on right now.

    Picked below the kernel's ephemeral range: a broker that is down for a
    while must get its port back, and outgoing connections take their source
    ports from that range.
    """
    low = _ephemeral_low()
    rng = random.Random()
    for _ in range(200):
        port = rng.randrange(10000, max(10001, low))
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            try:
                s.bind((HOST, port))
            except OSError:
                continue
            return port
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((HOST, 0))
        return s.getsockname()[1]


def wait_for(condition: Callable[[], Any], timeout: float, interval: float = 0.02) -> Any:
    """Poll `condition` until it is truthy or `timeout` passes; return its last value."""
    deadline = time.monotonic() + timeout
    while True:
        value = condition()
        if value or time.monotonic() >= deadline:
            return value
        time.sleep(interval)


class Broker:
    """One mosquitto process on `port`, restartable on the same port."""

    def __init__(
        self,
        directory: str,
        port: Optional[int] = None,
        persistence: bool = False,
        users: Optional[Dict[str, str]] = None,
        tls: Optional[Dict[str, str]] = None,
        acl: Optional[str] = None,
        require_certificate: bool = False,
        identity_as_username: bool = False,
    ) -> None:
        self.program = need_program("mosquitto")
        self.directory = directory
        self.port = port or free_port()
        self.host = HOST
        self.persistence = persistence
        self.users = users or {}
        self.tls = tls
        self.acl = acl
        self.require_certificate = require_certificate
        self.identity_as_username = identity_as_username
        if (require_certificate or identity_as_username) and not (tls and tls.get("cafile")):
            raise ValueError("a client certificate check needs tls with a 'cafile' to verify it against")
        self.conf = os.path.join(directory, "mosquitto.conf")
        self.log_path = os.path.join(directory, "mosquitto.log")
        self.process: Optional[subprocess.Popen] = None
        os.makedirs(directory, exist_ok=True)
        self._write_config()

    def _write_config(self) -> None:
        lines = [f"listener {self.port} {HOST}"]
        if os.geteuid() == 0:
            # As root, mosquitto 2 drops to user "mosquitto" unless told not
            # to, and could then not read this temporary directory.
            lines.append("user root")
        if self.persistence:
            lines += ["persistence true", f"persistence_location {self.directory}/"]
        else:
            lines.append("persistence false")
        if self.users:
            passwd = os.path.join(self.directory, "passwd")
            tool = need_program("mosquitto_passwd")
            for i, (name, password) in enumerate(self.users.items()):
                flags = ["-b", "-c"] if i == 0 else ["-b"]
                subprocess.run([tool, *flags, passwd, name, password], check=True, capture_output=True)
            os.chmod(passwd, 0o600)
            lines += ["allow_anonymous false", f"password_file {passwd}"]
        elif self.identity_as_username:
            lines.append("allow_anonymous false")
        else:
            lines.append("allow_anonymous true")
        if self.acl is not None:
            acl_path = os.path.join(self.directory, "acl")
            with open(acl_path, "w") as f:
                f.write(self.acl)
            lines.append(f"acl_file {acl_path}")
        if self.tls:
            lines += [
                f"certfile {self.tls['certfile']}",
                f"keyfile {self.tls['keyfile']}",
            ]
            if self.tls.get("cafile"):
                lines.append(f"cafile {self.tls['cafile']}")
            if self.require_certificate or self.identity_as_username:
                lines.append("require_certificate true")
            if self.identity_as_username:
                lines.append("use_identity_as_username true")
        lines += ["log_dest stderr", "log_type error", "log_type warning", "log_type notice"]
        with open(self.conf, "w") as f:
            f.write("\n".join(lines) + "\n")

    def start(self, timeout: float = 10.0) -> "Broker":
        if self.process is not None and self.process.poll() is None:
            return self
        log = open(self.log_path, "ab")
        try:
            self.process = subprocess.Popen(
                [self.program, "-c", self.conf], stdout=log, stderr=subprocess.STDOUT
            )
        finally:
            log.close()
        if not wait_for(self._listening, timeout):
            self.stop()
            raise RuntimeError(f"mosquitto did not listen on {HOST}:{self.port}; see {self.log_path}:\n{self.log()}")
        return self

    def _listening(self) -> bool:
        if self.process is None or self.process.poll() is not None:
            raise RuntimeError(f"mosquitto exited early:\n{self.log()}")
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            s.settimeout(0.2)
            return s.connect_ex((HOST, self.port)) == 0

    def stop(self) -> None:
        """Stop mosquitto (SIGTERM, so it saves persistence; SIGKILL if it hangs)."""
        process, self.process = self.process, None
        if process is None or process.poll() is not None:
            return
        process.send_signal(signal.SIGCONT)  # in case it was paused
        process.send_signal(signal.SIGTERM)
        try:
            process.wait(timeout=5.0)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=5.0)

    def kill(self) -> None:
        """SIGKILL: the broker dies without saving anything, as in a crash."""
        process, self.process = self.process, None
        if process is not None and process.poll() is None:
            process.kill()
            process.wait(timeout=5.0)

    def pause(self) -> None:
        """SIGSTOP: the port stays open but nothing is read or acknowledged."""
        if self.process is not None:
            self.process.send_signal(signal.SIGSTOP)

    def resume(self) -> None:
        if self.process is not None:
            self.process.send_signal(signal.SIGCONT)

    def restart(self) -> "Broker":
        self.stop()
        return self.start()

    @property
    def running(self) -> bool:
        return self.process is not None and self.process.poll() is None

    def log(self) -> str:
        try:
            with open(self.log_path, "r", errors="replace") as f:
                return f.read()
        except OSError:
            return ""

    def __enter__(self) -> "Broker":
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()


@contextlib.contextmanager
def running_broker(directory: str, **kwargs: Any) -> Iterator[Broker]:
    """A started `Broker`, always stopped afterwards."""
    broker = Broker(directory, **kwargs)
    try:
        yield broker.start()
    finally:
        broker.stop()


def broker_fixture(**kwargs: Any) -> Callable[..., Iterator[Broker]]:
    """Make a pytest fixture body: ``broker = pytest.fixture(broker_fixture())``."""

    def fixture(tmp_path: Any) -> Iterator[Broker]:
        with running_broker(str(tmp_path / "broker"), **kwargs) as broker:
            yield broker

    return fixture


def make_client(client_id: str = "", clean_session: bool = True) -> Any:
    """A paho client, on the 2.x callback API when available."""
    if PAHO2:
        return mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id, clean_session=clean_session)
    return mqtt.Client(client_id=client_id, clean_session=clean_session)


class Message:
    def __init__(self, topic: str, payload: bytes, qos: int, retain: bool) -> None:
        self.topic = topic
        self.payload = payload
        self.qos = qos
        self.retain = retain

    def __repr__(self) -> str:
        return f"Message({self.topic!r}, {self.payload!r}, qos={self.qos}, retain={self.retain})"


class Collector:
    """Subscribes to `pattern` at `qos` and records every message, across reconnects.

    ``username``/``password`` log in on a broker with users (and an ACL);
    ``tls`` (``ca``, and ``certfile``/``keyfile`` for a client certificate)
    connects over TLS.
    With ``session=True`` it keeps a persistent session under a fixed id, so
    a persistence-enabled broker queues QoS 1 messages for it while it is
    away (MQTT 3.1.1 section 3.1.2.4: Clean Session 0).
    """

    def __init__(
        self,
        broker: Broker,
        pattern: str,
        qos: int = 1,
        session: bool = False,
        name: str = "",
        username: str = "",
        password: Optional[str] = None,
        tls: Optional[Dict[str, str]] = None,
    ) -> None:
        self.broker = broker
        self.pattern = pattern
        self.qos = qos
        self.messages: List[Message] = []
        self._lock = threading.Lock()
        self.subscribed = threading.Event()
        client_id = name or (f"collector-{os.getpid()}-{id(self)}" if session else "")
        self.client = make_client(client_id, clean_session=not session)
        if username:
            self.client.username_pw_set(username, password)
        if tls:
            self.client.tls_set(ca_certs=tls["ca"], certfile=tls.get("certfile"), keyfile=tls.get("keyfile"),
                                tls_version=ssl.PROTOCOL_TLS_CLIENT)
        self.client.on_connect = self._on_connect
        self.client.on_subscribe = self._on_subscribe
        self.client.on_message = self._on_message
        self.client.reconnect_delay_set(min_delay=0.1, max_delay=0.5)

    def _on_connect(self, client: Any, userdata: Any, *args: Any) -> None:
        client.subscribe(self.pattern, qos=self.qos)

    def _on_subscribe(self, client: Any, userdata: Any, *args: Any) -> None:
        self.subscribed.set()

    def _on_message(self, client: Any, userdata: Any, message: Any) -> None:
        with self._lock:
            self.messages.append(Message(message.topic, bytes(message.payload), message.qos, bool(message.retain)))

    def start(self, timeout: float = 5.0) -> "Collector":
        self.client.connect_async(self.broker.host, self.broker.port, keepalive=10)
        self.client.loop_start()
        if not self.subscribed.wait(timeout):
            raise RuntimeError(f"subscriber did not get a SUBACK for {self.pattern!r}")
        return self

    def stop(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()

    def on(self, topic: str) -> List[Message]:
        with self._lock:
            return [m for m in self.messages if m.topic == topic]

    def __enter__(self) -> "Collector":
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()
