"""MQTT in and out (OASIS MQTT 3.1.1): samples from a topic, events to topics, via paho-mqtt.

paho-mqtt is optional: nothing here imports it until an --mqtt-* option asks for MQTT, so the
gateway stays numpy + stdlib by default. Both client APIs work: 1.x (Debian bookworm's
python3-paho-mqtt is 1.6.1) and 2.x (PyPI).

Topics, under BASE = <prefix>/<bundle name> (prefix default "ganlet"):
    BASE/samples       in, QoS 1: samples (or the topic given to --mqtt-in)
    BASE/alerts        out, QoS 1: alert_opened / alert_closed events
    BASE/drift         out, QoS 1: drift events
    BASE/channels      out, QoS 1: channel_lost / channel_back events (blanks.py), reading_held
                       (held.py)
    BASE/input_errors  out, QoS 0: input_error events
    BASE/heartbeat     out, QoS 0: heartbeat events
    BASE/status        out, QoS 1, retained: "online" once connected (and subscribed), "offline"
                       at a clean stop, and "offline" as the last will when the link dies
An event's payload is the JSON object the gateway prints on stdout. A sample message is
{"time": ISO 8601 or epoch seconds, "values": {channel: number, ...}}, or a JSON array of them.

Delivery (why the order is what it is):
  in:  one persistent session (clean session 0, a fixed client id) with a QoS 1 subscription.
       A sample message is acknowledged only once a checkpoint covers it: paho 2.x acknowledges
       by hand (manual_ack); paho 1.x acknowledges when the message callback returns, so the
       callback waits there until the service has checkpointed. A message not acknowledged
       when the gateway dies is re-sent by the broker when it reconnects [MQTT-4.4.0-1]; the
       service skips what its checkpoint already covers (service.py), so nothing is lost or
       counted twice. The service checkpoints when the inbox runs dry or every ACK_BATCH
       messages, so a broker's in-flight window never stalls the feed.
  out: alerts go at QoS 1 (at least once, consumers de-duplicate by alert_id). An alert event
       the broker has not acknowledged is kept in the checkpoint (MqttSink.durable_state) and
       published again at the next start; events after the checkpoint are derived again by the
       input replay. While the broker is away QoS 1 events wait in the gateway's outbox and go
       out in order after reconnecting (MqttLink.flush says why paho alone would reorder
       them); QoS 0 events are dropped meanwhile. Reconnects back off from 1 s to 60 s.
"""

import collections
import configparser
import json
import math
import os
import queue
import socket
import ssl
import threading
import time
from typing import Callable, Dict, List, Optional, Union

from .intake import DECIMAL_HINT, RowError, channel_values, parse_time
from .sources import Record, Stop
from .times import TimeError, checked_time

DEFAULT_PREFIX = "ganlet"
PLAIN_PORT, TLS_PORT = 1883, 8883  # IANA's ports for MQTT and MQTT over TLS (from memory)
KEEPALIVE_S = 30
RECONNECT_S = (1, 60)  # paho's back-off doubles the wait from 1 s up to 60 s
# Checkpoint and acknowledge at least every ACK_BATCH handled messages: fewer than mosquitto's
# default in-flight window of 20 messages per client (mosquitto.conf, from memory).
ACK_BATCH = 10
DRAIN_S = 5.0  # a clean stop waits this long for the broker to acknowledge alerts
RESEND_WAIT_S = 10.0  # after a reconnect, new events wait at most this long behind re-sends
MAX_MESSAGE_BYTES = 1 << 20
MAX_UNACKED = 1000  # alert events kept for re-sending (the newest)
POLL_S = 0.2
MESSAGE_REJECT_KINDS = ("bad_message",)  # not JSON, or not the sample layout
EVENT_TOPICS = {  # event -> (topic under BASE, QoS)
    "alert_opened": ("alerts", 1),
    "alert_closed": ("alerts", 1),
    "drift": ("drift", 1),
    "drift_grew": ("drift", 1),
    "drift_ended": ("drift", 1),
    "channel_lost": ("channels", 1),
    "channel_back": ("channels", 1),
    "reading_held": ("channels", 1),
    "time_jump": ("input_errors", 0),
    "input_error": ("input_errors", 0),
    "heartbeat": ("heartbeat", 0),
}
CONFIG_KEYS = ("host", "port", "prefix", "client_id", "username", "password", "tls", "ca_file",
               "cert_file", "key_file", "keepalive")
INSTALL_HINT = ("MQTT needs the paho-mqtt client library, which this Python cannot import: "
                "on Debian or Raspberry Pi OS `apt-get install python3-paho-mqtt`, elsewhere "
                "`pip install paho-mqtt`")


class MqttUnavailable(Exception):
    """paho-mqtt cannot be imported; the message says what to install."""


class MqttConfigError(Exception):
    """The MQTT settings cannot be used; the message says why."""


# ---------------------------------------------------------------------- the client library
def paho_module():
    """(paho.mqtt.client, its version) or MqttUnavailable."""
    try:
        import paho.mqtt
        import paho.mqtt.client as client
    except ImportError:
        raise MqttUnavailable(INSTALL_HINT) from None
    return client, str(getattr(paho.mqtt, "__version__", "0"))


def availability() -> dict:
    """For `run.py check`: can this gateway talk MQTT, and with which client."""
    try:
        _, version = paho_module()
    except MqttUnavailable as exc:
        return {"available": False, "client": None, "detail": str(exc)}
    return {"available": True, "client": f"paho-mqtt {version}", "detail": None}


# ---------------------------------------------------------------------- settings
class MqttSettings:
    """Where the broker is, how to log in, and which directions are on."""

    def __init__(self, host: str = "localhost", port: Optional[int] = None,
                 prefix: str = DEFAULT_PREFIX, client_id: Optional[str] = None,
                 username: Optional[str] = None, password: Optional[str] = None,
                 tls: bool = False, ca_file: Optional[str] = None,
                 cert_file: Optional[str] = None, key_file: Optional[str] = None,
                 keepalive: int = KEEPALIVE_S, subscribe: Optional[str] = None,
                 publish: bool = False):
        self.host = host
        self.tls = bool(tls or ca_file or cert_file)
        self.port = int(port) if port is not None else (TLS_PORT if self.tls else PLAIN_PORT)
        self.prefix = prefix
        self.client_id = client_id
        self.username = username
        self.password = password
        self.ca_file = ca_file
        self.cert_file = cert_file
        self.key_file = key_file
        self.keepalive = int(keepalive)
        self.subscribe = subscribe  # "" = the default samples topic, None = no MQTT input
        self.publish = publish


def read_config(path) -> Dict[str, str]:
    """The [mqtt] section of an INI file that only its owner may read (it may hold a password)."""
    try:
        mode = os.stat(path).st_mode
        with open(path, encoding="utf-8") as fh:
            text = fh.read()
    except (OSError, UnicodeDecodeError) as exc:
        raise MqttConfigError(f"--mqtt-config {path}: {exc}") from None
    if mode & 0o077:
        raise MqttConfigError(
            f"--mqtt-config {path}: mode {oct(mode & 0o777)} lets other users read or change "
            f"it, and it may hold the broker password; make it the service user's own: "
            f"chmod 600 {path}")
    parser = configparser.ConfigParser(interpolation=None)
    try:
        parser.read_string(text, source=str(path))
    except configparser.Error as exc:
        raise MqttConfigError(f"--mqtt-config {path}: {exc}") from None
    if not parser.has_section("mqtt"):
        raise MqttConfigError(f"--mqtt-config {path}: no [mqtt] section")
    section = dict(parser.items("mqtt"))
    unknown = sorted(set(section) - set(CONFIG_KEYS))
    if unknown:
        raise MqttConfigError(f"--mqtt-config {path}: unknown key(s) {unknown}; "
                              f"known: {', '.join(CONFIG_KEYS)}")
    return section


def _integer(name: str, text) -> int:
    try:
        value = int(text)
    except (TypeError, ValueError):
        raise MqttConfigError(f"MQTT {name} {text!r} is not a whole number") from None
    if value < 0 or value > 65535:
        raise MqttConfigError(f"MQTT {name} {value} is out of range")
    return value


def _boolean(text) -> bool:
    if isinstance(text, bool):
        return text
    word = str(text).strip().lower()
    if word not in ("1", "0", "yes", "no", "true", "false", "on", "off"):
        raise MqttConfigError(f"MQTT tls {text!r} is not yes or no")
    return word in ("1", "yes", "true", "on")


def check_topic(topic: str, what: str) -> str:
    """A topic name we publish to or read from: no wildcards, no empty levels at the ends.

    OASIS MQTT 3.1.1 section 4.7: '+' and '#' are wildcards of topic filters and must not occur
    in a topic name [MQTT-4.7.1-1, from memory]; one bundle reads one stream, so the input
    topic is a name, not a filter."""
    if not topic or any(c in topic for c in "+#\0") or topic.startswith("/") or topic.endswith("/"):
        raise MqttConfigError(f"MQTT {what} {topic!r}: a topic name, without '+', '#', or a "
                              "leading or trailing '/'")
    return topic


def topic_level(name: str) -> str:
    """A bundle name as one topic level ('/' would split it, '+' '#' are wildcards)."""
    return "".join("_" if c in "/+#\0" else c for c in name) or "bundle"


def default_client_id(bundle_id: str) -> str:
    """Stable across restarts (the persistent session is found by it), distinct per host."""
    host = "".join(c for c in socket.gethostname() if c.isalnum() or c in "-_") or "gateway"
    return f"ganlet-{host}-{bundle_id[:8]}"


def resolve_settings(options: dict, config_path: Optional[str], bundle_id: str) -> MqttSettings:
    """Command-line options over the config file over the defaults."""
    merged = dict(read_config(config_path)) if config_path else {}
    merged.update({k: v for k, v in options.items() if v is not None and v is not False})
    if merged.get("key_file") and not merged.get("cert_file"):
        raise MqttConfigError("MQTT key_file without cert_file: give the client certificate too")
    settings = MqttSettings(
        host=merged.get("host", "localhost"),
        port=_integer("port", merged["port"]) if "port" in merged else None,
        prefix=check_topic(merged.get("prefix", DEFAULT_PREFIX), "prefix"),
        client_id=merged.get("client_id") or default_client_id(bundle_id),
        username=merged.get("username"), password=merged.get("password"),
        tls=_boolean(merged.get("tls", False)), ca_file=merged.get("ca_file"),
        cert_file=merged.get("cert_file"), key_file=merged.get("key_file"),
        keepalive=_integer("keepalive", merged.get("keepalive", KEEPALIVE_S)),
        subscribe=merged.get("subscribe"), publish=bool(merged.get("publish")),
    )
    if settings.subscribe:
        check_topic(settings.subscribe, "input topic")
    return settings


class Topics:
    def __init__(self, prefix: str, bundle_name: str, samples: Optional[str] = None):
        self.base = f"{prefix}/{topic_level(bundle_name)}"
        self.samples = samples or self.base + "/samples"
        self.status = self.base + "/status"

    def of(self, kind: str) -> str:
        return f"{self.base}/{kind}"


# ---------------------------------------------------------------------- sample messages
def _cell(name: str, value) -> Union[str, float]:
    """A sample's value as a CSV cell: null is blank, a string is its text (bridges that publish
    every reading as text: "41.2", or a quality flag "Bad"), a number its finite float; then
    the row is read by the CSV rule (intake.channel_values)."""
    if value is None:
        return ""
    if isinstance(value, str):
        return value.strip()
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise RowError("non_numeric", f"channel {name!r}: {str(value)[:40]!r}")
    try:
        number = float(value)  # JSON integers have no bound: 1e400 written out overflows
    except OverflowError:
        number = math.inf
    if not math.isfinite(number):
        raise RowError("non_finite", f"channel {name!r}: {str(value)[:40]!r}")
    return number


def _time_of(item: dict) -> float:
    t = item.get("time")
    if isinstance(t, str):
        return parse_time(t.strip())
    if isinstance(t, (int, float)) and not isinstance(t, bool):
        try:
            number = float(t)
        except OverflowError:  # a JSON integer beyond a float
            number = math.inf
        try:  # the CSV epoch cell's rule: 1900..9999, a hint for milliseconds
            return checked_time(number, str(t), epoch=True)
        except TimeError as exc:
            raise RowError("bad_time", str(exc)) from None
    raise RowError("bad_time", f"'time' {str(t)[:40]!r} is neither ISO 8601 nor epoch seconds")


def sample_record(item, channels: List[str], lineno: int) -> Record:
    """One sample object -> a Record (values in model channel order, or the error)."""
    if not isinstance(item, dict):
        return Record(lineno, error=RowError("bad_message", "a sample is a JSON object"))
    try:
        t = _time_of(item)
    except RowError as exc:
        return Record(lineno, error=exc)
    values = item.get("values")
    if not isinstance(values, dict):
        return Record(lineno, time=t, error=RowError(
            "bad_message", "a sample needs a 'values' object {channel: number}"))
    try:  # null or absent: a blank reading (blanks.py)
        row, n_text = channel_values([(name, _cell(name, values.get(name)))
                                      for name in channels])
    except RowError as exc:  # without the CSV hint: MQTT input takes no --decimal
        return Record(lineno, time=t, error=RowError(exc.kind,
                                                     exc.detail.replace(DECIMAL_HINT, "")))
    return Record(lineno, time=t, values=row, text_cells=n_text)


def message_records(payload: bytes, channels: List[str], first_lineno: int) -> List[Record]:
    """A sample message (one object or an array of them) -> Records, numbered from first_lineno."""
    if len(payload) > MAX_MESSAGE_BYTES:
        return [Record(first_lineno, error=RowError(
            "too_long", f"{len(payload)} bytes > {MAX_MESSAGE_BYTES}"))]
    try:
        doc = json.loads(payload.decode("utf-8"))
    except UnicodeDecodeError:
        return [Record(first_lineno, error=RowError("bad_encoding", "message is not UTF-8"))]
    except ValueError as exc:
        return [Record(first_lineno, error=RowError("bad_message", f"not JSON ({exc})"))]
    except RecursionError:  # arrays or objects nested thousands deep: raised, not a ValueError
        return [Record(first_lineno, error=RowError("bad_message", "JSON nested too deep"))]
    items = doc if isinstance(doc, list) else [doc]
    return [sample_record(item, channels, first_lineno + k) for k, item in enumerate(items)]


# ---------------------------------------------------------------------- the connection
class Inbound:
    """A received message, the connection it came on, and (paho 1.x) its held callback."""

    __slots__ = ("msg", "generation", "release")

    def __init__(self, msg, generation: int, release: Optional[threading.Event]):
        self.msg = msg
        self.generation = generation
        self.release = release


class MqttLink:
    """One broker connection shared by the source and the sink: a paho client run by paho's
    network thread (loop_start), which connects and reconnects with back-off on its own."""

    def __init__(self, settings: MqttSettings, bundle, log: Callable[[str], None]):
        client_mod, version = paho_module()
        self.settings = settings
        self.topics = Topics(settings.prefix, bundle.manifest["name"], settings.subscribe)
        self.identity = {"bundle_id": bundle.bundle_id, "name": bundle.manifest["name"]}
        self.log = log
        self.manual_ack = int(version.split(".")[0]) >= 2
        self.inbox = queue.Queue()  # type: queue.Queue
        # Never call into paho while holding self.lock: paho runs on_publish under its own
        # message lock, which publish() takes too; on_publish only queues the mid in `acked`.
        self.lock = threading.Lock()
        self.outbox = collections.deque()  # QoS 1 events not handed to paho yet, in order
        self.unacked = {}  # type: Dict[int, dict]  # mid -> QoS 1 event not acknowledged yet
        self.in_flight = {}  # type: Dict[int, int]  # every QoS 1 mid -> connection sent on
        self.acked = collections.deque()  # mids the broker acknowledged, not yet settled
        self.generation = 0  # connections so far; an ack only goes back on the same one
        self.connected = threading.Event()
        self.connected_at = 0.0
        self.held = 0  # paho 1.x: message callbacks waiting for their checkpoint
        self.closing = False
        self.closed = False
        self.stop_reason = None  # type: Optional[str]
        self.counts = {"received": 0, "published": 0, "resent": 0, "dropped": 0}
        self.client = self._client(client_mod)

    # -------------------------------------------------------------- set-up
    def _client(self, m):
        s = self.settings
        kwargs = {"client_id": s.client_id, "clean_session": False, "protocol": m.MQTTv311}
        if self.manual_ack:
            client = m.Client(m.CallbackAPIVersion.VERSION2, manual_ack=True, **kwargs)
        else:
            client = m.Client(**kwargs)
        if s.username is not None:
            client.username_pw_set(s.username, s.password)
        if s.tls:
            try:
                client.tls_set(ca_certs=s.ca_file, certfile=s.cert_file, keyfile=s.key_file)
            except (OSError, ssl.SSLError, ValueError) as exc:
                raise MqttConfigError(f"MQTT TLS files cannot be used: {exc}") from None
        # OASIS MQTT 3.1.1 3.1.2.5-3.1.2.7 (5.0: 3.1.2.5, 3.1.3.2): the broker publishes the
        # will when the connection ends without DISCONNECT; retained, so a SCADA/HMI that
        # subscribes later still sees that this gateway is gone
        client.will_set(self.topics.status, self._status("offline", "connection_lost"),
                        qos=1, retain=True)
        client.reconnect_delay_set(*RECONNECT_S)
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        client.on_subscribe = self._on_subscribe
        client.on_message = self._on_message
        client.on_publish = self._on_publish
        return client

    def start(self) -> None:
        s = self.settings
        self.log(f"mqtt: connecting to {s.host}:{s.port} as {s.client_id!r}"
                 f"{' over TLS' if s.tls else ''} (paho "
                 f"{'2.x, manual acknowledgement' if self.manual_ack else '1.x, held callback'})")
        self.client.connect_async(s.host, s.port, s.keepalive)
        self.client.loop_start()  # connects, and reconnects with back-off, in its own thread

    def _status(self, state: str, reason: Optional[str] = None) -> str:
        doc = dict(state=state, **self.identity)
        if reason is not None:
            doc["reason"] = reason
        return json.dumps(doc, separators=(",", ":"))

    # -------------------------------------------------------------- paho callbacks
    # (paho 1.x and 2.x pass different trailing arguments; *rest takes either)
    def _on_connect(self, client, userdata, flags, rc, *rest):
        code = getattr(rc, "value", rc)
        if code != 0:
            self.log(f"mqtt: broker refused the connection ({rc}); retrying with back-off")
            return
        self.generation += 1
        self.connected_at = time.monotonic()
        self.connected.set()
        self.log(f"mqtt: connected to {self.settings.host}:{self.settings.port}")
        if self.settings.subscribe is not None:
            client.subscribe(self.topics.samples, qos=1)  # "online" once the broker confirms
        else:
            self._publish_status(client, "online")

    def _on_subscribe(self, client, userdata, mid, granted, *rest):
        codes = [getattr(g, "value", g) for g in granted]
        if any(c >= 0x80 for c in codes):  # SUBACK failure, OASIS MQTT 3.1.1 3.9.3
            self.log(f"mqtt: broker refused the subscription to {self.topics.samples}")
            return
        if any(c == 0 for c in codes):
            self.log("mqtt: the broker granted QoS 0 only: samples are not re-sent after a crash")
        self._publish_status(client, "online")

    def _publish_status(self, client, state: str, reason: Optional[str] = None) -> None:
        info = client.publish(self.topics.status, self._status(state, reason), qos=1, retain=True)
        with self.lock:
            self.in_flight[info.mid] = self.generation

    def _on_disconnect(self, client, userdata, *args):
        self.connected.clear()
        if not self.closing:
            self.log(f"mqtt: connection lost; reconnecting with back-off "
                     f"({RECONNECT_S[0]} s to {RECONNECT_S[1]} s)")

    def _on_publish(self, client, userdata, mid, *rest):
        self.acked.append(mid)  # no lock here (see __init__); settled by _settle()

    def _settle(self) -> None:
        """Forget what the broker acknowledged (called with self.lock held, by the main
        thread). Each mid is registered before its acknowledgement is settled: events are
        published and settled by the main thread; a status published in paho's thread is
        registered there before that thread can read its acknowledgement."""
        while self.acked:
            mid = self.acked.popleft()
            self.unacked.pop(mid, None)
            self.in_flight.pop(mid, None)

    def _on_message(self, client, userdata, msg):
        self.counts["received"] += 1
        if self.manual_ack or msg.qos == 0:
            self.inbox.put(Inbound(msg, self.generation, None))
            return
        # paho 1.x sends the PUBACK when this callback returns: wait for the checkpoint
        release = threading.Event()
        self.held += 1
        self.inbox.put(Inbound(msg, self.generation, release))
        try:
            while not release.wait(POLL_S):
                if self.closing:  # DISCONNECT is queued ahead of this PUBACK: never sent
                    return
        finally:
            self.held -= 1

    # -------------------------------------------------------------- used by source and sink
    def ack(self, item: Inbound) -> None:
        """The service has made this message durable: let the broker forget it."""
        if item.release is not None:
            item.release.set()
        elif item.msg.qos > 0 and item.generation == self.generation:
            # a message from an older connection is re-sent by the broker on this one and
            # acknowledged then; its old packet id may name another message by now
            self.client.ack(item.msg.mid, item.msg.qos)

    def publish_event(self, event: dict) -> None:
        """QoS 1 events go out in order through the outbox; QoS 0 ones only while connected."""
        topic, qos = EVENT_TOPICS[event["event"]]
        if qos:
            self.outbox.append(event)
            self.flush()
        elif self.connected.is_set():
            self._send(event, topic, qos)
        else:
            self.counts["dropped"] += 1

    def flush(self) -> None:
        """Hand queued events to paho, in order, when they cannot overtake older ones (main
        thread only). paho re-sends what was in flight on the previous connection only after
        on_connect returns, and sends at once what is published meanwhile: so new events wait
        until those re-sends are acknowledged (at most RESEND_WAIT_S)."""
        while True:
            with self.lock:
                self._settle()
                if not self.outbox or not self._may_send():
                    return
                event = self.outbox.popleft()
            self._send(event, *EVENT_TOPICS[event["event"]])

    def _may_send(self) -> bool:
        if not self.connected.is_set():
            return False
        if time.monotonic() - self.connected_at > RESEND_WAIT_S:
            return True
        return all(g >= self.generation for g in self.in_flight.values())

    def _send(self, event: dict, topic: str, qos: int) -> None:
        payload = json.dumps(event, separators=(",", ":"), allow_nan=False)
        info = self.client.publish(self.topics.of(topic), payload, qos=qos)
        if qos:  # an acknowledgement that came first waits in self.acked
            with self.lock:
                self.unacked[info.mid] = event
                self.in_flight[info.mid] = self.generation
        self.counts["published"] += 1

    def unacknowledged(self) -> List[dict]:
        """QoS 1 events the broker has not acknowledged, oldest first (main thread only)."""
        with self.lock:
            self._settle()
            return (list(self.unacked.values()) + list(self.outbox))[-MAX_UNACKED:]

    def drain(self, timeout: float = DRAIN_S) -> bool:
        """Wait until the broker has acknowledged every QoS 1 publish (or the timeout)."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            self.flush()
            with self.lock:
                if not self.in_flight and not self.outbox:
                    return True
            if self.held:
                return False  # paho 1.x: a held message blocks the network thread
            time.sleep(0.02)
        return False

    def close(self) -> None:
        if self.closed:
            return
        self.closed = True
        self._publish_status(self.client, "offline", self.stop_reason or "stopped")
        # the service drained the alerts already; if the broker is away, do not wait twice
        self.drain(DRAIN_S if self.connected.is_set() else 0.5)
        self.client.disconnect()
        self.closing = True
        self.client.loop_stop()
        c = self.counts
        self.log(f"mqtt: {c['received']} messages in, {c['published']} events out "
                 f"({c['resent']} re-sent from the checkpoint, {c['dropped']} QoS 0 events "
                 f"dropped while disconnected), "
                 f"{len(self.unacknowledged())} alert events unacknowledged at close")


# ---------------------------------------------------------------------- source and sink
class MqttSource:
    """Records from the samples topic, in arrival order. Acknowledges a message only after a
    checkpoint that covers it: commit() is the service's checkpoint, which calls acknowledge()."""

    def __init__(self, link: MqttLink, channels: List[str], idle, commit, control):
        self.link = link
        self.channels = channels
        self.idle = idle
        self.commit = commit
        self.control = control
        self.handled = []  # type: List[Inbound]
        self.last_time = None  # type: Optional[float]
        self.repeats = 0

    def acknowledge(self) -> None:
        for item in self.handled:
            self.link.ack(item)
        self.handled.clear()

    def _next(self) -> Inbound:
        while True:
            if self.control.stop_signal is not None:
                raise Stop()
            try:
                return self.link.inbox.get(timeout=POLL_S)
            except queue.Empty:
                self.idle()

    def _repeat(self, msg, records: List[Record]) -> bool:
        """A message the broker sends again (DUP after a reconnect [MQTT-4.4.0-1], or RETAIN on
        subscribing [MQTT-3.3.1-8], from memory) whose samples were all read already."""
        if not (msg.dup or msg.retain) or self.last_time is None or not records:
            return False
        return all(r.time is not None and r.time <= self.last_time for r in records)

    def __iter__(self):
        lineno = 0
        while True:
            if self.handled and (self.link.inbox.empty() or len(self.handled) >= ACK_BATCH):
                self.commit()
            item = self._next()
            records = message_records(item.msg.payload, self.channels, lineno + 1)
            lineno += len(records)
            if self._repeat(item.msg, records):
                self.repeats += 1
            else:
                for rec in records:
                    yield rec
                    if rec.values is not None:
                        self.last_time = max(rec.time, self.last_time or rec.time)
            self.handled.append(item)


class MqttSink:
    """Events to the broker (EVENT_TOPICS). Alert events not yet acknowledged by the broker
    are kept in the checkpoint and published again after a restart."""

    name = "mqtt"

    def __init__(self, link: MqttLink, resume: Optional[dict] = None):
        self.link = link
        pending = (resume or {}).get("unacknowledged", [])
        for event in pending:
            link.publish_event(event)
        link.counts["resent"] += len(pending)
        if pending:
            link.log(f"mqtt: re-sending {len(pending)} alert event(s) the broker had not "
                     "acknowledged before the restart")

    def handle(self, event: dict) -> None:
        self.link.flush()  # events held back while the broker was away go first
        if event["event"] == "stop":
            self.link.stop_reason = event.get("reason")
        elif event["event"] in EVENT_TOPICS:
            self.link.publish_event(event)

    def durable_state(self) -> dict:
        return {"unacknowledged": self.link.unacknowledged()}

    def close(self) -> None:
        pass  # the link outlives the sinks: run_stream closes it after the last event
