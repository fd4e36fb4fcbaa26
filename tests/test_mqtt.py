"""MQTT in and out against a real broker: Debian's mosquitto, started here on a free loopback
port with a config file of our own (no system service), and paho-mqtt as the subscriber a
SCADA/HMI would be.

What is checked against the outside: the broker and paho implement OASIS MQTT 3.1.1; each check
that relies on the standard names the section beside it (section numbers and normative ids are
from memory). The reference for what the gateway must emit is the same bundle run on the same
samples from a CSV file: alerts, the SQLite store and the scores file must come out identical.
"""

import json
import math
import os
import pwd
import shutil
import signal
import socket
import sqlite3
import stat
import subprocess
import sys
import threading
import time
from pathlib import Path

import gateways as gw
import numpy as np
import pandas as pd
import pytest
import runtime_fixtures as fx
from stream_helpers import scores_rows

from ganlet.runtime.intake import format_time
from ganlet.runtime.mqtt import MqttConfigError, message_records, read_config
from ganlet.runtime.sources import CsvSource

paho_client = pytest.importorskip(
    "paho.mqtt.client", reason="paho-mqtt is not installed (the dev extra brings it: "
                               "pip install -e '.[dev]')")
import paho.mqtt  # noqa: E402

MOSQUITTO = shutil.which("mosquitto") or next(
    (p for p in ("/usr/sbin/mosquitto",) if os.access(p, os.X_OK)), None)
needs_broker = pytest.mark.skipif(
    MOSQUITTO is None, reason="mosquitto not found (Debian: apt-get install mosquitto; "
                              ".ci/run installs it)")

N_ROWS = 800
ANOMALIES = [(200, 30, 0, 7.0), (480, 25, 1, 8.0), (680, 30, 2, 7.5)]
ALERTING = {"warmup_hops": 4, "min_hops": 2, "close_ratio": 0.8, "cooldown_hops": 2}
BASE = "ganlet/fixture-pump"  # prefix / bundle name
NAMES = [c for c, _ in fx.CHANNELS]
WAIT_S = 60.0


# ---------------------------------------------------------------------- helpers
def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def wait_until(predicate, timeout: float = WAIT_S, what: str = "condition"):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        time.sleep(0.05)
    raise AssertionError(f"timed out after {timeout} s waiting for {what}")


class Broker:
    """mosquitto on 127.0.0.1 with persistence, so a restart keeps the sessions (as a plant
    broker is run: common practice)."""

    def __init__(self, folder: Path, extra: str = "", port=None):
        self.folder = folder
        self.port = port or free_port()
        self.proc = None
        folder.mkdir(parents=True, exist_ok=True)
        # `user`: mosquitto started as root switches to this user; keep the test's own
        self.conf = folder / "mosquitto.conf"
        self.conf.write_text(
            f"listener {self.port} 127.0.0.1\n"
            f"allow_anonymous true\n"
            f"persistence true\npersistence_location {folder}/\n"
            f"max_queued_messages 100000\n"
            f"log_dest file {folder}/broker.log\n"
            f"user {pwd.getpwuid(os.geteuid()).pw_name}\n" + extra)

    def start(self) -> "Broker":
        self.proc = subprocess.Popen([MOSQUITTO, "-c", str(self.conf)],
                                     stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        wait_until(self._accepts, 10, "mosquitto to listen")
        return self

    def _accepts(self) -> bool:
        if self.proc.poll() is not None:
            raise AssertionError(f"mosquitto exited: {self.proc.stderr.read().decode()}")
        try:
            socket.create_connection(("127.0.0.1", self.port), timeout=0.2).close()
            return True
        except OSError:
            return False

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()  # SIGTERM: mosquitto saves its persistence file and exits
            self.proc.wait(timeout=10)
        self.proc = None


def make_client(client_id: str, clean: bool = True):
    if int(paho.mqtt.__version__.split(".")[0]) >= 2:
        return paho_client.Client(paho_client.CallbackAPIVersion.VERSION2, client_id=client_id,
                                  clean_session=clean)
    return paho_client.Client(client_id=client_id, clean_session=clean)


class Listener:
    """What a SCADA/HMI does: a persistent session subscribed to BASE/# at QoS 1."""

    def __init__(self, port: int, client_id: str = "hmi", topic: str = BASE + "/#",
                 auth=None):
        self.messages = []  # (topic, payload dict, qos, retain)
        subscribed = threading.Event()
        self.client = make_client(client_id, clean=False)
        self.client.on_message = self._on_message
        self.client.on_connect = lambda c, *a: c.subscribe(topic, qos=1)
        self.client.on_subscribe = lambda *a: subscribed.set()
        if auth:
            self.client.username_pw_set(*auth)
        self.client.reconnect_delay_set(1, 2)
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()
        assert subscribed.wait(10), "the HMI could not subscribe"

    def _on_message(self, client, userdata, m):
        if m.topic == BASE + "/samples":
            return  # the feed itself (it shares the prefix)
        self.messages.append((m.topic, json.loads(m.payload), m.qos, bool(m.retain)))

    def of(self, kind: str):
        return [(p, q, r) for t, p, q, r in list(self.messages) if t == f"{BASE}/{kind}"]

    def payloads(self, kind: str):
        return [p for p, _, _ in self.of(kind)]

    def last_heartbeat(self):
        beats = self.payloads("heartbeat")
        return beats[-1] if beats else None

    def close(self):
        self.client.disconnect()
        self.client.loop_stop()


class Feeder:
    """The sensor side: publishes sample messages at QoS 1 (persistent session, so paho keeps
    and re-sends them across a broker restart)."""

    def __init__(self, port: int):
        self.client = make_client("feeder", clean=False)
        self.client.reconnect_delay_set(1, 2)
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()

    def send(self, values: np.ndarray, start: int, batch: int = 1) -> int:
        """Rows start.. of `values` as messages of `batch` samples; returns messages sent."""
        samples = [{"time": format_time(fx.T0 + start + k),
                    "values": dict(zip(NAMES, map(float, row)))} for k, row in enumerate(values)]
        sent = 0
        for i in range(0, len(samples), batch):
            chunk = samples[i:i + batch]
            self.send_raw(json.dumps(chunk[0] if batch == 1 else chunk))
            sent += 1
        return sent

    def send_raw(self, payload: str) -> None:
        self.client.publish(BASE + "/samples", payload, qos=1)

    def close(self):
        self.client.disconnect()
        self.client.loop_stop()


def gateway_cmd(bundle: Path, port: int, out: Path, *extra, python=(sys.executable,)):
    return [*python, str(bundle / "run.py"), "stream", "--mqtt-in", "--mqtt-out",
            "--mqtt-host", "127.0.0.1", "--mqtt-port", str(port), "--mqtt-client-id", "gw-test",
            "--backend", "numpy", "--score-every", "0", "--heartbeat", "0.2",
            "--state", str(out / "state.json"), "--alert-db", str(out / "alerts.db"),
            "--scores-out", str(out / "scores.csv"), *extra]


def start_gateway(cmd, listener: Listener, env=None, stderr_path=None):
    """Start the gateway and wait for its retained "online" status, published once the broker
    has confirmed the samples subscription."""
    before = len(listener.payloads("status"))
    err = open(stderr_path, "ab") if stderr_path else subprocess.DEVNULL
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=err, env=env)
    wait_until(lambda: any(s["state"] == "online" for s in listener.payloads("status")[before:]),
               WAIT_S, "the gateway's online status")
    return proc


def alerts_db(path):
    # reference: the standard sqlite3 module reading the file the service wrote
    with sqlite3.connect(str(path)) as db:
        return db.execute("SELECT id, status, opened, closed, peak_score, threshold, channels, "
                          "hops FROM alerts ORDER BY opened").fetchall()


def unique_alerts(listener: Listener):
    """Alert messages de-duplicated by (event, alert_id), as a consumer does (QoS 1 is at
    least once); every copy of one must be the same event."""
    seen = {}
    for p in listener.payloads("alerts"):
        key = (p["event"], p["alert_id"])
        assert seen.setdefault(key, p) == p, f"two different payloads for {key}"
    return list(seen.values())


def processed_after(listener: Listener, row: int) -> bool:
    beat = listener.last_heartbeat()
    return beat is not None and beat["last_time"] is not None and \
        beat["last_time"] >= format_time(fx.T0 + row)  # ISO 8601 UTC sorts as text


def processed_all(listener: Listener, n_rows: int) -> bool:
    beat = listener.last_heartbeat()
    return beat is not None and beat["last_time"] == format_time(fx.T0 + n_rows - 1)


# ---------------------------------------------------------------------- fixtures
def csv_run(bundle: Path, values: np.ndarray, folder: Path) -> dict:
    """The reference: the same bundle on the same rows from a CSV file, no MQTT."""
    folder.mkdir()
    fx.write_csv(folder / "input.csv", values)
    done = subprocess.run(
        [sys.executable, str(bundle / "run.py"), "stream", "--input", str(folder / "input.csv"),
         "--backend", "numpy", "--score-every", "0", "--heartbeat", "0",
         "--alert-db", str(folder / "alerts.db"), "--scores-out", str(folder / "scores.csv")],
        capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    events = [json.loads(x) for x in done.stdout.splitlines()]
    alerts = [e for e in events if e["event"] in ("alert_opened", "alert_closed")]
    return {"alerts": alerts, "base": folder, "csv": folder / "input.csv"}


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    root = tmp_path_factory.mktemp("mqtt")
    bundle = fx.build_bundle(root / "bundle", alerting=ALERTING, onnx_model=False)
    values = fx.raw_values(N_ROWS, seed=11, anomalies=ANOMALIES)
    ref = csv_run(bundle, values, root / "baseline")
    assert len(ref["alerts"]) >= 4  # precondition: the feed raises several alerts
    return dict(ref, bundle=bundle, values=values, root=root)


@pytest.fixture
def broker(tmp_path):
    b = Broker(tmp_path / "broker").start()
    yield b
    b.stop()


def _same_as_baseline(setup, out: Path, listener: Listener):
    assert unique_alerts(listener) == setup["alerts"]  # same ids, times, peaks, channels
    assert alerts_db(out / "alerts.db") == alerts_db(setup["base"] / "alerts.db")
    # no sample lost or read twice: the scores file is byte for byte the CSV run's
    assert scores_rows(out / "scores.csv") == scores_rows(setup["base"] / "scores.csv")


# ---------------------------------------------------------------------- without a broker
def test_sample_messages_parse_and_reject_by_kind():
    recs = message_records(json.dumps([
        {"time": "2024-03-01T00:00:00Z", "values": {"flow": 1, "pressure": 2.5, "vibration": 3,
                                                     "extra": "ignored"}},
        {"time": 1709251201, "values": {"flow": 1, "pressure": 2, "vibration": None}},
        {"time": "yesterday", "values": {"flow": 1, "pressure": 2, "vibration": 3}},
        {"time": 1709251203, "values": {"flow": [1], "pressure": 2, "vibration": 3}},
        {"time": 1709251204, "values": {"flow": None}},
        {"time": 1709251205, "values": [1, 2, 3]},
        "flow=1",
    ]).encode() + b"", NAMES, first_lineno=7)
    # reference for the times: 2024-03-01T00:00:00Z is 1709251200 s after the Unix epoch
    # (worked out by hand: 19783 days x 86400 s)
    assert recs[0].time == 1709251200.0 and recs[0].values == [1.0, 2.5, 3.0]
    kinds = [r.error.kind if r.error else None for r in recs]
    assert kinds == [None, None, "bad_time", "non_numeric", "missing_value",
                     "bad_message", "bad_message"]
    assert [r.lineno for r in recs] == list(range(7, 14))
    # a null channel is a blank reading, as an absent one is: the row goes on without it
    assert recs[1].values[:2] == [1.0, 2.0] and math.isnan(recs[1].values[2])
    absent = message_records(b'{"time": 1, "values": {"flow": 1}}', NAMES, 1)[0]
    assert absent.error is None and [math.isnan(v) for v in absent.values] == [False, True, True]
    assert recs[4].time == 1709251204.0  # a rejected sample keeps its time (resume skipping)
    # Python's json module reads NaN (not RFC 8259 JSON, but senders emit it): refused
    nan = message_records(b'{"time": 1, "values": {"flow": NaN, "pressure": 1, "vibration": 1}}',
                          NAMES, 1)
    assert nan[0].error.kind == "non_finite"
    assert message_records(b"{not json", NAMES, 1)[0].error.kind == "bad_message"
    assert message_records(b"\xff\xfe", NAMES, 1)[0].error.kind == "bad_encoding"


def test_a_reading_sent_as_text_is_read_as_the_same_cell_of_a_csv_feed(tmp_path):
    # Bridges that publish every reading as a JSON string ("41.2"): each value is read as the
    # same text in a CSV feed is, by the CSV source itself (blank, number or refused alike).
    cells = ["41.2", " -3e-2 ", "", "NaN", "n/a", "7"]
    texts = ["12,5", "inf", "one"]
    msgs = [{"time": 1709251200 + k, "values": {"flow": c, "pressure": 1, "vibration": 2}}
            for k, c in enumerate(cells + texts)]
    recs = message_records(json.dumps(msgs).encode(), NAMES, 1)
    feed = tmp_path / "feed.csv"
    feed.write_text("time;flow;pressure;vibration\n" + "".join(
        f"{m['time']};{m['values']['flow'].strip()};1;2\n" for m in msgs))
    with open(feed, "rb") as fh:
        rows = [r for r in CsvSource(fh, "time", NAMES) if r.header is None]
    assert len(rows) == len(recs) == len(msgs)
    for rec, row in zip(recs, rows):
        assert (rec.error and rec.error.kind) == (row.error and row.error.kind), (rec, row)
        if rec.error is None:
            assert np.array_equal(rec.values, row.values, equal_nan=True), (rec, row)
    assert recs[0].values == [41.2, 1.0, 2.0] and math.isnan(recs[2].values[0])
    # a decimal comma refuses the sample, as the row; a flag beside numbers is a blank reading
    assert [r.error and r.error.kind for r in recs[-3:]] == ["non_numeric", "non_finite", None]
    assert recs[-1].text_cells == 1 and math.isnan(recs[-1].values[0])
    assert "--decimal" not in recs[-3].error.detail  # MQTT input takes no --decimal
    every = message_records(b'{"time": 1, "values": {"flow": "Bad", "pressure": "Comm Fail"}}',
                            NAMES, 1)[0]
    assert every.error.kind == "non_numeric"  # no channel reads a number: refused, as the row
    # a JSON integer too large for a float (Python's json reads it whole): refused, not raised
    huge = message_records(b'{"time": 1, "values": {"flow": 1' + b"0" * 400 + b"}}", NAMES, 1)
    assert huge[0].error.kind == "non_finite"


def test_config_file_must_be_private(tmp_path):
    conf = tmp_path / "mqtt.ini"
    conf.write_text("[mqtt]\nhost = broker.example\nport = 8883\nusername = gw\n"
                    "password = s3cret\n")
    conf.chmod(0o644)
    with pytest.raises(MqttConfigError, match="chmod 600"):
        read_config(conf)
    conf.chmod(0o600)
    assert read_config(conf)["password"] == "s3cret"
    conf.write_text("[mqtt]\nhots = typo\n")
    with pytest.raises(MqttConfigError, match="unknown key"):
        read_config(conf)


# Runs run.py with paho made unimportable, as on a gateway without the package.
NO_PAHO = r"""
import sys, importlib.abc, runpy
class Blocker(importlib.abc.MetaPathFinder):
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] == "paho":
            raise ImportError("blocked: " + name)
sys.meta_path.insert(0, Blocker())
sys.argv = sys.argv[1:]
runpy.run_path(sys.argv[0], run_name="__main__")
"""


def test_without_paho_the_options_say_what_to_install(setup, tmp_path):
    run_py = str(setup["bundle"] / "run.py")
    p = subprocess.run([sys.executable, "-c", NO_PAHO, run_py, "stream", "--mqtt-out",
                        "--input", str(setup["csv"])],
                       capture_output=True, text=True, timeout=60)
    assert p.returncode == 2
    assert "apt-get install python3-paho-mqtt" in p.stderr and "pip install paho-mqtt" in p.stderr
    c = subprocess.run([sys.executable, "-c", NO_PAHO, run_py, "check"],
                       capture_output=True, text=True, timeout=60)
    assert c.returncode == 0 and "MQTT: not available" in c.stdout
    j = subprocess.run([sys.executable, "-c", NO_PAHO, run_py, "check", "--json"],
                       capture_output=True, text=True, timeout=60)
    assert json.loads(j.stdout)["mqtt"]["available"] is False
    # with paho: the version named is the installed package's own
    ok = subprocess.run([sys.executable, run_py, "check"], capture_output=True, text=True,
                        timeout=60)
    assert f"MQTT: available (paho-mqtt {paho.mqtt.__version__})" in ok.stdout
    # and the plain CSV gateway never imports paho (numpy + stdlib by default)
    plain = subprocess.run([sys.executable, "-c", NO_PAHO, run_py, "stream", "--input",
                            str(setup["csv"]), "--score-every", "0"],
                           capture_output=True, text=True, timeout=60)
    assert plain.returncode == 0, plain.stderr


# ---------------------------------------------------------------------- against mosquitto
@needs_broker
def test_feed_in_alerts_out_match_the_csv_run(setup, broker, tmp_path, capsys):
    out = tmp_path / "gw"
    out.mkdir()
    hmi = Listener(broker.port)
    feeder = Feeder(broker.port)
    proc = start_gateway(gateway_cmd(setup["bundle"], broker.port, out), hmi,
                         stderr_path=out / "stderr.txt")
    values = setup["values"]
    t0 = time.monotonic()
    sent = feeder.send(values[:300], 0)
    feeder.send_raw("{not json")  # rejected: counted and reported, the stream goes on
    feeder.send_raw(json.dumps({"time": format_time(fx.T0 + 300), "values": {"flow": None}}))
    # Hostile messages, each rejected while the stream goes on. Before, the first two raised
    # out of the MQTT source (Python's json module raises RecursionError on deep nesting; a
    # JSON integer beyond a float raised OverflowError) and stopped the gateway (this test
    # timed out at f62d990); the third was taken as a sample dated 1e300 s after the epoch,
    # where a CSV feed refuses any time outside 1900..9999.
    feeder.send_raw("[" * 20000 + "]" * 20000)
    huge = "1" + "0" * 400  # a JSON integer no float holds
    feeder.send_raw(f'{{"time": "{format_time(fx.T0 + 300)}", "values": {{"flow": {huge}}}}}')
    feeder.send_raw(json.dumps({"time": 1e300, "values": {"flow": 1.0}}))
    sent += 5 + feeder.send(values[300:], 300, batch=10)  # arrays of 10 samples too
    wait_until(lambda: processed_all(hmi, N_ROWS), what="every sample to be scored")
    elapsed = time.monotonic() - t0
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(timeout=30) == 0
    time.sleep(0.3)

    _same_as_baseline(setup, out, hmi)
    # QoS 1 for alerts: a QoS 1 subscriber receives min(publish QoS, granted QoS), so 1 here
    # means the gateway published at QoS 1 (OASIS MQTT 3.1.1 section 3.8.4 / 5.0 section 3.8.4)
    assert {q for _, q, _ in hmi.of("alerts")} == {1}
    errors = hmi.payloads("input_errors")
    totals = errors[-1]["totals"]
    assert totals == {"bad_message": 2, "missing_value": 1, "non_finite": 1, "bad_time": 1}
    status = hmi.payloads("status")
    assert status[0]["state"] == "online" and status[0]["bundle_id"] == setup["alerts"][0]["bundle_id"]
    assert status[-1] == dict(status[0], state="offline", reason="signal")
    # retained: a subscriber arriving after the stop still learns the gateway is offline
    # (OASIS MQTT 3.1.1 section 3.3.1.3, [MQTT-3.3.1-6]; 5.0 section 3.3.1.3)
    late = Listener(broker.port, client_id="late-hmi", topic=BASE + "/status")
    wait_until(lambda: late.of("status"), 10, "the retained status")
    late.close()
    assert late.of("status")[0][0]["state"] == "offline" and late.of("status")[0][2] is True
    err = (out / "stderr.txt").read_text()
    assert f"mqtt: {sent} messages in" in err
    hmi.close()
    feeder.close()
    with capsys.disabled():
        print(f"\n[mqtt] {N_ROWS} samples in {sent} messages, {len(hmi.messages)} messages out "
              f"({len(hmi.of('alerts'))} alerts); fed and scored in {elapsed:.2f} s")


@needs_broker
def test_a_channel_the_samples_stop_carrying_is_reported_at_qos_1(setup, broker, tmp_path):
    out = tmp_path / "gw"
    out.mkdir()
    hmi = Listener(broker.port)
    feeder = Feeder(broker.port)
    proc = start_gateway(gateway_cmd(setup["bundle"], broker.port, out), hmi)
    values = setup["values"][:200]
    feeder.send(values[:100], 0)
    for k in range(100, 200):  # the vibration transmitter stops: the key is absent
        feeder.send_raw(json.dumps({"time": format_time(fx.T0 + k),
                                    "values": {"flow": values[k, 0], "pressure": values[k, 1]}}))
    wait_until(lambda: processed_all(hmi, 200), what="every sample to be scored")
    wait_until(lambda: hmi.last_heartbeat()["channels_lost"] == ["vibration"], 10,
               "a heartbeat naming the lost channel")
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(timeout=30) == 0
    lost = hmi.of("channels")
    # QoS 1 received by a QoS 1 subscriber: published at QoS 1 (OASIS MQTT 3.1.1 section 3.8.4)
    assert [(p["event"], p["channel"], q) for p, q, _ in lost] == [
        ("channel_lost", "vibration", 1)]
    assert hmi.payloads("input_errors") == []  # the rows were scored, none refused
    hmi.close()
    feeder.close()


@needs_broker
def test_broker_restart_mid_stream_loses_no_alert(setup, broker, tmp_path, capsys):
    out = tmp_path / "gw"
    out.mkdir()
    hmi = Listener(broker.port)
    feeder = Feeder(broker.port)
    proc = start_gateway(gateway_cmd(setup["bundle"], broker.port, out), hmi)
    values = setup["values"]
    half = 495  # inside the second anomaly: an alert is open while the broker is away
    t0 = time.monotonic()
    feeder.send(values[:half], 0)
    wait_until(lambda: processed_all(hmi, half), what="the first half to be scored")
    broker.stop()
    time.sleep(1.5)  # the gateway, the feeder and the HMI all lose their connections
    sent_while_down = feeder.send(values[half:half + 40], half)  # queued in the feeder's paho
    broker.start()
    feeder.send(values[half + 40:], half + 40)
    wait_until(lambda: processed_all(hmi, N_ROWS), what="every sample after the restart")
    elapsed = time.monotonic() - t0
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(timeout=30) == 0
    time.sleep(0.3)
    _same_as_baseline(setup, out, hmi)
    online = [s for s in hmi.payloads("status") if s["state"] == "online"]
    assert len(online) >= 2  # online again after reconnecting
    hmi.close()
    feeder.close()
    with capsys.disabled():
        print(f"\n[mqtt] broker restart mid-stream: {N_ROWS} samples ({sent_while_down} sent "
              f"while the broker was down), all {len(setup['alerts'])} alert events delivered; "
              f"test took {elapsed:.2f} s")


def _paho1_path(tmp_path):
    """Debian bookworm's python3-paho-mqtt 1.6.1 (from the arm64 userland of gateways.py; the
    package is Architecture: all, pure Python) on a path of its own."""
    arm = gw.gateway("arm64-debian")
    if arm is None:
        pytest.skip(gw.skip_reason("arm64-debian"))
    src = gw.cache_dir() / "arm64-root" / "usr" / "lib" / "python3" / "dist-packages" / "paho"
    if not src.is_dir():
        pytest.skip(f"Debian's python3-paho-mqtt not found at {src}")
    folder = tmp_path / "paho1"
    folder.mkdir()
    (folder / "paho").symlink_to(src)
    return folder


@needs_broker
@pytest.mark.parametrize("client", ["paho2-pypi", "paho1-debian"])
def test_sigkill_of_the_gateway_loses_nothing(setup, broker, tmp_path, client):
    env = dict(os.environ)
    if client == "paho1-debian":
        env["PYTHONPATH"] = str(_paho1_path(tmp_path))
    out = tmp_path / "gw"
    out.mkdir()
    hmi = Listener(broker.port)
    feeder = Feeder(broker.port)
    cmd = gateway_cmd(setup["bundle"], broker.port, out)
    log = out / "stderr.txt"
    proc = start_gateway(cmd, hmi, env=env, stderr_path=log)
    want = "1.x, held callback" if client == "paho1-debian" else "2.x, manual acknowledgement"
    assert want in wait_until(lambda: "(paho" in log.read_text() and log.read_text())
    feeder.send(setup["values"], 0)  # the broker queues what the gateway has not taken yet
    kills = 0
    # kill points: right after the first alert reaches the HMI, then mid-way through scoring
    for ready in (lambda: hmi.payloads("alerts"), lambda: processed_after(hmi, 560)):
        wait_until(ready, what="the kill point (a sample lost in a kill never arrives)")
        proc.kill()
        assert proc.wait(timeout=10) == -signal.SIGKILL
        kills += 1
        # the last will: the broker publishes "offline" for the dead connection
        # (OASIS MQTT 3.1.1 sections 3.1.2.5 and 3.1.2.7, [MQTT-3.1.2-8]; 5.0 section 3.1.2.5)
        wait_until(lambda: hmi.payloads("status")[-1].get("reason") == "connection_lost",
                   10, "the last will")
        proc = start_gateway(cmd, hmi, env=env, stderr_path=log)
    assert kills == 2
    wait_until(lambda: processed_all(hmi, N_ROWS), what="every sample after the restarts")
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(timeout=30) == 0
    time.sleep(0.3)
    # samples not acknowledged at the kill were re-sent by the broker on reconnect
    # (OASIS MQTT 3.1.1 section 4.4, [MQTT-4.4.0-1]; 5.0 section 4.4): none lost, none twice
    _same_as_baseline(setup, out, hmi)
    assert hmi.last_heartbeat()["counters"]["samples"] == N_ROWS
    hmi.close()
    feeder.close()


@needs_broker
def test_unacknowledged_alert_is_resent_after_restart(setup, tmp_path):
    """The broker is down when the alert is raised and the gateway is killed: only the
    checkpoint still knows the alert. The input replay cannot raise it again (its rows are
    behind the checkpoint), so it reaches the HMI only if the restart re-sends it. The
    restarted gateway comes up before the broker and then sees no new event: the re-send must
    go out from the idle loop once the connection is there."""
    broker = Broker(tmp_path / "broker").start()
    hmi = Listener(broker.port)  # its persistent session outlives the broker's restart
    broker.stop()
    lines = setup["csv"].read_text().splitlines()
    live = tmp_path / "live.csv"
    live.write_text("\n".join(lines[:260]) + "\n")  # through the first anomaly's opening
    out = tmp_path / "gw"
    out.mkdir()
    cmd = [sys.executable, str(setup["bundle"] / "run.py"), "stream", "--input", str(live),
           "--follow", "--mqtt-out", "--mqtt-host", "127.0.0.1", "--mqtt-port",
           str(broker.port), "--backend", "numpy", "--heartbeat", "0",
           "--state", str(out / "state.json")]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    opened = None
    for line in proc.stdout:
        event = json.loads(line)
        if event["event"] == "alert_opened":
            opened = event
        elif opened is not None:  # the next event: the alert's checkpoint is written
            break
    proc.kill()
    proc.wait(timeout=10)
    proc.stdout.close()
    assert opened is not None
    saved = json.loads((out / "state.json").read_text())["state"]["sinks"]["mqtt"]
    assert [e["alert_id"] for e in saved["unacknowledged"]] == [opened["alert_id"]]

    again = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    log = []
    reader = threading.Thread(target=lambda: log.extend(again.stderr), daemon=True)
    reader.start()
    wait_until(lambda: any("re-sending 1 alert event" in x for x in log), what="the re-send")
    broker.start()  # same port: the gateway's back-off reconnects to it
    try:
        wait_until(lambda: hmi.payloads("alerts"), what="the re-sent alert")
        again.send_signal(signal.SIGTERM)
        rest, _ = again.communicate(timeout=30)
        assert hmi.payloads("alerts")[0] == opened
        replayed = [json.loads(x) for x in rest.splitlines()]
        assert not [e for e in replayed if e["event"] == "alert_opened"]  # not from the replay
        saved = json.loads((out / "state.json").read_text())["state"]["sinks"]["mqtt"]
        assert saved["unacknowledged"] == []  # acknowledged before the final checkpoint
    finally:
        hmi.close()
        if again.poll() is None:
            again.kill()
        broker.stop()


@needs_broker
def test_password_from_the_config_file(setup, tmp_path):
    passwords = tmp_path / "passwords"
    # mosquitto_passwd (Debian's mosquitto package) writes the broker's hashed password file
    subprocess.run(["mosquitto_passwd", "-c", "-b", str(passwords), "gw", "pump-7-secret"],
                   check=True, capture_output=True)
    subprocess.run(["mosquitto_passwd", "-b", str(passwords), "hmi", "hmi-secret"],
                   check=True, capture_output=True)
    passwords.chmod(0o600)
    broker = Broker(tmp_path / "broker", extra=f"password_file {passwords}\n")
    broker.conf.write_text(broker.conf.read_text().replace("allow_anonymous true",
                                                           "allow_anonymous false"))
    broker.start()
    try:
        hmi = Listener(broker.port, auth=("hmi", "hmi-secret"))
        conf = tmp_path / "mqtt.ini"
        conf.write_text(f"[mqtt]\nhost = 127.0.0.1\nport = {broker.port}\nusername = gw\n"
                        "password = pump-7-secret\n")
        conf.chmod(0o600)
        assert stat.S_IMODE(conf.stat().st_mode) == 0o600
        cmd = [sys.executable, str(setup["bundle"] / "run.py"), "stream", "--input",
               str(setup["csv"]), "--mqtt-out", "--mqtt-config", str(conf),
               "--backend", "numpy", "--score-every", "0", "--heartbeat", "0"]
        done = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
        assert done.returncode == 0, done.stderr
        wait_until(lambda: len(unique_alerts(hmi)) == len(setup["alerts"]), 20, "the alerts")
        assert unique_alerts(hmi) == setup["alerts"]
        # a wrong password: the broker refuses the connection (OASIS MQTT 3.1.1 section
        # 3.2.2.3, return code 4 or 5) and nothing is published
        conf.write_text(conf.read_text().replace("pump-7-secret", "wrong"))
        before = len(hmi.messages)
        bad = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
        assert "broker refused the connection" in bad.stderr
        time.sleep(0.5)
        assert len(hmi.messages) == before
        hmi.close()
    finally:
        broker.stop()


def _tls_files(folder: Path):
    """A CA, a server certificate for 127.0.0.1 and a client certificate, made with the
    openssl command line."""
    folder.mkdir()

    def ssl(*args):
        subprocess.run(["openssl", *args], cwd=folder, check=True, capture_output=True)

    ssl("req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "2", "-subj", "/CN=test-ca",
        "-keyout", "ca.key", "-out", "ca.crt")
    for name, extra in (("server", ["-addext", "subjectAltName=IP:127.0.0.1"]), ("client", [])):
        ssl("req", "-newkey", "rsa:2048", "-nodes", "-subj", f"/CN={name}", "-keyout",
            f"{name}.key", "-out", f"{name}.csr", *extra)
        ssl("x509", "-req", "-in", f"{name}.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
            "-CAcreateserial", "-days", "2", "-copy_extensions", "copy", "-out", f"{name}.crt")
    return folder


@needs_broker
@pytest.mark.skipif(shutil.which("openssl") is None, reason="openssl command not found")
def test_tls_with_a_client_certificate(setup, tmp_path):
    certs = _tls_files(tmp_path / "certs")
    tls_port = free_port()
    broker = Broker(tmp_path / "broker", extra=(
        f"listener {tls_port} 127.0.0.1\ncafile {certs}/ca.crt\ncertfile {certs}/server.crt\n"
        f"keyfile {certs}/server.key\nrequire_certificate true\n"))
    broker.start()
    try:
        hmi = Listener(broker.port)  # the HMI on the plain listener of the same broker
        base = [sys.executable, str(setup["bundle"] / "run.py"), "stream", "--input",
                str(setup["csv"]), "--mqtt-out", "--mqtt-host", "127.0.0.1",
                "--mqtt-port", str(tls_port), "--mqtt-ca", str(certs / "ca.crt"),
                "--backend", "numpy", "--score-every", "0", "--heartbeat", "0"]
        done = subprocess.run(base + ["--mqtt-cert", str(certs / "client.crt"),
                                      "--mqtt-key", str(certs / "client.key")],
                              capture_output=True, text=True, timeout=120)
        assert done.returncode == 0, done.stderr
        assert "over TLS" in done.stderr
        wait_until(lambda: len(unique_alerts(hmi)) == len(setup["alerts"]), 20, "the alerts")
        assert unique_alerts(hmi) == setup["alerts"]
        # without the client certificate the broker ends the TLS handshake: nothing arrives
        before = len(hmi.messages)
        refused = subprocess.run(base, capture_output=True, text=True, timeout=120)
        assert refused.returncode == 0 and "connected to" not in refused.stderr
        time.sleep(0.5)
        assert len(hmi.messages) == before
        hmi.close()
    finally:
        broker.stop()


@needs_broker
@pytest.mark.parametrize("name", ["py39-numpy1.19", "arm64-debian"])
def test_gateway_interpreters_stream_over_mqtt(setup, broker, tmp_path, name):
    """One MQTT run on each gateway interpreter of tests/gateways.py: Python 3.9 with PyPI's
    paho-mqtt 2.x, and Debian arm64 (under qemu) with Debian's paho-mqtt 1.6.1."""
    target = gw.gateway(name)
    if target is None:
        pytest.skip(gw.skip_reason(name))
    n = 300  # qemu is slow: the first anomaly only
    ref = csv_run(setup["bundle"], setup["values"][:n], tmp_path / "ref")
    version = subprocess.run([*target.argv_prefix, "-c", "import paho.mqtt as m; "
                              "print(m.__version__)"], env=target.env, capture_output=True,
                             text=True, timeout=120).stdout.strip()
    mode = "2.x, manual acknowledgement" if version.startswith("2.") else "1.x, held callback"
    out = tmp_path / "gw"
    out.mkdir()
    hmi = Listener(broker.port)
    feeder = Feeder(broker.port)
    log = out / "stderr.txt"
    proc = start_gateway(gateway_cmd(setup["bundle"], broker.port, out, python=target.argv_prefix),
                         hmi, env=target.env, stderr_path=log)
    feeder.send(setup["values"][:n], 0, batch=5)
    wait_until(lambda: processed_all(hmi, n), 180, "every sample to be scored")
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(timeout=60) == 0, log.read_text()
    time.sleep(0.3)
    assert f"(paho {mode})" in log.read_text()
    assert unique_alerts(hmi) == ref["alerts"] and ref["alerts"]
    # scores as on the host, within the manifest's parity tolerance (score_rel 1e-5)
    # reference: pandas.read_csv skips the `#` provenance lines
    ours = pd.read_csv(out / "scores.csv", comment="#")["score"].to_numpy()
    want = pd.read_csv(ref["base"] / "scores.csv", comment="#")["score"].to_numpy()
    assert len(ours) == len(want) == (n - 16) // 4 + 1
    np.testing.assert_allclose(ours, want, rtol=1e-5)
    hmi.close()
    feeder.close()
