"""The systemd unit a bundle ships works as shipped (issue 13 section 4, issue 12 item 4):
`systemd-analyze verify` accepts it for any valid bundle name, it runs as a dedicated user in
its own state directory with `python3 -I -B`, waits for the network only for MQTT, and passes
the signature options when the bundle is signed."""

import shutil
import subprocess

import pytest

from ganlet.compile.pack import (
    HMAC_KEY_FILE,
    PUBLIC_KEY_FILE,
    VERIFIER,
    check_name,
    install_text,
    service_unit,
    unit_name,
)

# Names at the edges of compile/pack.py NAME_RE: one character, 64 characters, every allowed
# punctuation mark, dots that look like path parts, trailing punctuation.
NAMES = ["a", "x" * 64, "fan-2", "Pump_3.v2", "9.-_", "a..b", "Z-", "pump.", "0"]
SIGNINGS = [(), ("hmac-sha256",), ("ed25519",), ("hmac-sha256", "ed25519")]
SYSTEMD_ANALYZE = shutil.which("systemd-analyze")


def directives(unit: str) -> dict:
    out = {}
    for line in unit.splitlines():
        if "=" in line and not line.startswith("#"):
            key, value = line.split("=", 1)
            out.setdefault(key, []).append(value)
    return out


@pytest.mark.skipif(SYSTEMD_ANALYZE is None,
                    reason="systemd-analyze is not installed (apt-get install systemd)")
@pytest.mark.parametrize("name", NAMES)
def test_systemd_analyze_verify_accepts_the_unit(tmp_path, name):
    check_name(name)  # precondition: a name the packer accepts
    for i, signing in enumerate(SIGNINGS):
        folder = tmp_path / str(i)
        folder.mkdir()
        path = folder / unit_name(name)
        path.write_text(service_unit(name, signing, mqtt=bool(i % 2)))
        # reference: systemd's own unit parser (systemd-analyze verify, systemd.unit(5))
        p = subprocess.run([SYSTEMD_ANALYZE, "verify", str(path)], capture_output=True,
                           text=True, timeout=60)
        assert p.returncode == 0, (signing, p.stdout, p.stderr)
        assert path.name not in p.stderr, p.stderr  # no warning about our file either


@pytest.mark.skipif(SYSTEMD_ANALYZE is None, reason="systemd-analyze is not installed")
def test_systemd_analyze_verify_can_fail(tmp_path):
    """The checks above can fail: a warning names the file, a bad file name is an error."""
    path = tmp_path / "ganlet-broken.service"
    path.write_text(service_unit("broken").replace("StateDirectory=ganlet/broken",
                                                   "StateDirectory=../broken"))
    p = subprocess.run([SYSTEMD_ANALYZE, "verify", str(path)], capture_output=True, text=True)
    assert path.name in p.stderr and "StateDirectory= path is not normalized" in p.stderr
    spaced = tmp_path / "ganlet-fan 2.service"  # what `--name "fan 2"` used to produce
    spaced.write_text(service_unit("fan-2"))
    p = subprocess.run([SYSTEMD_ANALYZE, "verify", str(spaced)], capture_output=True, text=True)
    assert p.returncode != 0


def test_unit_runs_isolated_as_its_own_user_in_its_state_directory():
    d = directives(service_unit("fan-2"))
    assert d["User"] == ["ganlet"] and d["Group"] == ["ganlet"]
    assert d["StateDirectory"] == ["ganlet/fan-2"]
    assert d["ProtectSystem"] == ["strict"] and d["NoNewPrivileges"] == ["yes"]
    (exec_start,) = d["ExecStart"]
    assert exec_start.startswith("/usr/bin/python3 -I -B /opt/ganlet/fan-2/run.py stream ")
    for path in ("--state /var/lib/ganlet/fan-2/state.json",
                 "--alert-db /var/lib/ganlet/fan-2/alerts.sqlite",
                 "--scores-out /var/lib/ganlet/fan-2/scores.csv --scores-max-mb 16"):
        assert path in exec_start
    assert "--key" not in exec_start and "--require-signature" not in exec_start
    assert "After" not in d and "network" not in service_unit("fan-2")


def test_unit_waits_for_the_network_only_for_mqtt():
    d = directives(service_unit("fan-2", mqtt=True))
    assert d["After"] == ["network-online.target"] and d["Wants"] == ["network-online.target"]


@pytest.mark.parametrize("signing,option", [
    (("hmac-sha256",), f"--key {HMAC_KEY_FILE} --require-signature"),
    (("ed25519",), f"--public-key {PUBLIC_KEY_FILE} --require-signature"),
    (("hmac-sha256", "ed25519"), f"--public-key {PUBLIC_KEY_FILE} --require-signature"),
])
def test_a_signed_bundle_is_checked_by_the_installed_verifier_with_its_key(signing, option):
    (exec_start,) = directives(service_unit("fan-2", signing))["ExecStart"]
    assert exec_start.startswith(f"/usr/bin/python3 -I -B {VERIFIER} stream "
                                 "--bundle /opt/ganlet/fan-2 ")
    assert exec_start.endswith(option)
    assert not HMAC_KEY_FILE.startswith("/opt/ganlet")  # the key lives outside any bundle


def test_install_text_states_the_security_model():
    unsigned = install_text("fan-2", "a53-512", "B", "time", "flow, pressure", 60.0)
    assert "catches\ncorruption" in unsigned and "does NOT catch a deliberate edit" in unsigned
    assert service_unit("fan-2") in unsigned
    assert "useradd --system" in unsigned and "python3 -I -B /opt/ganlet/fan-2/run.py check" in \
        unsigned
    signed = install_text("fan-2", "a53-512", "B", "time", "flow", 60.0, ["ed25519"])
    assert "SIGNED (ed25519)" in signed and service_unit("fan-2", ["ed25519"]) in signed
    assert f"install -m 0640 -o root -g ganlet THE-PUBLIC-KEY.pem {PUBLIC_KEY_FILE}" in signed
    assert f"install -D -m 0644 -o root -g root run.py {VERIFIER}" in signed
    assert "python3-cryptography" in signed
